"""Rules for the test suite itself (DEVELOPERS.md, "Tests").

- Test modules take shared code from tests/helpers.py and never import each other (a test
  module imported by another runs its module-level code twice and ties the two together).
- Documents cited in the tests and in the package's docstrings are the repository's own: a
  relative path to a file that is here, never an absolute path or one leading out.

Markers are checked by pytest itself (``--strict-markers`` in pyproject.toml).
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

TESTS = Path(__file__).resolve().parent
ROOT = TESTS.parent
TEST_MODULES = {path.stem for path in TESTS.rglob("test_*.py")}
CITED_DOCUMENT = re.compile(r"[\w./-]+\.md\b")


def _python_files(*folders: Path) -> list[Path]:
    return sorted(path for folder in folders for path in folder.rglob("*.py"))


def test_test_modules_do_not_import_each_other():
    offenders = []
    for path in _python_files(TESTS):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names = [node.module]
            elif isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            else:
                continue
            offenders += [f"{path.relative_to(ROOT)}:{node.lineno} imports {name}"
                          for name in names if name.split(".")[0] in TEST_MODULES]
    assert not offenders, "move the shared code to tests/helpers.py: " + "; ".join(offenders)


def test_cited_documents_are_in_the_repository():
    offenders = []
    for path in _python_files(TESTS, ROOT / "allocator"):
        for match in CITED_DOCUMENT.finditer(path.read_text(encoding="utf-8")):
            cited = match.group()
            outside = cited.startswith("/") or ".." in cited.split("/")
            if outside or not (ROOT / cited).is_file():
                offenders.append(f"{path.relative_to(ROOT)} cites {cited}")
    assert not offenders, offenders
