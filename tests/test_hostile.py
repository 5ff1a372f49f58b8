"""Hostile input: expressions that try to escape, nesting and numbers built to exhaust the
parser, files far above the size limits, CSV tables with bad rows, table paths that leave
the case's folder, and output paths that would overwrite the input.

Every one must end in one line naming the file (and field) with exit code 2 through
``allocator analyze`` and ``allocator allocate`` -- never a traceback, a hang or a large
allocation -- and leave nothing written. Memory is measured with :mod:`tracemalloc`;
there are no timed assertions (speed is the benchmarks' job).
"""

from __future__ import annotations

import importlib.util
import os
import re
import tomllib
import tracemalloc
from pathlib import Path

import pytest
from click.testing import CliRunner

from allocator import case as case_module
from allocator.case import MAX_CONTRIBUTORS, MAX_FILE_BYTES, MAX_TABLE_ROWS, load_case, loads_case
from allocator.cli.main import cli
from allocator.errors import CaseError

COMMANDS = ("analyze", "allocate")

# An invented case: a bracket whose gap is an expression of two parts.
CASE = """\
title = "Hostile-input test bracket (invented)"

[[contributor]]
name = "x"
nominal = 1.0
tolerance = 0.05
limits = [0.01, 0.2]
cost = {{ curve = "reciprocal", a = 1.0, b = 0.05 }}

[[contributor]]
name = "y"
nominal = 2.0
tolerance = 0.05
{y_cost}

[[requirement]]
name = "gap"
{response}
upper = 100
"""
PLAIN_COST = 'limits = [0.01, 0.2]\ncost = { curve = "reciprocal", a = 1.0, b = 0.05 }'


def case_text(expression: str | None = None, *, y_cost: str = PLAIN_COST) -> str:
    """The invented case with ``expression`` as the requirement (TOML-escaped), or a chain."""
    if expression is None:
        response = "chain = { x = 1, y = -1 }"
    else:
        escaped = expression.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")
        escaped = escaped.replace("\x00", "\\u0000")
        response = f'expression = "{escaped}"'
    return CASE.format(response=response, y_cost=y_cost)


def run_cli(args, cwd: Path | None = None):
    runner = CliRunner()
    if cwd is None:
        return runner.invoke(cli, args)
    old = os.getcwd()
    os.chdir(cwd)
    try:
        return runner.invoke(cli, args)
    finally:
        os.chdir(old)


def assert_one_line_exit_2(result, *fragments: str) -> str:
    """Exit 2, exactly one line of output, no traceback, every fragment in that line."""
    assert result.exit_code == 2, (result.exit_code, result.output, result.exception)
    assert "Traceback" not in result.output
    assert not isinstance(result.exception, Exception) or isinstance(result.exception, SystemExit), (
        repr(result.exception)
    )
    lines = result.output.strip().splitlines()
    assert len(lines) == 1, result.output
    for fragment in fragments:
        assert fragment in lines[0], (fragment, lines[0])
    return lines[0]


def assert_refused_everywhere(path: Path, *fragments: str, cwd: Path | None = None) -> None:
    """Library: one-line CaseError; CLI analyze and allocate: exit 2, one line."""
    with pytest.raises(CaseError) as info:
        load_case(path)
    message = str(info.value)
    assert "\n" not in message and message.startswith(f"{path}: "), message
    for fragment in fragments:
        assert fragment in message, (fragment, message)
    for command in COMMANDS:
        assert_one_line_exit_2(run_cli([command, str(path)], cwd), str(path), *fragments)


def files_in(folder: Path) -> list[str]:
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


# --------------------------------------------------------------------------- expressions

HOSTILE_EXPRESSIONS = [
    # attribute access and dunder names: the classic ways out of an eval sandbox
    ("x.__class__", "attribute access '.__class__' is not allowed"),
    ("().__class__.__bases__[0].__subclasses__()", "not allowed"),
    ("x.real", "attribute access '.real' is not allowed"),
    ("__builtins__", "name '__builtins__' is not allowed"),
    ("__import__('os').system('true')", "not allowed"),
    ("getattr(x, 'real')", "call of 'getattr' is not allowed"),
    ("open('/etc/passwd')", "call of 'open' is not allowed"),
    ("eval('1')", "call of 'eval' is not allowed"),
    ("sqrt.__call__(x)", "attribute access '.__call__' is not allowed"),
    ("sqrt(x)(y)", "not allowed"),
    ("x(y)", "call of 'x' is not allowed"),
    # functions, comprehensions and other statements in disguise
    ("lambda: x", "lambda is not allowed"),
    ("(lambda q: q)(x)", "not allowed"),
    ("[q for q in (x, y)]", "comprehension is not allowed"),
    ("sum(q for q in (x, y))", "not allowed"),
    ("{q: q for q in (x,)}", "comprehension is not allowed"),
    ("(z := x) + z", "not allowed"),
    ("x if y else 0", "not allowed"),
    ("x < y", "comparison is not allowed"),
    ("x and y", "not allowed"),
    ("x[0]", "indexing is not allowed"),
    ("f'{x}'", "not allowed"),
    ("'text'", "not allowed (numbers only)"),
    ("b'x'", "not allowed (numbers only)"),
    ("x + 1j", "not allowed (numbers only)"),
    ("True + x", "not allowed (numbers only)"),
    ("sqrt(x=1)", "takes no keyword arguments"),
    ("sqrt(*x)", "starred arguments are not allowed"),
    ("x ^ y", "operator BitXor is not allowed"),
    ("x // y", "operator FloorDiv is not allowed"),
    ("x % y", "operator Mod is not allowed"),
    ("~x", "not allowed"),
    ("x; y", "expression is not valid"),
    ("import os", "expression is not valid"),
    ("yield x", "expression is not valid"),
    ("x\x00", "expression is not valid"),
    # numbers built to hang or overflow
    ("9**9**9", "exponent is too large"),
    ("x**(9**9)", "exponent is too large"),
    ("(x**2)**100", "exponent is too large"),
    ("x**-1e6", "exponent is too large"),
    ("x * 1e400", "must be finite"),
    ("x * 1" + "0" * 400, "must be finite"),  # an integer literal beyond the float range
    ("x + 0x" + "f" * 300, "must be finite"),
    ("x ** 1" + "0" * 400, "must be finite"),
    ("x * 1" + "0" * 5000, "expression is not valid"),  # more digits than Python converts
    ("exp(exp(exp(100 * x)))", "not finite at the nominals"),
    ("x * 1e308 * 1e308", "not finite at the nominals"),
    # length and depth
    ("x" * 10_001, "longer than 10000 characters"),
    ("(" * 10_000 + "x" + ")" * 10_000, "longer than 10000 characters"),
    ("-" * 10_000 + "x", "longer than 10000 characters"),
    ("(" * 4_990 + "x" + ")" * 4_990, "expression is not valid"),
    ("-" * 9_990 + "x", "nested too deeply"),
    ("+" * 9_990 + "x", "nested too deeply"),
    ("sqrt(" * 1_400 + "x" + ")" * 1_400, "nested"),
    ("x" + "+x" * 4_000, "nested"),  # a long flat sum is a deep left-leaning tree
]


@pytest.mark.parametrize(
    "expression, fragment",
    HOSTILE_EXPRESSIONS,
    ids=[f"{i:02d}-{e[:24]!r}" for i, (e, _) in enumerate(HOSTILE_EXPRESSIONS)],
)
def test_hostile_expression_is_refused_in_one_line(tmp_path, expression, fragment):
    path = tmp_path / "hostile.toml"
    path.write_text(case_text(expression), encoding="utf-8")
    assert tomllib.loads(path.read_text(encoding="utf-8"))["requirement"][0]["expression"] == expression
    assert_refused_everywhere(path, "requirement[1] (gap).expression", fragment)
    assert files_in(tmp_path) == ["hostile.toml"]


def test_the_same_case_with_a_plain_expression_loads(tmp_path):
    """Control: the invented case itself is fine, so each refusal above is the expression's."""
    path = tmp_path / "fine.toml"
    path.write_text(case_text("x - y + sqrt(x * y) / 10"), encoding="utf-8")
    case = load_case(path)
    assert case.requirements[0].expression == "x - y + sqrt(x * y) / 10"
    result = run_cli(["analyze", str(path)])
    assert result.exit_code == 0, result.output


# --------------------------------------------------------------------------- TOML nesting


@pytest.mark.parametrize(
    "text, fragment",
    [
        ("title = " + "[" * 100_000 + "]" * 100_000 + "\n", "not valid TOML"),
        ("title = " + "{a = " * 10_000 + "1" + "}" * 10_000 + "\n", "not valid TOML"),
        ('title = "t"\n' + "[" + "a." * 10_000 + "a]\nb = 1\n", "unknown key 'a'"),
        ('title = "t"\nunits = "' + "\\u0000" * 1000 + '"\n', "units: must be a short label"),
    ],
    ids=["arrays-1e5-deep", "inline-tables-1e4-deep", "dotted-key-1e4-long", "nul-characters"],
)
def test_toml_built_to_exhaust_the_parser_is_one_line(tmp_path, text, fragment):
    path = tmp_path / "deep.toml"
    path.write_text(text, encoding="utf-8")
    assert_refused_everywhere(path, fragment)


# --------------------------------------------------------------------------- size limits


def _load_refused_unopened(monkeypatch, path, *, never_open):
    """load_case(path) must raise CaseError without opening ``never_open``; returns the
    error and the peak traced memory [bytes] while refusing."""
    real_open = open

    def guarded_open(file, mode="r", *args, **kwargs):
        if Path(file) == never_open:
            raise AssertionError(f"the oversized file {never_open.name} was opened")
        return real_open(file, mode, *args, **kwargs)

    monkeypatch.setattr("builtins.open", guarded_open)
    tracemalloc.start()
    try:
        with pytest.raises(CaseError) as info:
            load_case(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
        monkeypatch.undo()
    return info.value, peak


def test_a_100_mb_case_is_refused_before_it_is_read(tmp_path, monkeypatch):
    """A sparse 100 MB file: refused from its size alone, in bounded memory."""
    path = tmp_path / "huge.toml"
    with open(path, "wb") as fh:
        fh.write(b'title = "huge"\n')
        fh.truncate(100 * 2**20)  # sparse: nothing is written to disk
    assert path.stat().st_size == 100 * 2**20

    error, peak = _load_refused_unopened(monkeypatch, path, never_open=path)
    assert str(error) == f"{path}: file is larger than 16 MB (100.0 MB); refusing to read it"
    assert peak < 1 * 2**20, f"peak {peak / 2**20:.1f} MB while refusing"
    for command in COMMANDS:
        assert_one_line_exit_2(run_cli([command, str(path)]), "larger than 16 MB")


def test_a_file_larger_than_its_stat_says_is_refused_after_the_cap(tmp_path, monkeypatch):
    """A file can grow between stat and read (or be a special file that reports size 0):
    the loader reads at most 16 MB + 1 byte and refuses on the bytes themselves."""
    path = tmp_path / "growing.toml"
    with open(path, "wb") as fh:
        fh.write(b'title = "grows"\n')
        fh.truncate(20 * 2**20)
    real_stat = Path.stat

    class Small:
        st_size = 100
        st_mode = real_stat(path).st_mode

    monkeypatch.setattr(Path, "stat", lambda self, **kw: Small() if self == path else real_stat(self, **kw))
    tracemalloc.start()
    try:
        with pytest.raises(CaseError) as info:
            load_case(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert str(info.value) == f"{path}: file is larger than 16 MB (16.0 MB); refusing to read it"
    assert peak < 2 * MAX_FILE_BYTES + 2**20  # the capped bytes (and one copy), never 20 MB more


def test_reading_a_small_case_does_not_reserve_the_cap():
    """read(n) reserves n bytes up front: a 1 kB case must not cost 16 MB of memory."""
    path = Path(__file__).resolve().parents[1] / "cases" / "gearbox_end_play.toml"
    load_case(path)  # imports and caches out of the measurement
    tracemalloc.start()
    try:
        load_case(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 2**20, f"peak {peak / 2**20:.1f} MB for a {path.stat().st_size} byte case"


# slow (writes 15 MB); the header count has a fast check in
# test_header_count_accepts_spaced_headers_and_ignores_commented_ones
@pytest.mark.slow
def test_a_million_contributor_headers_are_refused_before_parsing(tmp_path, monkeypatch):
    """10^6 ``[[contributor]]`` tables fit in 15 MB, under the size cap; parsing them
    would build 10^6 tables (seconds, ~100 MB), so the loader counts the headers first."""
    path = tmp_path / "million.toml"
    with open(path, "w", encoding="utf-8") as fh:
        fh.write('title = "many"\n')
        fh.write("[[contributor]]\n" * 1_000_000)
    assert path.stat().st_size < MAX_FILE_BYTES

    def must_not_parse(text):
        raise AssertionError("the file was parsed although its header count is over the limit")

    monkeypatch.setattr(case_module.tomllib, "loads", must_not_parse)
    with pytest.raises(CaseError) as info:
        load_case(path)
    assert str(info.value) == (
        f"{path}: contributor: too many entries (1000000; the limit is {MAX_CONTRIBUTORS})"
    )
    for command in COMMANDS:
        assert_one_line_exit_2(run_cli([command, str(path)]), "contributor: too many entries (1000000")


def test_header_count_accepts_spaced_headers_and_ignores_commented_ones():
    """The pre-scan counts what TOML counts: ``[[ contributor ]]`` is a header, a comment
    or a string mentioning one is not (and such a file still loads)."""
    many = "[[ contributor ]]\n" * (MAX_CONTRIBUTORS + 1)
    with pytest.raises(CaseError, match=r"contributor: too many entries \(100001;"):
        loads_case('title = "t"\n' + many, source="spaced.toml")
    many_requirements = "\t[[requirement]]\n" * (MAX_CONTRIBUTORS + 1)
    with pytest.raises(CaseError, match=r"requirement: too many entries \(100001;"):
        loads_case('title = "t"\n' + many_requirements, source="r.toml")
    commented = "# [[contributor]]\n" * (MAX_CONTRIBUTORS + 1)
    case = loads_case(case_text() + commented, source="commented.toml")
    assert case.names == ("x", "y")


# slow (parses under tracemalloc); fast check of the count refusal: test_bad_input.py
@pytest.mark.slow
def test_many_inline_contributors_are_refused_in_bounded_memory():
    """``contributor = [{}, {}, ...]`` is parsed, then refused by count. 3·10^5 tables
    here (tracemalloc slows the parse); 5.5·10^6 of them fill the 16 MB cap and peak at
    about 0.4 GB (measured for docs/reliability.md)."""
    text = 'title = "many"\ncontributor = [' + "{}," * 300_000 + "]\n"
    tracemalloc.start()
    try:
        with pytest.raises(CaseError) as info:
            loads_case(text, source="inline.toml")
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert str(info.value) == "inline.toml: contributor: too many entries (300000; the limit is 100000)"
    assert peak < 128 * 2**20, f"peak {peak / 2**20:.0f} MB"


# --------------------------------------------------------------------------- CSV tables


def _table_case(folder: Path, csv_name: str, csv_bytes: bytes | None) -> Path:
    path = folder / "case.toml"
    path.write_text(case_text(y_cost=f'cost = {{ curve = "table", file = "{csv_name}" }}'), encoding="utf-8")
    if csv_bytes is not None:
        (folder / csv_name).write_bytes(csv_bytes)
    return path


BAD_TABLES = [
    (b"tolerance,cost\n0.01,3\n0.05,cheap\n", "costs.csv row 3: cost 'cheap' is not a number"),
    (b"tolerance,cost\n0.01,3\n0.05,1,7\n", "costs.csv row 3: expected 2 values (tolerance,cost), got 3"),
    (b"tolerance,cost\n0.01\n0.05,1\n", "costs.csv row 2: expected 2 values (tolerance,cost), got 1"),
    (b"tolerance,cost\n0.01,3\n0.05,inf\n", "costs.csv row 3: cost must be a finite number (got 'inf')"),
    (b"tolerance,cost\nnan,3\n0.05,1\n", "costs.csv row 2: tolerance must be a finite number (got 'nan')"),
    (b"tolerance,cost\n0.01,3\n1e999,1\n", "costs.csv row 3: tolerance must be a finite number"),
    (b"tolerance,cost\n0.05,3\n0.01,1\n", "costs.csv row 3: tolerance must be greater than the previous"),
    (b"tolerance,cost\n0.01,3\n0.01,1\n", "costs.csv row 3: tolerance must be greater than the previous"),
    (b"tolerance,cost\n-0.01,3\n0.05,1\n", "costs.csv row 2: tolerance must be > 0"),
    (b"tolerance,cost\n0.01,-3\n0.05,1\n", "costs.csv row 2: cost must be >= 0"),
    (b"tol,price\n0.01,3\n0.05,1\n", "costs.csv row 1: the header must be 'tolerance,cost'"),
    (b"0.01,3\n0.05,1\n", "costs.csv row 1: the header must be 'tolerance,cost'"),
    (b"", "costs.csv is empty"),
    (b"\n\n   \n", "costs.csv is empty"),
    (b"tolerance,cost\n", "costs.csv needs at least 2 rows of points (got 0)"),
    (b"tolerance,cost\n0.01,3\n", "costs.csv needs at least 2 rows of points (got 1)"),
    (b"tolerance,cost\n0.01,3\n0.05,\xff\n", "costs.csv row 3: not UTF-8 text"),
    (b"tolerance,cost\n0.01,3\n0.05,1\x00\n", "costs.csv row 3"),
    (b'tolerance,cost\n0.01,3\n"0.05\n,1"\n', "costs.csv row"),
    (b'tolerance,cost\n0.01,"3\n', "costs.csv needs at least 2 rows"),
    (b"tolerance;cost\n0.01;3\n0.05;1\n", "the header must be 'tolerance,cost'"),
]


@pytest.mark.parametrize("data, fragment", BAD_TABLES, ids=[f"table-{i:02d}" for i in range(len(BAD_TABLES))])
def test_bad_csv_table_is_one_line(tmp_path, data, fragment):
    path = _table_case(tmp_path, "costs.csv", data)
    before = files_in(tmp_path)
    assert_refused_everywhere(path, "contributor[2] (y).cost.file: ", fragment)
    assert files_in(tmp_path) == before


def test_csv_table_with_too_many_rows_is_refused(tmp_path):
    rows = "".join(f"{0.001 + i * 1e-6:.7f},{100 - i * 1e-4:.5f}\n" for i in range(MAX_TABLE_ROWS + 1))
    path = _table_case(tmp_path, "costs.csv", ("tolerance,cost\n" + rows).encode())
    assert_refused_everywhere(path, "contributor[2] (y).cost.file: costs.csv has more than 100000 rows")


def test_csv_table_over_16_mb_is_refused_before_it_is_read(tmp_path, monkeypatch):
    path = _table_case(tmp_path, "costs.csv", None)
    table = tmp_path / "costs.csv"
    with open(table, "wb") as fh:
        fh.write(b"tolerance,cost\n")
        fh.truncate(40 * 2**20)  # sparse
    error, peak = _load_refused_unopened(monkeypatch, path, never_open=table)
    assert "contributor[2] (y).cost.file: costs.csv is larger than 16 MB" in str(error)
    assert peak < 1 * 2**20
    for command in COMMANDS:
        assert_one_line_exit_2(run_cli([command, str(path)]), "costs.csv is larger than 16 MB")


# --------------------------------------------------------------------------- paths leaving the folder


def _outside_csv(root: Path) -> Path:
    outside = root / "outside.csv"
    outside.write_text("tolerance,cost\n0.01,3.0\n0.2,0.5\n", encoding="utf-8")
    return outside


@pytest.mark.parametrize(
    "file_value, fragment",
    [
        ("../outside.csv", "leads outside the case's folder"),
        ("sub/../../outside.csv", "leads outside the case's folder"),
        ("./../outside.csv", "leads outside the case's folder"),
        ("{root}/outside.csv", "must be a path relative to the case's folder (got absolute path"),
        ("/etc/passwd", "got absolute path '/etc/passwd'"),
        ("/dev/zero", "got absolute path '/dev/zero'"),
        ("~/outside.csv", "got absolute path '~/outside.csv'"),
        ("C:\\\\outside.csv", "got absolute path"),
        ("\\\\\\\\server\\\\share\\\\x.csv", "got absolute path"),
        ("", "must not be empty"),
        (".", "is not a file"),
        ("sub", "is not a file"),
        ("missing.csv", "'missing.csv' not found in the case's folder"),
    ],
    ids=["dotdot", "sub-dotdot", "dot-dotdot", "absolute-outside", "etc-passwd", "dev-zero",
         "home", "drive-letter", "unc", "empty", "dot", "folder", "missing"],
)
def test_table_path_must_stay_in_the_case_folder(tmp_path, file_value, fragment):
    root = tmp_path
    _outside_csv(root)
    folder = root / "case"
    (folder / "sub").mkdir(parents=True)
    value = file_value.replace("{root}", str(root))
    path = folder / "case.toml"
    path.write_text(case_text(y_cost=f'cost = {{ curve = "table", file = "{value}" }}'), encoding="utf-8")
    assert_refused_everywhere(path, "contributor[2] (y).cost.file: ", fragment)


@pytest.mark.parametrize("target", ["outside_file", "outside_folder", "dev_zero", "dangling"])
def test_symlinks_leaving_the_folder_are_refused(tmp_path, target):
    outside = _outside_csv(tmp_path)
    folder = tmp_path / "case"
    folder.mkdir()
    link = folder / "costs.csv"
    source = {
        "outside_file": outside,
        "outside_folder": tmp_path,
        "dev_zero": Path("/dev/zero"),
        "dangling": tmp_path / "nowhere.csv",
    }[target]
    link.symlink_to(source)
    path = folder / "case.toml"
    path.write_text(case_text(y_cost='cost = { curve = "table", file = "costs.csv" }'), encoding="utf-8")
    assert_refused_everywhere(path, "contributor[2] (y).cost.file: 'costs.csv' leads outside the case's folder")


def test_symlinked_folder_inside_is_followed_to_where_it_leads(tmp_path):
    """A link to a folder outside: ``data/costs.csv`` resolves outside and is refused."""
    _outside_csv(tmp_path)
    folder = tmp_path / "case"
    folder.mkdir()
    (folder / "data").symlink_to(tmp_path)
    path = folder / "case.toml"
    path.write_text(case_text(y_cost='cost = { curve = "table", file = "data/outside.csv" }'), encoding="utf-8")
    assert_refused_everywhere(path, "leads outside the case's folder")


def test_symlink_within_the_folder_and_a_fifo(tmp_path):
    """A link that stays inside the folder is fine; a named pipe is not a file (reading it
    would block)."""
    folder = tmp_path / "case"
    folder.mkdir()
    (folder / "real.csv").write_text("tolerance,cost\n0.01,3.0\n0.2,0.5\n", encoding="utf-8")
    (folder / "costs.csv").symlink_to(folder / "real.csv")
    path = folder / "case.toml"
    path.write_text(case_text(y_cost='cost = { curve = "table", file = "costs.csv" }'), encoding="utf-8")
    case = load_case(path)
    assert case.contributor("y").cost.points_tolerance == (0.01, 0.2)
    os.mkfifo(folder / "pipe.csv")
    path.write_text(case_text(y_cost='cost = { curve = "table", file = "pipe.csv" }'), encoding="utf-8")
    assert_refused_everywhere(path, "'pipe.csv' is not a file")


def test_a_case_with_a_table_but_no_folder_is_refused():
    with pytest.raises(CaseError, match=r"cost.file: a cost table file needs a case read from disk"):
        loads_case(case_text(y_cost='cost = { curve = "table", file = "costs.csv" }'), source="text.toml")


# --------------------------------------------------------------------------- case path itself


@pytest.mark.parametrize(
    "make, fragment",
    [
        (lambda p: p.mkdir(), "is a folder, not a case file"),
        (lambda p: None, "file not found"),
        (lambda p: p.write_bytes(b'title = "t"\n\xff\xfe'), "not UTF-8 text (invalid byte 0xff on line 2)"),
        (lambda p: p.write_bytes(b"\x00" * 1000), "not valid TOML"),
        (lambda p: p.write_bytes(b"\xef\xbb\xbf" + b"\n" * 10), "file is empty"),
    ],
    ids=["folder", "missing", "not-utf8", "binary", "bom-only"],
)
def test_unusable_case_paths_are_one_line(tmp_path, make, fragment):
    path = tmp_path / "case.toml"
    make(path)
    with pytest.raises(CaseError, match=re.escape(fragment)):
        load_case(path)
    for command in COMMANDS:
        assert_one_line_exit_2(run_cli([command, str(path)]), fragment)


@pytest.mark.parametrize("command", ["analyze", "allocate", "frontier", "verify", "report"])
def test_a_folder_as_the_case_is_one_line_in_every_command(tmp_path, command):
    # `allocator analyze .`: the folder exactly as given, then the problem
    extra = ["-o", str(tmp_path / "r.html")] if command == "report" else []
    line = assert_one_line_exit_2(run_cli([command, ".", *extra], tmp_path), "is a folder, not a case file")
    assert line == "error: .: is a folder, not a case file"


@pytest.mark.parametrize(
    "args, line",
    [
        (["init", "{tmp}"], "error: {tmp}: is a folder, not a file"),
        (["report", "{case}", "-o", "{tmp}"], "error: {tmp}: --output: is a folder, not a file"),
        (["verify", "{case}", "--tolerances", "{tmp}"], "error: {tmp}: --tolerances: is a folder, not a file"),
        (["verify", "{case}", "--plot", "{tmp}"], "error: {tmp}: --plot: is a folder, not a file"),
    ],
    ids=["init", "report-output", "verify-tolerances", "verify-plot"],
)
def test_a_folder_where_a_file_is_expected_is_one_line(tmp_path, args, line):
    case = tmp_path / "case.toml"
    case.write_text(case_text(), encoding="utf-8")
    before = files_in(tmp_path)
    fill = lambda text: text.format(tmp=tmp_path, case=case)  # noqa: E731
    assert assert_one_line_exit_2(run_cli([fill(a) for a in args])) == fill(line)
    assert files_in(tmp_path) == before


# --------------------------------------------------------------------------- the corpus through allocate

BAD = Path(__file__).parent / "bad_cases"
CORPUS = sorted(BAD.glob("*.toml"))


@pytest.fixture(scope="module")
def corpus_copy(tmp_path_factory) -> Path:
    """The corpus in a fresh folder, with a real CSV just outside it (a '../' target)."""
    import shutil

    root = tmp_path_factory.mktemp("hostile")
    shutil.copytree(BAD, root / "bad_cases")
    (root / "outside_costs.csv").write_text("tolerance,cost\n0.01,3.0\n0.2,0.5\n", encoding="utf-8")
    return root / "bad_cases"


def test_corpus_is_large_and_every_file_says_what_it_expects():
    assert len(CORPUS) >= 40
    for path in CORPUS:
        first = path.read_bytes().split(b"\n", 1)[0]
        assert first.startswith(b"# expect: ") and len(first) > len(b"# expect: "), path.name


@pytest.mark.parametrize("name", [p.stem for p in CORPUS])
def test_corpus_file_through_allocate_is_one_line_exit_2(corpus_copy, name):
    """tests/test_bad_input.py runs the corpus through ``analyze``; ``allocate`` must
    answer the same way (one line with the expected fragment, exit 2, nothing written)."""
    path = corpus_copy / f"{name}.toml"
    fragment = path.read_bytes().split(b"\n", 1)[0].decode("utf-8").removeprefix("# expect: ").strip()
    before = files_in(corpus_copy.parent)
    line = assert_one_line_exit_2(run_cli(["allocate", str(path)]), fragment)
    assert line.startswith(f"error: {path}: "), line
    assert files_in(corpus_copy.parent) == before


# --------------------------------------------------------------------------- output files
# Every command that writes a file writes it whole or not at all (temporary file in the
# same folder, then an atomic rename) and never overwrites the case it reads.

GEARBOX = Path(__file__).resolve().parents[1] / "cases" / "gearbox_end_play.toml"


def _available(command: str) -> bool:
    return command in cli.list_commands(None)


CASES = GEARBOX.parent
SUFFIX = {"init": ".toml", "report": ".html", "study": ".html", "convert": ".xlsx"}


def writing_commands():
    """(id, args with CASE and OUT placeholders) for every writing option that exists.

    The output's suffix is the one the option writes (:func:`_suffix`); QUOTES and
    MEASURED stand for the invented demo data in cases/.
    """
    candidates = [
        ("init", ["init", "OUT"]),
        ("verify-plot", ["verify", "CASE", "--samples", "1000", "--plot", "OUT"]),
        ("verify-xlsx", ["verify", "CASE", "--samples", "1000", "--xlsx", "OUT"]),
        ("frontier-plot", ["frontier", "CASE", "--points", "3", "--plot", "OUT"]),
        ("frontier-economics-plot", ["frontier", "CASE", "--points", "3", "--economics-plot", "OUT"]),
        ("frontier-xlsx", ["frontier", "CASE", "--points", "3", "--xlsx", "OUT"]),
        ("allocate-xlsx", ["allocate", "CASE", "--model", "rss", "--xlsx", "OUT"]),
        ("report", ["report", "CASE", "--samples", "1000", "--no-frontier", "-o", "OUT"]),
        ("study", ["study", "CASE", "--model", "rss", "--workers", "1", "-o", "OUT"]),
        ("study-xlsx", ["study", "CASE", "--model", "rss", "--workers", "1", "--xlsx", "OUT"]),
        ("convert", ["convert", "CASE", "OUT"]),
        ("fit-costs-write", ["fit-costs", "QUOTES", "--write", "CASE", "OUT"]),
        ("fit-costs-plot", ["fit-costs", "QUOTES", "--plot", "OUT"]),
        ("capability-write", ["capability", "CASE", "MEASURED", "--write", "OUT"]),
    ]
    return [pytest.param(args, id=name, marks=_skip_mark(args)) for name, args in candidates]


def _skip_mark(args):
    if not _available(args[0]):
        return pytest.mark.skip(reason=f"no '{args[0]}' command yet")
    if _suffix(args) == ".xlsx" and importlib.util.find_spec("openpyxl") is None:
        return pytest.mark.skip(reason='writes a workbook: needs the sheets extra (pip install ".[sheets]")')
    return ()


def _suffix(args) -> str:
    if "--xlsx" in args:
        return ".xlsx"
    if "--write" in args:
        return ".toml"
    return SUFFIX.get(args[0], ".svg")


WRITING_FLAGS = ("-o", "--output", "--plot", "--xlsx", "--write")


def test_every_command_with_an_output_option_is_covered():
    """A new writing command (or option) must be added to writing_commands()."""
    covered = {(args[0], flag) for p in writing_commands() for args in [p.values[0]] for flag in args
               if flag.startswith("-")}
    commands = {args[0] for p in writing_commands() for args in [p.values[0]]}
    for name in cli.list_commands(None):
        command = cli.get_command(None, name)
        for option in command.params:
            for flag in getattr(option, "opts", []):
                if flag in WRITING_FLAGS or flag.endswith("-plot"):
                    assert (name, flag) in covered or (flag == "--output" and (name, "-o") in covered), \
                        f"'{name} {flag}' writes a file but is not covered here"
        if name in ("init", "convert"):
            assert name in commands, f"'{name}' writes files but is not covered here"


def _fill(args, case: Path, out: Path):
    inputs = {"CASE": str(case), "OUT": str(out), "QUOTES": str(CASES / "gearbox_quotes.csv"),
              "MEASURED": str(CASES / "gearbox_measurements.csv")}
    return [inputs.get(a, a) for a in args]


class _HalfThenFull:
    """A file object that writes half of what it is given, then reports a full disk."""

    def __init__(self, fh):
        self.fh = fh

    def write(self, data):
        self.fh.write(data[: len(data) // 2])
        self.fh.flush()
        raise OSError(28, "No space left on device")

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.fh.close()


@pytest.mark.parametrize("args", writing_commands())
def test_a_failed_write_leaves_no_file_and_no_temporary(tmp_path, monkeypatch, args):
    case = tmp_path / "case.toml"
    case.write_bytes(GEARBOX.read_bytes())
    out = tmp_path / f"out{_suffix(args)}"
    real_fdopen = os.fdopen
    monkeypatch.setattr(os, "fdopen", lambda fd, *a, **k: _HalfThenFull(real_fdopen(fd, *a, **k)))
    result = CliRunner().invoke(cli, _fill(args, case, out))
    monkeypatch.undo()
    assert result.exit_code == 2, (result.output, result.exception)
    assert "Traceback" not in result.output
    errors = [line for line in result.stderr.splitlines() if line.startswith("error:")]
    assert len(errors) == 1 and "no space left on device" in errors[0], result.stderr
    assert files_in(tmp_path) == ["case.toml"]  # no output, no temporary file
    assert case.read_bytes() == GEARBOX.read_bytes()


@pytest.mark.parametrize("args", writing_commands())
def test_a_failed_write_keeps_the_previous_output(tmp_path, monkeypatch, args):
    case = tmp_path / "case.toml"
    case.write_bytes(GEARBOX.read_bytes())
    out = tmp_path / f"old{_suffix(args)}"
    out.write_bytes(b"previous output, intact\n")
    args = args + ["--force"] if args[0] == "init" else args
    real_fdopen = os.fdopen
    monkeypatch.setattr(os, "fdopen", lambda fd, *a, **k: _HalfThenFull(real_fdopen(fd, *a, **k)))
    result = CliRunner().invoke(cli, _fill(args, case, out))
    monkeypatch.undo()
    assert result.exit_code == 2, (result.output, result.exception)
    assert out.read_bytes() == b"previous output, intact\n"
    assert files_in(tmp_path) == sorted(["case.toml", out.name])


@pytest.mark.parametrize("args", [p for p in writing_commands() if "CASE" in p.values[0]])
@pytest.mark.parametrize("how", ["same-path", "symlink", "relative"])
def test_no_command_overwrites_its_case(tmp_path, monkeypatch, args, how):
    """The case is named like the output so that only the 'input file' rule can refuse it."""
    suffix = _suffix(args)
    case = tmp_path / f"case{suffix}"
    case.write_bytes(GEARBOX.read_bytes())
    if how == "same-path":
        out = case
    elif how == "symlink":
        out = tmp_path / f"link{suffix}"
        out.symlink_to(case)
    else:
        (tmp_path / "sub").mkdir()
        out = tmp_path / "sub" / ".." / case.name
    before = files_in(tmp_path)
    result = CliRunner().invoke(cli, _fill(args, case, out))
    line = assert_one_line_exit_2(result, "refusing to overwrite the input")
    assert line.startswith(f"error: {out}: ")
    assert case.read_bytes() == GEARBOX.read_bytes()
    assert files_in(tmp_path) == before


def test_one_output_path_check_for_every_writer(tmp_path):
    """The library's writers (atomic_write, write_report) and the commands share one check:
    an input reached by another spelling (``sub/..``, a symlink) and a missing folder are
    refused before anything is written, with the path as given."""
    from allocator.errors import UsageError
    from allocator.files import atomic_write, check_output_path

    case = tmp_path / "case.toml"
    case.write_bytes(GEARBOX.read_bytes())
    (tmp_path / "sub").mkdir()
    (tmp_path / "link.toml").symlink_to(case)
    for spelling in (str(tmp_path / "sub" / ".." / "case.toml"), str(tmp_path / "link.toml")):
        with pytest.raises(UsageError, match=r"^.*: refusing to overwrite the input case file$") as err:
            check_output_path(spelling, protect=(None, case), input_name="input case file")
        assert str(err.value).startswith(spelling + ": ")
        with pytest.raises(UsageError, match="refusing to overwrite the input file$"):
            atomic_write(spelling, "x", protect=(case,))
    missing = tmp_path / "nowhere" / "out.svg"
    with pytest.raises(UsageError, match=f"folder {re.escape(str(missing.parent))} does not exist$"):
        check_output_path(missing)
    assert check_output_path(tmp_path / "out.svg", protect=(case,)) == tmp_path / "out.svg"
    assert case.read_bytes() == GEARBOX.read_bytes()
    assert files_in(tmp_path) == ["case.toml", "link.toml", "sub"]


def test_a_hard_link_to_the_case_is_replaced_not_written_through(tmp_path):
    """A second name for the case's inode: the rename replaces that name; the case's own
    bytes are untouched."""
    if not _available("verify"):
        pytest.skip("no verify command yet")
    case = tmp_path / "case.toml"
    case.write_bytes(GEARBOX.read_bytes())
    twin = tmp_path / "twin.svg"
    os.link(case, twin)
    result = CliRunner().invoke(cli, ["verify", str(case), "--samples", "1000", "--plot", str(twin)])
    assert result.exit_code in (0, 1), result.output
    assert case.read_bytes() == GEARBOX.read_bytes()
    assert twin.read_bytes().lstrip().startswith(b"<")  # the plot (SVG) now has that name


def test_init_refuses_to_overwrite_without_force(tmp_path):
    path = tmp_path / "mine.toml"
    path.write_text("my own notes\n", encoding="utf-8")
    result = CliRunner().invoke(cli, ["init", str(path)])
    assert_one_line_exit_2(result, "already exists (use --force to overwrite it)")
    assert path.read_text(encoding="utf-8") == "my own notes\n"
