"""Malformed case files: one line naming file, field path and problem; exit 2; nothing written.

Each file in tests/bad_cases starts with ``# expect: <fragment>``; the fragment (field
path and problem) must appear in the message, through the library and through the CLI.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner

from allocator import case as case_module
from allocator.case import MAX_CONTRIBUTORS, load_case, loads_case
from allocator.errors import CaseError

BAD = Path(__file__).parent / "bad_cases"
CORPUS = sorted(BAD.glob("*.toml"))
IDS = [p.stem for p in CORPUS]


def expected_fragment(path: Path) -> str:
    first = path.read_bytes().split(b"\n", 1)[0].decode("utf-8")
    assert first.startswith("# expect: "), f"{path.name}: first line must be '# expect: ...'"
    return first.removeprefix("# expect: ").strip()


@pytest.fixture(scope="module")
def corpus(tmp_path_factory) -> Path:
    """A copy of the corpus, with a real CSV just outside it so '../' has a target."""
    root = tmp_path_factory.mktemp("bad")
    shutil.copytree(BAD, root / "bad_cases")
    (root / "outside_costs.csv").write_text("tolerance,cost\n0.01,3.0\n0.2,0.5\n", encoding="utf-8")
    return root / "bad_cases"


def _analyze_or_skip():
    pytest.importorskip("allocator.cli.analyze", reason="the analyze command is not written yet")
    from allocator.cli.main import cli

    return cli


def test_corpus_is_large_and_well_formed():
    assert len(CORPUS) >= 40
    for path in CORPUS:
        assert expected_fragment(path)


@pytest.mark.parametrize("name", IDS)
def test_library_reports_one_line(corpus, name):
    path = corpus / f"{name}.toml"
    fragment = expected_fragment(path)
    with pytest.raises(CaseError) as info:
        load_case(path)
    message = str(info.value)
    assert fragment in message
    assert "\n" not in message
    assert info.value.file == str(path) and message.startswith(f"{path}: ")


@pytest.mark.parametrize("name", IDS)
def test_cli_exits_2_with_one_line(corpus, name):
    cli = _analyze_or_skip()
    path = corpus / f"{name}.toml"
    result = CliRunner().invoke(cli, ["analyze", str(path)])
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1, result.output
    assert expected_fragment(path) in lines[0] and str(path) in lines[0]
    assert "Traceback" not in result.output


def test_bad_runs_write_nothing(tmp_path, monkeypatch):
    cli = _analyze_or_skip()
    folder = tmp_path / "bad_cases"
    shutil.copytree(BAD, folder)
    before = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*"))
    monkeypatch.chdir(folder)
    runner = CliRunner()
    for path in CORPUS:
        result = runner.invoke(cli, ["analyze", path.name])
        assert result.exit_code == 2, (path.name, result.output)
    after = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*"))
    assert after == before


def test_huge_file_is_refused_before_parsing(tmp_path, monkeypatch):
    path = tmp_path / "huge.toml"
    with open(path, "wb") as fh:
        fh.write(b'title = "big"\n')
        fh.write(b"#" * (17 * 1024 * 1024))

    def must_not_parse(text):
        raise AssertionError("a file over the limit was parsed")

    monkeypatch.setattr(case_module.tomllib, "loads", must_not_parse)
    with pytest.raises(CaseError) as info:
        load_case(path)
    assert "larger than 16 MB" in str(info.value) and "\n" not in str(info.value)
    with pytest.raises(CaseError, match="larger than 16 MB"):
        loads_case("#" * (17 * 1024 * 1024))


def test_too_many_contributors_is_refused():
    parts = ['title = "many"\n']
    parts += [f'[[contributor]]\nname = "c{i}"\nnominal = 1\ntolerance = 0.1\nfixed = true\n'
              for i in range(MAX_CONTRIBUTORS + 1)]
    parts.append('[[requirement]]\nname = "r"\nchain = { c0 = 1 }\nupper = 2\n')
    with pytest.raises(CaseError) as info:
        loads_case("".join(parts), source="many.toml")
    assert str(info.value) == "many.toml: contributor: too many entries (100001; the limit is 100000)"
