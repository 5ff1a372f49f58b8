"""pytest set-up for the whole repository: the tests in tests/ and the docstring examples
in allocator/ (``--doctest-modules``, configured in pyproject.toml)."""

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent
PACKAGE = ROOT / "allocator"

# ``python -m allocator`` runs the command line when imported: never collect it
collect_ignore = ["allocator/__main__.py"]


@pytest.fixture(autouse=True)
def _examples_run_from_the_repository_root(request, monkeypatch):
    """Docstring examples load the demo cases as ``cases/...``, as a user in the repository
    would; run them from the repository root wherever pytest was started."""
    if PACKAGE in Path(request.node.path).parents:
        monkeypatch.chdir(ROOT)
