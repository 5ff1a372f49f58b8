"""The HTML report: structure, self-containment, escaping, and numbers equal to the library's.

The report must only format library results, so every number checked here is taken from a
fresh library call (``allocate``, ``analyze``, ``verify``, ``supplier_sheet``), not from the
report object, and looked for in the section where it belongs. The HTML is read with the
standard library's ``html.parser``.
"""

from __future__ import annotations

import html as html_module
import re
import shlex
from dataclasses import replace
from datetime import datetime, timezone
from html.parser import HTMLParser
from pathlib import Path

import pytest
from click.testing import CliRunner

from allocator.analysis import analyze
from allocator.case import load_case, loads_case
from allocator.cli.main import cli
from allocator.ppm import format_ppm
from allocator.report import CAUTIONS, SECTIONS, build_report, fmt_input, fmt_number, fmt_tolerance
from allocator.simulate import verify
from allocator.solve import allocate
from helpers import BRACKET

ROOT = Path(__file__).resolve().parent.parent
CASES = ROOT / "cases"
DEMOS = sorted(p.stem for p in CASES.glob("*.toml"))
SAMPLES = 4000  # enough for a histogram; the report's numbers are checked, not the fallout
SEED = 7
POINTS = 3  # frontier points: the structure matters here, not the curve's resolution
STAMP = datetime(2024, 1, 2, 3, 4, 5, tzinfo=timezone.utc)


class Outline(HTMLParser):
    """Collects what the checks need: tags, attributes, h2 texts, section ids, text."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.stack: list[str] = []
        self.h2: list[tuple[str | None, str]] = []  # (id of the enclosing section, text)
        self.sections: list[str] = []
        self.text: list[str] = []
        self._h2_text: list[str] | None = None
        self._section: list[str | None] = []
        self.svg_count = 0
        self.top_level_svgs = 0
        self._svg_depth = 0

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        self.tags.append((tag, attributes))
        if tag == "section":
            self.sections.append(attributes.get("id"))
            self._section.append(attributes.get("id"))
        if tag == "h2":
            self._h2_text = []
        if tag == "svg":
            self.svg_count += 1
            if self._svg_depth == 0:
                self.top_level_svgs += 1
            self._svg_depth += 1

    def handle_endtag(self, tag):
        if tag == "section" and self._section:
            self._section.pop()
        if tag == "h2" and self._h2_text is not None:
            self.h2.append((self._section[-1] if self._section else None, "".join(self._h2_text).strip()))
            self._h2_text = None
        if tag == "svg":
            self._svg_depth -= 1

    def handle_data(self, data):
        self.text.append(data)
        if self._h2_text is not None:
            self._h2_text.append(data)


def outline(text: str) -> Outline:
    parser = Outline()
    parser.feed(text)
    parser.close()
    return parser


def section_html(text: str, sid: str) -> str:
    match = re.search(rf'<section id="{re.escape(sid)}">(.*?)</section>', text, flags=re.S)
    assert match, f"section {sid} missing"
    return match.group(1)


def _heavy(case) -> bool:
    """Process choice or ISO 286 grades: every solve is a mixed-integer program (seconds each,
    mean shift with cutting planes the slowest). A fast test checks such a case's report on
    the worst-case and rss models and without the frontier, the options users have too."""
    return case.allocation.rounding == "iso286" or any(len(c.processes) > 1 for c in case.contributors)


class _Reports(dict):
    """Demo name -> (case, report, html), each built when first asked for."""

    def __missing__(self, name):
        case = load_case(CASES / f"{name}.toml")
        heavy = _heavy(case)
        models = [m for m in case.allocation.models if m != "mean-shift"] or None if heavy else None
        report = build_report(
            case, models, samples=SAMPLES, seed=SEED, frontier_points=POINTS, created=STAMP,
            include_frontier=not heavy,
        )
        self[name] = (case, report, report.to_html())
        return self[name]


@pytest.fixture(scope="module")
def reports():
    """One small report per demo case (built once for the module, when a test first needs it)."""
    return _Reports()


# a heavy demo's report takes seconds (mixed-integer solves): those run in CI, not the fast loop
DEMO_PARAMS = [pytest.param(name, marks=pytest.mark.slow) if _heavy(load_case(CASES / f"{name}.toml")) else name
               for name in DEMOS]


@pytest.mark.parametrize("name", DEMO_PARAMS)
def test_every_section_heading_and_plot(reports, name):
    case, report, text = reports[name]
    doc = outline(text)
    assert text.startswith("<!DOCTYPE html>")
    # every section, in order, each with its h2 inside it
    assert doc.sections == [sid for sid, _ in SECTIONS]
    assert [h for h in doc.h2 if h[0] is not None] == list(SECTIONS)
    # plots: frontier, contributions, verification histogram
    figures = report.figures()
    expected = 2 if _heavy(case) else 3
    assert doc.top_level_svgs == len(figures) == expected
    for sid in figures:
        assert section_html(text, sid).count("<svg") == 1
    if _heavy(case):
        assert "left out of this report on request" in section_html(text, "frontier")


@pytest.mark.parametrize("name", DEMO_PARAMS)
def test_self_contained(reports, name):
    _, _, text = reports[name]
    doc = outline(text)
    tags = {tag for tag, _ in doc.tags}
    assert "script" not in tags and "link" not in tags and "img" not in tags
    assert "iframe" not in tags and "object" not in tags and "embed" not in tags
    for tag, attributes in doc.tags:
        assert "src" not in attributes, tag
        for key, value in attributes.items():
            if value and re.search(r"https?:", value):
                # the only web addresses allowed are SVG namespace names, which are never fetched
                assert key.startswith("xmlns"), (tag, key, value)
            if key in ("href", "xlink:href") and value:
                assert value.startswith("#"), (tag, key, value)
    assert not re.search(r"https?:", "".join(doc.text))  # none in text, CSS or comments' data
    css = "".join(re.findall(r"<style[^>]*>(.*?)</style>", text, flags=re.S))
    assert "@import" not in css and "@font-face" not in css
    assert not re.search(r"url\((?!#)", css), "CSS may only refer to fragments in the page"
    # ids are unique across the inline SVGs (matplotlib reuses names such as 'patch_1')
    ids = re.findall(r'\bid="([^"]+)"', text)
    assert len(ids) == len(set(ids))


def test_case_text_is_escaped():
    text = (CASES / "gearbox_end_play.toml").read_text(encoding="utf-8")
    text = text.replace('title = "Gearbox output shaft end play"', 'title = "<script>alert(1)</script> & \\"quotes\\""')
    text = text.replace(
        'description = "Spigot height of the bearing cover"', 'description = "<img src=x onerror=alert(2)>"'
    )
    case = loads_case(text, source="escape.toml")
    report = build_report(case, ["rss"], samples=1000, seed=1, frontier_points=POINTS)
    html_text = report.to_html()
    doc = outline(html_text)
    assert not any(tag in ("script", "img") for tag, _ in doc.tags)
    assert "&lt;script&gt;alert(1)&lt;/script&gt; &amp; &quot;quotes&quot;" in html_text
    assert "&lt;img src=x onerror=alert(2)&gt;" in html_text
    title = re.search(r"<title>(.*?)</title>", html_text, flags=re.S).group(1)
    assert "&lt;script&gt;" in title
    assert "<script>alert(1)</script>" in "".join(doc.text)  # shown as text, as written


def _ppm_cell(value) -> str:
    """A fallout as a [ppm] column shows it: the one ppm format of tables and report."""
    return f">{html_module.escape(format_ppm(value, unit=False))}<"


def test_numbers_equal_the_library(reports):
    case, report, text = reports["gearbox_end_play"]
    alloc_html = section_html(text, "allocation")
    shadow_html = section_html(text, "shadow-prices")
    supplier_html = section_html(text, "supplier")
    for model in case.allocation.models:
        result = allocate(case, model)  # a fresh solve, not the report's object
        assert result.success
        assert fmt_number(result.total_cost) in alloc_html
        assert fmt_number(result.current_cost) in alloc_html
        assert fmt_number(result.savings, signed=True) in alloc_html
        assert fmt_number(result.savings_percent, 3, signed=True) in alloc_html
        for name, t in result.tolerances.items():
            assert fmt_tolerance(t) in alloc_html, (model, name)
            assert fmt_tolerance(t) in supplier_html, (model, name)
        for rr in result.requirements:
            assert fmt_number(rr.sigma) in alloc_html
            assert _ppm_cell(rr.fallout_ppm) in alloc_html
        # a rounded allocation has no shadow prices; the report shows the unrounded optimum's
        priced = result
        if all(rr.shadow_upper is None and rr.shadow_lower is None for rr in result.requirements):
            assert case.allocation.rounding is not None
            plain = replace(case, allocation=replace(case.allocation, rounding=None))
            priced = allocate(plain, model)
            assert model in report.unrounded
        shadows = [v for rr in priced.requirements for v in (rr.shadow_lower, rr.shadow_upper, rr.shadow_ppm)]
        assert any(v is not None for v in shadows)
        for value in shadows:
            if value is not None:
                assert fmt_number(value, signed=True) in shadow_html, (model, value)
    # the header repeats the recommended allocation's totals
    rec = allocate(case, report.recommended)
    header = text.split("<main>", 1)[0]
    assert fmt_number(rec.total_cost) in header and fmt_number(rec.savings, signed=True) in header

    current = analyze(case)
    analysis_html = section_html(text, "analysis")
    for r in current.requirements:
        for value in (r.sigma, r.mean_shift):
            assert fmt_number(value) in analysis_html
        for value in (r.fallout_ppm, r.mean_shift_ppm):
            assert _ppm_cell(value) in analysis_html
        assert fmt_number(r.cpk, 3) in analysis_html
        assert fmt_number(r.worst_case_min, 6, strip=True) in analysis_html
        assert fmt_number(r.worst_case_max, 6, strip=True) in analysis_html
        for c in r.contributions:
            assert fmt_number(100 * c.variance_share, 3) in analysis_html

    checked = verify(case, dict(rec.tolerances), samples=SAMPLES, seed=SEED)
    verification_html = section_html(text, "verification")
    assert f"{SAMPLES:,}" in verification_html and f"seed {SEED}" in verification_html
    for c in checked.requirements:
        assert _ppm_cell(c.fallout_ppm) in verification_html
        interval = f"{format_ppm(c.ci_low_ppm, unit=False)} to {format_ppm(c.ci_high_ppm, unit=False)}"
        assert f">{html_module.escape(interval)}<" in verification_html
        assert _ppm_cell(c.predicted_ppm) in verification_html

    # the sweep and the supplier sheet are the slow parts: their numbers are read from the
    # results the report holds, after checking that it asked the library the right question
    front = report.frontier
    assert len(front.values) == POINTS and tuple(front.models) == tuple(case.allocation.models)
    frontier_html = section_html(text, "frontier")
    for model in front.models:
        for cost, status in zip(front.costs[model], front.statuses[model]):
            assert (fmt_number(cost) if cost is not None else f">{status}<") in frontier_html
    for model, cost in front.current["optimal"].items():
        assert fmt_number(cost) in frontier_html
    assert fmt_number(front.current["total_cost"]) in frontier_html

    sheet = report.supplier
    assert sheet.model == report.recommended and sheet.base is report.allocations[report.recommended]
    assert [r.contributor for r in sheet.rows] == list(case.names)
    for row in sheet.rows:
        if row.status == "optimal":
            assert fmt_number(row.total_cost_change, signed=True) in supplier_html
            assert fmt_number(row.own_change, signed=True) in supplier_html
            assert fmt_number(row.elsewhere_change, signed=True) in supplier_html
            assert fmt_tolerance(row.looser) in supplier_html
            for name, before, after in row.tightened:
                assert f"{name} {fmt_tolerance(before)} → {fmt_tolerance(after)}" in supplier_html


def test_summary_states_the_case_and_reproducibility(reports):
    case, report, text = reports["gearbox_end_play"]
    summary = section_html(text, "summary")
    for c in case.contributors:
        assert c.name in summary and fmt_input(c.nominal) in summary and fmt_input(c.tolerance) in summary
    for r in case.requirements:
        assert fmt_input(r.lower) in summary and fmt_input(r.upper) in summary
    footer = section_html(text, "reproducibility")
    assert case.sha256 in footer
    assert f"seed {SEED}" in footer and f"{SAMPLES:,} assemblies" in footer
    assert "2024-01-02 03:04:05 UTC" in footer
    for package in ("numpy", "scipy", "cvxpy"):
        assert package in footer
    for model, result in report.allocations.items():
        assert result.solver in footer


def test_cautions_near_the_top_and_in_full(reports):
    _, _, text = reports["gearbox_end_play"]
    brief = text.find('class="caution-brief"')
    assert 0 < brief < text.find('<section id="summary">')
    top = text[brief : text.find("</aside>", brief)]
    assert "capable" in top and "worst case" in top and "licensed engineering review" in top
    cautions = section_html(text, "cautions")
    for line in CAUTIONS:
        assert line.replace("'", "&#x27;") in cautions


def test_print_and_greyscale_rules_are_in_the_stylesheet(reports):
    _, _, text = reports["gearbox_end_play"]
    css = re.search(r"<style>(.*?)</style>", text, flags=re.S).group(1)
    assert "@media print" in css
    assert "system-ui" in css
    # no colour other than greys in the page's own stylesheet (plots carry their own)
    for colour in re.findall(r"#([0-9a-fA-F]{3,6})\b", css):
        full = colour if len(colour) == 6 else "".join(ch * 2 for ch in colour)
        assert full[0:2] == full[2:4] == full[4:6], f"#{colour} is not a grey"
    # numbers are right-aligned: every numeric header has the class that aligns them
    assert ".num { text-align: right" in css
    assert '<th scope="col" class=num>' in text


def test_the_stylesheet_ships_with_the_package(reports):
    # a wheel (a non-editable install) carries only the .py files and the data files that
    # pyproject's package-data lists: the stylesheet is read from the installed package
    import fnmatch
    import tomllib
    from importlib import resources

    patterns = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"][
        "package-data"]["allocator"]
    package = ROOT / "allocator"
    data = [path.relative_to(package).as_posix() for path in package.rglob("*")
            if path.is_file() and path.suffix not in (".py", ".pyc")]
    assert "report/style.css" in data
    unlisted = [name for name in data if not any(fnmatch.fnmatch(name, p) for p in patterns)]
    assert not unlisted, f"add to [tool.setuptools.package-data] in pyproject.toml: {unlisted}"
    # and the page carries that file, unchanged, as its stylesheet
    css = resources.files("allocator.report").joinpath("style.css").read_text(encoding="utf-8")
    _, _, text = reports["gearbox_end_play"]
    assert f"<style>\n{css}</style>" in text


def test_infeasible_model_is_shown_and_exit_code_is_one(tmp_path):
    # worst case cannot fit 0.15..0.25 (the tightest stack is ±0.083); rss at 2700 ppm can
    text = (CASES / "gearbox_end_play.toml").read_text(encoding="utf-8")
    text = text.replace("lower = 0.05\nupper = 0.35\nfallout_ppm = 100", "lower = 0.15\nupper = 0.25\nfallout_ppm = 2700")
    path = tmp_path / "tight.toml"
    path.write_text(text, encoding="utf-8")
    out = tmp_path / "tight.html"
    result = CliRunner().invoke(
        cli,
        ["report", str(path), "-o", str(out), "--model", "worst-case", "--model", "rss",
         "--samples", "1000", "--frontier-points", str(POINTS)],
    )
    assert result.exit_code == 1, result.output
    assert out.exists()
    html_text = out.read_text(encoding="utf-8")
    expected = allocate(load_case(path), "worst-case")
    assert expected.status == "infeasible"
    assert 'role="alert"' in html_text and "INFEASIBLE" in html_text
    header = html_text.split("<main>", 1)[0]
    assert html_module.escape(expected.message, quote=True) in header
    assert "recommended allocation: rss" in result.output


def _invoke(*args):
    return CliRunner().invoke(cli, ["report", *map(str, args)])


def test_cli_writes_the_file(tmp_path):
    out = tmp_path / "review.html"
    result = _invoke(CASES / "gearbox_end_play.toml", "-o", out, "--model", "rss", "--samples", 1000,
                     "--seed", 3, "--frontier-points", POINTS)
    assert result.exit_code == 0, result.output
    text = out.read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>") and text.rstrip().endswith("</html>")
    assert "--model rss --samples 1000 --seed 3 --frontier-points 3" in text
    assert not list(tmp_path.glob(".*.tmp"))  # the atomic write left no temporary file


def test_cli_refuses_to_overwrite_the_case(tmp_path):
    case_path = tmp_path / "case.toml"
    original = (CASES / "gearbox_end_play.toml").read_bytes()
    case_path.write_bytes(original)
    result = _invoke(case_path, "-o", case_path, "--samples", 1000)
    assert result.exit_code == 2
    assert "refusing to overwrite" in result.output
    assert case_path.read_bytes() == original


@pytest.mark.parametrize(
    "args",
    [
        [ROOT / "tests" / "bad_cases" / "unknown_key.toml"],
        [ROOT / "tests" / "bad_cases" / "not_toml.toml"],
        [CASES / "does_not_exist.toml"],
        [CASES / "gearbox_end_play.toml", "--samples", 0],
        [CASES / "gearbox_end_play.toml", "--model", "median"],
        [CASES / "gearbox_end_play.toml", "--seed", -1],
    ],
    ids=["unknown-key", "not-toml", "missing-file", "zero-samples", "unknown-model", "negative-seed"],
)
def test_cli_bad_input_writes_nothing(tmp_path, args):
    out = tmp_path / "out.html"
    result = _invoke(*args, "-o", out)
    assert result.exit_code == 2, result.output
    assert not out.exists()
    assert list(tmp_path.iterdir()) == []
    assert "Traceback" not in result.output
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert lines and (lines[-1].startswith("error:") or lines[-1].startswith("Error:"))


def test_cli_missing_output_folder(tmp_path):
    out = tmp_path / "no" / "such" / "folder" / "r.html"
    result = _invoke(CASES / "gearbox_end_play.toml", "-o", out, "--samples", 1000)
    assert result.exit_code == 2
    assert "does not exist" in result.output
    assert not out.parent.exists()


def test_same_seed_same_report():
    case = load_case(CASES / "gearbox_end_play.toml")
    options = dict(samples=2000, seed=5, include_frontier=False, created=STAMP)
    first = build_report(case, ["rss"], **options).to_html()
    second = build_report(case, ["rss"], **options).to_html()
    assert first == second


# --------------------------------------------------------------------------- failures


def _spoil_the_held_resolve(monkeypatch):
    """Make every allocation with a held tolerance (the supplier sheet's re-solve) raise."""
    import allocator.solve

    original = allocator.solve.allocate

    def spoiled(case, model=None, *, fix=None, **kwargs):
        if fix:
            raise ValueError("zero-size array to reduction operation\nmaximum which has no identity")
        return original(case, model, fix=fix, **kwargs)

    monkeypatch.setattr(allocator.solve, "allocate", spoiled)


def _assert_one_line_failure(result, out, exit_code, *words):
    assert result.exit_code == exit_code, result.output
    assert isinstance(result.exception, SystemExit)  # handled, not a crash of the command
    assert "Traceback" not in result.output
    assert result.stdout == ""  # no "wrote ...: ok"
    lines = result.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), result.stderr
    for word in words:
        assert word in lines[0]
    assert not out.exists()
    assert list(out.parent.iterdir()) == []


def test_cli_an_error_inside_a_section_fails_the_run_and_writes_nothing(tmp_path, monkeypatch):
    # the supplier sheet once printed an exception's text in a cell while the command said "ok"
    _spoil_the_held_resolve(monkeypatch)
    out = tmp_path / "review.html"
    result = _invoke(CASES / "gearbox_end_play.toml", "-o", out, "--model", "rss", "--samples", 1000,
                     "--no-frontier")
    _assert_one_line_failure(result, out, 3, "internal error", "8 Supplier sheet", "ValueError",
                             "zero-size array to reduction operation maximum")


def test_cli_an_error_while_formatting_a_section_fails_the_run(tmp_path, monkeypatch):
    import allocator.report.sections

    def broken(report):
        raise KeyError("missing")

    monkeypatch.setattr(allocator.report.sections, "shadow_prices", broken)
    out = tmp_path / "review.html"
    result = _invoke(CASES / "gearbox_end_play.toml", "-o", out, "--model", "rss", "--samples", 1000,
                     "--no-frontier")
    _assert_one_line_failure(result, out, 3, "internal error", "7 Shadow prices", "KeyError")


def test_cli_a_frontier_range_the_requirement_cannot_take_is_bad_input(tmp_path):
    # [frontier] sweeps the upper limit from 0.01, below the lower limit 0.05: the case is
    # read without complaint, the sweep refuses it; once a note in section 4 of an "ok" report
    text = (CASES / "gearbox_end_play.toml").read_text(encoding="utf-8").replace(
        "range = [0.25, 0.60]", "range = [0.01, 0.60]")
    case_dir = tmp_path / "case"
    case_dir.mkdir()
    path = case_dir / "sweep.toml"
    path.write_text(text, encoding="utf-8")
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    out = out_dir / "review.html"
    result = _invoke(path, "-o", out, "--model", "rss", "--samples", 1000, "--frontier-points", POINTS)
    _assert_one_line_failure(result, out, 2, "4 Cost frontier", "upper values must stay above the lower limit")


# --------------------------------------------------------------------------- wording


def _visible_text(text: str) -> str:
    """The report's words as a reader sees them (no stylesheet, no drawn plots)."""
    text = re.sub(r"<style>.*?</style>|<svg.*?</svg>", " ", text, flags=re.S)
    return html_module.unescape(re.sub(r"<[^>]+>", " ", text))


@pytest.mark.parametrize("name", DEMOS)
def test_no_internal_names_in_the_report(reports, name):
    words = _visible_text(reports[name][2])
    camel = set(re.findall(r"\b[A-Z][a-z0-9]+[A-Z]\w*", words)) - {"HiGHS"}  # the MILP solver's own name
    assert not camel  # a class name of ours
    assert "Result." not in words and "per point" not in words and "shadow_" not in words


@pytest.mark.parametrize("name", DEMOS)
def test_top_caution_matches_the_case_mean_shifts(reports, name):
    case, _, text = reports[name]
    brief = text[text.find('class="caution-brief"'):]
    brief = brief[: brief.find("</aside>")]
    if any(c.mean_shift > 0 for c in case.contributors):
        assert "centred" not in brief and "within the mean shifts the case states" in brief
    else:
        assert "centred on their nominals" in brief


def test_tiny_fallout_is_printed_in_ppb_not_as_an_exponent(reports):
    case, _, text = reports["gear_hub_end_play"]
    analysis_html = section_html(text, "analysis")
    above = analyze(case).requirements[0].fallout_above_ppm
    assert above < 0.01  # the demo's upper tail: far below 0.01 ppm
    cell = format_ppm(above, unit=False)
    assert cell.endswith(" ppb") and html_module.escape(cell) in analysis_html
    for row in re.findall(r"<tr>.*?</tr>", analysis_html, flags=re.S):
        if "[ppm]" in row:
            assert not re.search(r"\d[eE][-+]\d", row), row


def test_same_report_command_keeps_the_path_as_given(tmp_path, monkeypatch):
    folder = tmp_path / "my cases"
    folder.mkdir()
    (folder / "gear box.toml").write_bytes((CASES / "gearbox_end_play.toml").read_bytes())
    monkeypatch.chdir(tmp_path)
    given = "my cases/gear box.toml"  # relative, with a folder and a space
    report = build_report(load_case(given), ["rss"], samples=2000, seed=1, include_frontier=False, created=STAMP)
    footer = section_html(report.to_html(), "reproducibility")
    command = html_module.unescape(re.search(r"Same report again</dt><dd><code>(.*?)</code>", footer).group(1))
    words = shlex.split(command)
    assert words[:3] == ["allocator", "report", given]
    assert words[words.index("--samples") + 1] == "2000"


# The invented bracket stack of tests/helpers.py with lower = 0.1: the current design misses
# its worst case (0.2 ± 0.13 against a lower limit of 0.1), so the worst-case allocation must
# tighten and costs more than today.
DEARER = BRACKET.replace("{lower}", "0.1")


def test_a_dearer_allocation_reads_costs_more():
    case = loads_case(DEARER)
    result = allocate(case, "worst-case")
    assert result.success and result.total_cost > result.current_cost
    text = build_report(case, ["worst-case"], samples=2000, seed=1, include_frontier=False,
                        created=STAMP).to_html()
    more, share = -result.savings, -result.savings_percent
    header = text.split("<main>", 1)[0]
    assert f"it costs <strong>{fmt_number(more)}</strong> more ({fmt_number(share, 3)} %)" in header
    alloc_html = section_html(text, "allocation")
    assert f"costs {fmt_number(more)} more" in alloc_html
    assert f"costs {fmt_number(share, 3)} % more" in alloc_html
    for html_text in (header, alloc_html):
        assert "saving <strong>-" not in html_text and ">-" + fmt_number(more) not in html_text


def test_cli_samples_accepts_2e5_and_refuses_fractions_and_negatives(tmp_path):
    out = tmp_path / "r.html"
    for bad in ("2.5", "-1"):
        result = _invoke(CASES / "gearbox_end_play.toml", "-o", out, "--samples", bad)
        assert result.exit_code == 2 and result.stderr.startswith("error: --samples:"), result.output
        assert result.stderr.count("\n") == 1 and not out.exists()
    result = _invoke(CASES / "gearbox_end_play.toml", "-o", out, "--model", "rss", "--no-frontier",
                     "--samples", "2e5", "--seed", "1")
    assert result.exit_code in (0, 1), result.output  # written (1: a verification verdict)
    assert "200,000 assemblies" in out.read_text(encoding="utf-8")


def test_verification_and_analysis_of_the_recommendation_use_the_processes_it_chose():
    # invented bore (turning, or grinding with cp 1.67) and pin (tests/helpers.py); the exact
    # fallout from scipy.stats.norm with σ_i = t_i/(3·cp_i) of the chosen process
    from helpers import PROCESS_TOML, gap_fallout_ppm

    case = loads_case(PROCESS_TOML)
    report = build_report(case, ["rss"], samples=SAMPLES, seed=SEED, include_frontier=False, created=STAMP)
    chosen = report.allocations["rss"]
    assert chosen.processes["bore"] == "grinding"
    t = dict(chosen.tolerances)

    ground, default = gap_fallout_ppm(t["bore"], 1.67, t["pin"]), gap_fallout_ppm(t["bore"], 1.0, t["pin"])
    assert default > 4 * ground
    assert report.verification["gap"].convolution_ppm == pytest.approx(ground, rel=1e-9)
    assert report.verification["gap"].predicted_ppm == pytest.approx(ground, rel=1e-9)
    assert report.recommended_analysis.requirements[0].fallout_ppm == pytest.approx(ground, rel=1e-9)
    assert _ppm_cell(report.verification["gap"].convolution_ppm) in section_html(report.to_html(), "verification")


def test_the_contributions_figure_is_drawn_by_the_plotting_module():
    # one module draws every figure (allocator.plots); the report only renders it as SVG.
    # Each bar is a contributor's share of σ²: the shares of one requirement add up to 100 %.
    from allocator.plots import contributions_figure

    case = load_case(CASES / "gearbox_end_play.toml")
    current = analyze(case)
    allocated = analyze(case, dict(allocate(case, model="rss").tolerances))
    figure = contributions_figure(current, allocated, allocation_label="rss allocation")
    assert len(figure.axes) == len(current.requirements)
    for ax, now, then in zip(figure.axes, current.requirements, allocated.requirements):
        solid = [p.get_width() for p in ax.patches[: len(now.contributions)]]
        hatched = [p.get_width() for p in ax.patches[len(now.contributions):]]
        assert solid == pytest.approx([100.0 * c.variance_share for c in now.contributions], rel=1e-12)
        assert hatched == pytest.approx([100.0 * c.variance_share for c in then.contributions], rel=1e-12)
        if now.sigma > 0:
            assert sum(solid) == pytest.approx(100.0, rel=1e-9) and sum(hatched) == pytest.approx(100.0, rel=1e-9)
        assert [t.get_text() for t in ax.get_legend().get_texts()] == ["current design", "rss allocation"]


def test_report_is_complete_and_frozen():
    import dataclasses

    case = load_case(CASES / "gearbox_end_play.toml")
    report = build_report(case, ["rss"], samples=2000, seed=1, include_frontier=False, created=STAMP)
    # complete when built: the allocation, its verification and the supplier sheet are there
    assert report.allocations["rss"].success and report.verification.samples == 2000
    assert report.supplier is not None and len(report.supplier.rows) == len(case.contributors)
    for name in ("allocations", "verification", "supplier", "created", "recommended"):
        with pytest.raises(dataclasses.FrozenInstanceError):
            setattr(report, name, None)
