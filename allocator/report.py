"""A self-contained HTML report for design reviews and supplier talks.

:func:`build_report` runs the library once — :func:`allocator.analysis.analyze`,
:func:`allocator.solve.allocate` per model, :func:`allocator.sweep.frontier`,
:func:`allocator.simulate.verify` and :func:`allocator.supplier.supplier_sheet` — and keeps
every result in a :class:`Report`. :meth:`Report.to_html` only formats those results: it
computes no number of its own, so the report and the library can never disagree.

The HTML is one file: inline CSS, plots as inline SVG drawn by matplotlib (glyphs as paths,
so no font files), no scripts, no links to anything outside the file. It prints on A4
(``@media print``) and reads in greyscale: every state that matters is written as a word,
never shown by colour alone. Text from the case file is escaped everywhere.
"""

from __future__ import annotations

import contextlib
import html
import io
import math
import platform
import re
import shlex
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

from .ppm import format_ppm

__all__ = [
    "SECTIONS",
    "Report",
    "build_report",
    "write_report",
    "recommended_model",
    "fmt_number",
    "fmt_input",
    "fmt_tolerance",
]

# (id, heading) of every section, in order; tests and the browser check use this list
SECTIONS = (
    ("summary", "1 Case summary and assumptions"),
    ("analysis", "2 Stack analysis of the current design"),
    ("allocation", "3 Allocation by model"),
    ("frontier", "4 Cost frontier"),
    ("contributions", "5 Contributions to variation"),
    ("verification", "6 Monte Carlo verification"),
    ("shadow-prices", "7 Shadow prices"),
    ("supplier", "8 Supplier sheet"),
    ("cautions", "9 Cautions"),
    ("reproducibility", "10 Reproducibility"),
)

MODEL_LABELS = {"worst-case": "worst case", "rss": "RSS", "mean-shift": "mean shift"}
MODEL_EXPLANATIONS = {
    "worst-case": "every part at its tolerance limit at the same time; the requirement holds "
    "for every assembly whose parts are in tolerance",
    "rss": "parts vary independently with the stated distributions; the response is taken as "
    "normal with the root-sum-square σ, and its predicted fallout must meet the target",
    "mean-shift": "as RSS, but each process mean may sit anywhere within its stated mean shift; "
    "the fallout at the worst mean must meet the target (estimated mean shift, Greenwood & "
    "Chase 1987)",
}
# order of preference for the allocation the report recommends (most conservative first)
_PREFERENCE = ("mean-shift", "rss", "worst-case")

CAUTIONS = (
    "Statistical results (RSS, mean shift, fallout in ppm, the Monte Carlo verification) assume "
    "stable, capable processes whose means sit where the case says (centred unless a mean shift "
    "is given), whose spreads follow the stated distributions and cp, and whose parts vary "
    "independently. They are predictions, not measurements.",
    "Before relying on a statistical tolerance, confirm each process with measured capability "
    "data (Cp, Cpk from a stable run) and keep monitoring it in production; a drifting or "
    "incapable process invalidates the ppm figures.",
    "Requirements given as expressions are linearised at the nominals for RSS and allocation; "
    "the Monte Carlo section evaluates the exact expression and shows where that matters.",
    "Safety-critical fits, and anything whose failure can hurt people, must be designed worst "
    "case and checked against the applicable codes and standards, with review by a licensed or "
    "otherwise qualified engineer.",
    "Costs are the case's cost curves, not quotations. The supplier sheet shows what the model "
    "expects; a supplier's real price may differ.",
    "This report is a decision aid, not an approval.",
)

_VERSION_PACKAGES = ("numpy", "scipy", "cvxpy", "pandas", "matplotlib")


# --------------------------------------------------------------------------- formatting


def fmt_number(value, digits: int = 4, *, signed: bool = False, strip: bool = False) -> str:
    """A number as plain text for the report: ``digits`` significant digits.

    Fixed notation between 1e-4 and 1e7 (no exponent for ordinary sizes), ``e`` notation
    outside; ``—`` for None or NaN, ``∞`` for infinity. ``signed`` adds a ``+`` to
    positive numbers (changes, savings); ``strip`` drops trailing zeros after the decimal
    point (for responses shown with many digits). The same function formats every number
    in the HTML, so a test can look for ``fmt_number(result.total_cost)`` in it.

    Examples
    --------
    >>> fmt_number(7.420412), fmt_number(0.0773549), fmt_number(12345.6)
    ('7.420', '0.07735', '12346')
    >>> fmt_number(7.098e-07), fmt_number(None), fmt_number(0.5, signed=True)
    ('7.098e-07', '—', '+0.5000')
    >>> fmt_number(0.3000000000001, 6, strip=True), fmt_number(-0.0722639419, 6, strip=True)
    ('0.3', '-0.0722639')
    """
    if value is None:
        return "—"
    x = float(value)
    if math.isnan(x):
        return "—"
    if math.isinf(x):
        return "∞" if x > 0 else "-∞"
    sign = "+" if signed and x > 0 else ""
    if x == 0:
        return "0"
    magnitude = abs(x)
    if 1e-4 <= magnitude < 1e7:
        exponent = math.floor(math.log10(magnitude))
        decimals = max(0, digits - 1 - exponent)
        text = f"{x:.{decimals}f}"
        # rounding may have carried into a new digit (9.9996 -> 10.000): drop one decimal
        if decimals > 0 and len(text.lstrip("-").replace(".", "").lstrip("0")) > digits:
            text = f"{x:.{decimals - 1}f}"
        if strip and "." in text:
            text = text.rstrip("0").rstrip(".")
        return sign + text
    return sign + f"{x:.{digits - 1}e}"


def fmt_input(value) -> str:
    """A value as the case file states it: up to 10 significant digits, no padding zeros.

    Examples
    --------
    >>> fmt_input(0.05), fmt_input(40000.0), fmt_input(None)
    ('0.05', '40000', '—')
    """
    if value is None:
        return "—"
    if isinstance(value, str):
        return value
    return f"{float(value):.10g}"


def fmt_tolerance(value) -> str:
    """A ± tolerance: 4 significant digits without trailing zeros (as on a drawing).

    Examples
    --------
    >>> fmt_tolerance(0.041), fmt_tolerance(0.0411666), fmt_tolerance(50.0)
    ('0.041', '0.04117', '50')
    """
    return fmt_number(value, strip=True)


def _e(text) -> str:
    """Escape text from the case (or anything else) for HTML."""
    return html.escape("" if text is None else str(text), quote=True)


def _n(value, digits: int = 4, *, signed: bool = False) -> str:
    return _e(fmt_number(value, digits, signed=signed))


def _r(value) -> str:
    """A response value (nominal, worst-case end, mean): 6 significant digits, no padding."""
    return _e(fmt_number(value, 6, strip=True))


def _i(value) -> str:
    return _e(fmt_input(value))


def _t(value) -> str:
    return _e(fmt_tolerance(value))


def _ppm(value) -> str:
    """A fallout in a column headed [ppm]: plain decimals, ppb for tiny values."""
    return _e(format_ppm(value, unit=False, missing="—"))


def _saving(value, digits: int = 4, *, percent: bool = False) -> str:
    """A saving against the current design; a dearer result reads ``costs 5.096 more``."""
    if value is not None and float(value) < 0:
        return _e(f"costs {fmt_number(-float(value), digits)}{' %' if percent else ''} more")
    return _n(value, digits, signed=True)


def _has_mean_shifts(case) -> bool:
    """True when some contributor of ``case`` states a mean shift."""
    return any(c.mean_shift > 0 for c in case.contributors)


def _model(name: str) -> str:
    # non-breaking: a model name never splits over two lines in a narrow column
    return _e(MODEL_LABELS.get(name, name)).replace(" ", "&nbsp;")


def _unit(text: str) -> str:
    return f" [{_e(text)}]" if text else ""


class _Units:
    """Units of one table column (or row): in its header when every entry shares one
    label, otherwise after each value (a requirement in N beside lengths in mm)."""

    def __init__(self, labels):
        distinct = set(labels)
        self.shared = next(iter(distinct), "") if len(distinct) <= 1 else None

    def head(self, text: str) -> str:
        """``text`` with the shared label: ``"Current ± [mm]"`` (HTML)."""
        return text + _unit(self.shared) if self.shared is not None else text

    def cell(self, value: str, label: str) -> str:
        """A value (HTML) followed by its own label when the column has no shared one."""
        if self.shared is not None or not label or value == "—":
            return value
        return f"{value}&nbsp;{_e(label)}"


def _own_units_text(case, limit: int = 12) -> str:
    """HTML list of the contributors and requirements whose units differ from the case's."""
    own = [(c.name, c.units) for c in case.contributors if c.units not in (None, case.units)]
    own += [(r.name, r.units) for r in case.requirements if r.units not in (None, case.units)]
    if not own:
        return ""
    shown = ", ".join(f"{_e(name)} [{_e(label)}]" for name, label in own[:limit])
    more = f" and {len(own) - limit} more" if len(own) > limit else ""
    return f'<div class="desc">in their own units: {shown}{more}</div>'


# --------------------------------------------------------------------------- the report


@dataclass
class Report:
    """Everything the HTML report shows, as the library computed it.

    Attributes
    ----------
    case : Case
    models : tuple of str
    analysis : StackAnalysis
        The current design (the case's ``tolerance`` values).
    allocations : dict
        Model -> :class:`~allocator.solve.Allocation`.
    recommended : str or None
        The model whose allocation the report recommends (see :func:`recommended_model`).
    recommended_analysis : StackAnalysis or None
        Stack analysis at the recommended allocation.
    frontier : Frontier or None
    frontier_message : str
        Why there is no frontier, when there is none.
    verification : Verification
    verification_basis : str
        ``'allocation'`` (the recommended allocation) or ``'current'``.
    supplier : SupplierSheet or None
    samples, seed : int
    created : datetime
        UTC time the report was built.
    versions : dict
        Python and library versions used.
    frontier_points, include_frontier
        The frontier options the report was built with.
    unrounded : dict
        Model -> allocation of the case without its ``[allocation].rounding``, solved only
        for the shadow prices a rounded allocation cannot have (its cost moves in steps).
    """

    case: object
    models: tuple
    analysis: object
    allocations: dict
    recommended: str | None
    recommended_analysis: object
    frontier: object
    frontier_message: str
    verification: object
    verification_basis: str
    supplier: object
    samples: int
    seed: int
    created: datetime
    versions: dict = field(default_factory=dict)
    frontier_points: int | None = None
    include_frontier: bool = True
    unrounded: dict = field(default_factory=dict)

    # ------------------------------------------------------------------ status

    @property
    def problems(self) -> list[str]:
        """One line per thing that went wrong (infeasible models, failed verification)."""
        out = [
            f"{MODEL_LABELS.get(m, m)}: {a.status}: {a.message}"
            for m, a in self.allocations.items()
            if not a.success
        ]
        if self.verification_basis == "allocation" and not self.verification.success:
            note = self.verification.assumption_note
            out.append(
                f"verification of the {MODEL_LABELS.get(self.recommended)} allocation: {self.verification.message}"
                + (f" ({note})" if note else "")
            )
        return out

    @property
    def status(self) -> str:
        """'ok', 'infeasible' (some model cannot meet a requirement), 'failed' or 'verification failed'."""
        statuses = {a.status for a in self.allocations.values()}
        if "infeasible" in statuses:
            return "infeasible"
        if "failed" in statuses:
            return "failed"
        if self.verification_basis == "allocation" and not self.verification.success:
            return "verification failed"
        return "ok"

    @property
    def success(self) -> bool:
        return self.status == "ok"

    @property
    def exit_code(self) -> int:
        """0 when every allocation is optimal and its verification passes, else 1."""
        return 0 if self.success else 1

    @property
    def section_ids(self) -> tuple[str, ...]:
        return tuple(s for s, _ in SECTIONS)

    @property
    def headings(self) -> tuple[str, ...]:
        return tuple(h for _, h in SECTIONS)

    def __repr__(self) -> str:
        return (
            f"Report({self.case.title!r}, status={self.status!r}, models={list(self.models)}, "
            f"recommended={self.recommended!r}, samples={self.samples}, seed={self.seed})"
        )

    # ------------------------------------------------------------------ figures

    def figures(self) -> dict[str, str]:
        """Section id -> inline SVG markup of its plot (only sections that have one)."""
        out = {}
        if self.frontier is not None:
            with _working_on("frontier"):
                out["frontier"] = _inline_svg(_frontier_svg(self), "fr", "Cost frontier plot")
        with _working_on("contributions"):
            out["contributions"] = _inline_svg(_contributions_svg(self), "co", "Contributions to variation, horizontal bars")
        with _working_on("verification"):
            out["verification"] = _inline_svg(_verification_svg(self), "mc", "Monte Carlo histogram of each requirement")
        return out

    # ------------------------------------------------------------------ html

    def to_html(self) -> str:
        """The report as one self-contained HTML document.

        Raises
        ------
        InternalError
            Formatting a section failed unexpectedly (names the section).
        """
        figures = self.figures()
        sections = (
            ("summary", _section_summary, ()),
            ("analysis", _section_analysis, ()),
            ("allocation", _section_allocation, ()),
            ("frontier", _section_frontier, (figures.get("frontier"),)),
            ("contributions", _section_contributions, (figures["contributions"],)),
            ("verification", _section_verification, (figures["verification"],)),
            ("shadow-prices", _section_shadow, ()),
            ("supplier", _section_supplier, ()),
            ("cautions", _section_cautions, ()),
            ("reproducibility", _section_reproducibility, ()),
        )
        with _working_on(None):
            body = [_header(self), "<main>"]
        for name, render, extra in sections:
            with _working_on(name):
                body.append(render(self, *extra))
        body.append("</main>")
        title = f"Tolerance allocation report: {self.case.title}"
        return (
            "<!DOCTYPE html>\n"
            '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f'<meta name="generator" content="allocator {_e(self.versions.get("allocator", ""))}">\n'
            f"<title>{_e(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            + "\n".join(body)
            + "\n</body>\n</html>\n"
        )


@contextlib.contextmanager
def _working_on(section: str | None, detail: str = ""):
    """Let an unexpected exception while computing or formatting ``section`` (an id of
    :data:`SECTIONS`; None: the page header) end the report as an
    :class:`~allocator.errors.InternalError` naming the section (and ``detail``).

    Library errors (bad input, usage) pass unchanged: they already say what is wrong. A
    failure is never turned into text in the report, so a report written with "ok" hides
    none.
    """
    from .errors import AllocatorError, InternalError

    try:
        yield
    except AllocatorError:
        raise
    except Exception as err:
        where = "the report header" if section is None else f"report section '{dict(SECTIONS)[section]}'"
        if detail:
            where += f" ({detail})"
        raise InternalError(where, err) from err


def recommended_model(allocations: dict) -> str | None:
    """The model whose allocation the report recommends.

    The most conservative optimal statistical allocation (mean shift before RSS), else
    the worst-case allocation, else None. This is the report's default, stated in the
    report; it is not an engineering judgement about the product.
    """
    for model in _PREFERENCE:
        a = allocations.get(model)
        if a is not None and a.success:
            return model
    return None


def build_report(
    case,
    models=None,
    *,
    samples: int = 200_000,
    seed: int = 0,
    frontier_points: int | None = None,
    include_frontier: bool = True,
    created: datetime | None = None,
) -> Report:
    """Run the library for a report on ``case``.

    Parameters
    ----------
    case : allocator.model.Case
    models : sequence of str, optional
        Stack models to allocate with; default the case's ``[allocation].models``.
    samples : int
        Monte Carlo assemblies for the verification [-].
    seed : int
        Seed of the verification (the report is reproducible with the same seed).
    frontier_points : int, optional
        Points of the cost frontier; default the case's ``[frontier].points``.
    include_frontier : bool
        False leaves the frontier out (section 4 says so): every point is a full
        allocation, which takes a while for cases with process choices.
    created : datetime, optional
        Time stamp to print (default: now, UTC).

    Returns
    -------
    Report
        Holds every library result; :meth:`Report.to_html` formats them.

    Raises
    ------
    CaseError, UsageError
        Bad input (as the library functions raise them).
    InternalError
        A computation failed unexpectedly (names the section); never shown as text in
        the report.
    """
    from . import __version__
    from .analysis import analyze
    from .simulate import verify
    from .solve import allocate
    from .supplier import supplier_sheet

    models = tuple(dict.fromkeys(models or case.allocation.models))
    allocations = {}
    for m in models:
        with _working_on("allocation", f"model {m}"):
            allocations[m] = allocate(case, m)
    recommended = recommended_model(allocations)
    with _working_on("analysis"):
        analysis = analyze(case)
    rec_alloc = allocations.get(recommended)
    with _working_on("allocation"):
        recommended_analysis = (
            analyze(case, dict(rec_alloc.tolerances), rec_alloc.processes) if rec_alloc is not None else None
        )

    with _working_on("shadow-prices"):
        unrounded = _unrounded_allocations(case, allocations)

    if include_frontier:
        with _working_on("frontier"):
            frontier, frontier_message = _run_frontier(case, models, frontier_points)
    else:
        frontier, frontier_message = None, "left out of this report on request"

    with _working_on("verification"):
        if rec_alloc is not None:
            # the allocation carries its processes: each part simulated with its process's cp
            verification = verify(case, rec_alloc, samples=samples, seed=seed, allocated_with=recommended)
            basis = "allocation"
        else:
            verification = verify(case, None, samples=samples, seed=seed)
            basis = "current"

    with _working_on("supplier"):
        supplier = supplier_sheet(case, recommended, rec_alloc) if rec_alloc is not None else None

    return Report(
        case=case,
        models=models,
        analysis=analysis,
        allocations=allocations,
        recommended=recommended,
        recommended_analysis=recommended_analysis,
        frontier=frontier,
        frontier_message=frontier_message,
        verification=verification,
        verification_basis=basis,
        supplier=supplier,
        samples=int(samples),
        seed=int(seed),
        created=created or datetime.now(timezone.utc).replace(microsecond=0),
        versions=_versions(__version__),
        frontier_points=frontier_points,
        include_frontier=include_frontier,
        unrounded=unrounded,
    )


def write_report(case, path, models=None, **kwargs) -> Report:
    """Build the report and write its HTML to ``path`` atomically.

    Refuses to overwrite the case file itself (:class:`~allocator.errors.UsageError`),
    checked before any work is done. Returns the :class:`Report`.
    """
    from .files import atomic_write
    from .errors import UsageError

    target = Path(path)
    if case.path is not None and target.resolve() == Path(case.path).resolve():
        raise UsageError(f"{target}: refusing to overwrite the input case file")
    if not target.parent.exists():
        raise UsageError(f"{target}: folder {target.parent} does not exist")
    report = build_report(case, models, **kwargs)
    atomic_write(target, report.to_html(), protect=(case.path,))
    return report


def _has_shadow_prices(allocation) -> bool:
    return any(rr.shadow_lower is not None or rr.shadow_upper is not None for rr in allocation.requirements)


def _unrounded_allocations(case, allocations) -> dict:
    """For rounded allocations without shadow prices: the same model solved without rounding.

    Rounding to a step makes the allocation a choice among listed values, whose cost has
    no derivative; the unrounded optimum of the same case does have one, and its shadow
    prices are what the limits are worth at the margin before rounding.
    """
    from dataclasses import replace

    from .solve import allocate

    if case.allocation.rounding is None:
        return {}
    plain = replace(case, allocation=replace(case.allocation, rounding=None))
    out = {}
    for model, result in allocations.items():
        if result.success and not _has_shadow_prices(result):
            unrounded = allocate(plain, model)
            if unrounded.success and _has_shadow_prices(unrounded):
                out[model] = unrounded
    return out


def _run_frontier(case, models, points):
    """The cost frontier and its note ("" when there is none to make).

    A sweep the case's ``[frontier]`` settings cannot support (a range on the wrong side
    of the other limit, say) is bad input: the :class:`~allocator.errors.UsageError` names
    the report section and the report is not written.
    """
    from .errors import UsageError
    from .sweep import frontier

    kwargs = {"models": models}
    if points is not None:
        kwargs["points"] = points
    try:
        return frontier(case, **kwargs), ""
    except UsageError as err:
        raise UsageError(f"report section '{dict(SECTIONS)['frontier']}': {err}") from err


def _versions(own: str) -> dict:
    from importlib import metadata

    out = {"allocator": own, "python": platform.python_version()}
    for name in _VERSION_PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


# --------------------------------------------------------------------------- svg


def _svg_of(figure) -> str:
    buffer = io.StringIO()
    figure.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    return buffer.getvalue()


def _svg_context():
    import matplotlib

    # fixed hash salt: identical reports for identical input; glyphs as paths: no fonts needed
    from cycler import cycler

    # greys for every colour a plot does not set itself, so fills print the same in greyscale
    greys = cycler(color=["0.35", "0.0", "0.6", "0.15", "0.75"])
    return matplotlib.rc_context(
        {
            "svg.hashsalt": "allocator-report",
            "svg.fonttype": "path",
            "axes.prop_cycle": greys,
            # a '$' in a case title is text, not mathtext (which could also fail to parse)
            "text.parse_math": False,
        }
    )


_ID = re.compile(r'\bid="([^"]+)"')


def _inline_svg(svg: str, prefix: str, label: str) -> str:
    """Matplotlib SVG text made fit to sit inline in HTML.

    Drops the XML prolog, DOCTYPE and metadata block, gives every id a per-figure prefix
    (several figures in one page would otherwise share ids such as ``clip0``), and labels
    the drawing for screen readers.
    """
    start = svg.find("<svg")
    svg = svg[start:] if start >= 0 else svg
    svg = re.sub(r"<metadata>.*?</metadata>\s*", "", svg, flags=re.S)
    ids = set(_ID.findall(svg))
    if ids:
        svg = _ID.sub(lambda m: f'id="{prefix}-{m.group(1)}"', svg)
        svg = re.sub(r'href="#([^"]+)"', lambda m: f'href="#{prefix}-{m.group(1)}"' if m.group(1) in ids else m.group(0), svg)
        svg = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}-{m.group(1)})" if m.group(1) in ids else m.group(0), svg)
    svg = svg.replace("<svg ", f'<svg role="img" aria-label="{_e(label)}" ', 1)
    return svg.strip()


def _frontier_svg(report: Report) -> str:
    from . import plots

    with _svg_context():
        return _svg_of(plots.frontier_figure(report.frontier))


def _verification_svg(report: Report) -> str:
    from .simulate import render_verification_plot

    with _svg_context():
        return render_verification_plot(report.verification, "svg").decode("utf-8")


def _contributions_svg(report: Report) -> str:
    """Horizontal bars: share of σ² per contributor, current design and recommended allocation.

    Greyscale: solid dark bars for the current design, white hatched bars for the
    allocation, told apart by fill pattern and legend, not by colour.
    """
    import numpy as np
    from matplotlib.figure import Figure

    current = report.analysis.requirements
    allocated = report.recommended_analysis.requirements if report.recommended_analysis is not None else None
    n_rows = [max(len(r.contributions), 1) for r in current]
    height = sum(0.26 * n * (2 if allocated else 1) + 1.0 for n in n_rows)
    with _svg_context():
        fig = Figure(figsize=(7.0, max(2.2, height)), layout="constrained")
        axes = fig.subplots(len(current), 1, squeeze=False, height_ratios=n_rows)[:, 0]
        for j, (ax, req) in enumerate(zip(axes, current)):
            names = [c.name for c in req.contributions]
            y = np.arange(len(names))
            share_now = [100.0 * c.variance_share for c in req.contributions]
            bar = 0.38 if allocated else 0.6
            ax.barh(y - (bar / 2 if allocated else 0), share_now, height=bar, color="0.25", edgecolor="black",
                    linewidth=0.6, label="current design")
            if allocated:
                by_name = {c.name: 100.0 * c.variance_share for c in allocated[j].contributions}
                share_alloc = [by_name.get(n, 0.0) for n in names]
                ax.barh(y + bar / 2, share_alloc, height=bar, color="white", edgecolor="black", hatch="////",
                        linewidth=0.6, label=f"{MODEL_LABELS.get(report.recommended)} allocation")
            ax.set_yticks(y, names)
            ax.invert_yaxis()
            ax.set_xlim(0, 100)
            ax.set_xlabel("share of the response variance σ² [%]")
            ax.set_title(f"{req.name}", loc="left", fontsize="medium")
            ax.grid(axis="x", color="0.85", linewidth=0.6)
            ax.set_axisbelow(True)
            for side in ("top", "right"):
                ax.spines[side].set_visible(False)
            ax.legend(fontsize="small", loc="lower right", frameon=True)
        return _svg_of(fig)


# --------------------------------------------------------------------------- html parts


@dataclass
class _Row:
    """A table row with a CSS class (e.g. the totals under the allocation table)."""

    cells: list
    cls: str


def _table(headers, rows, *, caption: str | None = None, numeric=None, cls: str = "") -> str:
    """An HTML table; ``numeric[i]`` right-aligns column i; the first column is a row header.

    ``headers`` and cells are HTML (already escaped).
    """
    numeric = numeric or [False] * len(headers)
    out = [f'<div class="scroll"><table{f" class={cls!r}" if cls else ""}>']
    if caption:
        out.append(f"<caption>{caption}</caption>")
    out.append(
        "<thead><tr>"
        + "".join(f'<th scope="col"{" class=num" if numeric[i] else ""}>{h}</th>' for i, h in enumerate(headers))
        + "</tr></thead><tbody>"
    )
    for row in rows:
        row_class = ""
        if isinstance(row, _Row):
            row, row_class = row.cells, f' class="{row.cls}"'
        cells = []
        for i, cell in enumerate(row):
            tag = "th scope=\"row\"" if i == 0 else "td"
            end = "th" if i == 0 else "td"
            cells.append(f"<{tag}{' class=num' if numeric[i] else ''}>{cell}</{end}>")
        out.append(f"<tr{row_class}>" + "".join(cells) + "</tr>")
    out.append("</tbody></table></div>")
    return "".join(out)


def _dl(items) -> str:
    return "<dl class=\"facts\">" + "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in items) + "</dl>"


def _section(report: Report, sid: str, inner: str) -> str:
    heading = dict(SECTIONS)[sid]
    return f'<section id="{sid}">\n<h2>{_e(heading)}</h2>\n{inner}\n</section>'


def _flag(text: str, kind: str = "") -> str:
    """A state written as a word in a bordered tag (greyscale-safe)."""
    return f'<span class="tag{(" " + kind) if kind else ""}">{_e(text)}</span>'


def _header(report: Report) -> str:
    case = report.case
    cur = case.currency
    parts = [
        "<header>",
        '<p class="kicker">Tolerance allocation report</p>',
        f"<h1>{_e(case.title)}</h1>",
        '<p class="meta">'
        + " · ".join(
            _e(x)
            for x in (
                f"case file {Path(case.path).name}" if case.path else "case not read from a file",
                f"created {report.created:%Y-%m-%d %H:%M} UTC",
                f"allocator {report.versions.get('allocator', '')}",
            )
        )
        + "</p>",
    ]
    problems = report.problems
    if problems:
        parts.append(
            '<div class="alert" role="alert"><p><strong>Attention: '
            + _e(report.status.upper())
            + ".</strong> Not every result below is usable:</p><ul>"
            + "".join(f"<li>{_e(p)}</li>" for p in problems)
            + "</ul></div>"
        )
    rec = report.allocations.get(report.recommended)
    if rec is not None:
        if rec.savings is not None and rec.savings < 0:
            change = (f"it costs <strong>{_n(-rec.savings)}</strong> more "
                      f"({_n(-rec.savings_percent, 3) if rec.savings_percent is not None else '—'} %)")
        else:
            change = (f"saving <strong>{_n(rec.savings, signed=True)}</strong> "
                      f"({_n(rec.savings_percent, 3, signed=True)} %)")
        parts.append(
            '<p class="verdict">Recommended here: the <strong>'
            + _model(report.recommended)
            + f"</strong> allocation, <strong>{_n(rec.total_cost)}</strong>{_e(' ' + cur if cur else '')} per assembly "
            f"against {_n(rec.current_cost)} for the current design: {change}. "
            f"Monte Carlo: {_e(report.verification.message)}.</p>"
        )
    else:
        parts.append('<p class="verdict">No model produced an allocation; sections 3 to 8 show the current design only.</p>')
    means = (
        "whose means stay within the mean shifts the case states"
        if _has_mean_shifts(case)
        else "centred on their nominals (the case states no mean shift)"
    )
    parts.append(
        '<aside class="caution-brief" role="note"><p><strong>Caution.</strong> Statistical results assume '
        f"stable, capable processes with the stated distributions, {means}: verify with measured capability "
        "before relying on them. Safety-critical fits are designed worst case and checked against the "
        'applicable codes and a licensed engineering review. <a href="#cautions">All cautions (section 9)</a>.</p></aside>'
    )
    parts.append(
        '<nav aria-label="Contents"><h2 class="toc">Contents</h2><ol>'
        + "".join(f'<li><a href="#{sid}">{_e(h.split(" ", 1)[1])}</a></li>' for sid, h in SECTIONS)
        + "</ol></nav>"
    )
    parts.append("</header>")
    return "\n".join(parts)


def _cost_text(curve) -> str:
    """The cost curve as HTML: its formula, then its parameters on a second line."""
    if curve is None:
        return "no cost (held)"
    f = fmt_input
    if curve.curve == "reciprocal":
        formula, params = "a + b/t", f"a = {f(curve.a)}, b = {f(curve.b)}"
    elif curve.curve == "reciprocal-power":
        formula, params = "a + b/t^k", f"a = {f(curve.a)}, b = {f(curve.b)}, k = {f(curve.k)}"
    elif curve.curve == "exponential":
        formula, params = "a + b·exp(−c·t)", f"a = {f(curve.a)}, b = {f(curve.b)}, c = {f(curve.c)}"
    elif curve.curve == "table":
        points = curve.points_tolerance
        if curve.is_discrete:
            formula, params = "listed tolerances only", "±" + ", ".join(f(t) for t in points)
        else:
            formula = f"table of {len(points)} points, interpolated"
            params = f"±{f(points[0])} to ±{f(points[-1])}"
    else:
        return _e(curve.curve)
    return f'<span class="nw">{_e(formula)}</span><div class="desc">{_e(params)}</div>'


def _chain_text(requirement) -> str:
    if requirement.chain is None:
        return f"<code>{_e(requirement.expression)}</code>"
    terms = []
    for name, coeff in requirement.chain.items():
        sign = "−" if coeff < 0 else "+"
        mag = abs(coeff)
        factor = "" if mag == 1 else f"{fmt_input(mag)}·"
        terms.append(f"{sign} {factor}{name}")
    text = " ".join(terms)
    text = text[2:] if text.startswith("+ ") else text
    return f"<code>{_e(text)}</code>"


def _section_summary(report: Report) -> str:
    case = report.case
    u = case.units
    facts = [
        ("Title", _e(case.title)),
        ("Units", _e(u or "—") + _own_units_text(case)),
        ("Currency", _e(case.currency or "—")),
        ("Case file", _e(case.path) if case.path else "—"),
        ("Models in this report", ", ".join(_model(m) for m in report.models)),
        ("Rounding of allocated tolerances", _e(case.allocation.rounding) if case.allocation.rounding is not None else "none"),
    ]
    if case.economics.volume is not None:
        facts.append(("Volume", f"{_i(case.economics.volume)} assemblies per year"))
    if case.economics.scrap_cost is not None:
        facts.append(("Cost of one assembly out of limits", f"{_i(case.economics.scrap_cost)}{_e(' ' + case.currency if case.currency else '')}"))
    rows = []
    cu = _Units(case.contributor_units(c.name) for c in case.contributors)
    for c in case.contributors:
        label = case.contributor_units(c.name)
        if c.processes:
            limits = "by process"
            cost = "".join(
                f'<div class="proc"><strong>{_e(p.name)}</strong> '
                + cu.cell(f"±{_i(p.limits[0])} to ±{_i(p.limits[1])}", label)
                + (f", cp {_i(p.cp)}" if p.cp is not None else "")
                + f": {_cost_text(p.cost)}</div>"
                for p in c.processes
            )
        elif c.fixed and c.limits is None:
            limits, cost = "held", _cost_text(c.cost)
        else:
            lo, hi = c.limits if c.limits is not None else (c.tolerance, c.tolerance)
            limits = cu.cell(f"{_i(lo)} to {_i(hi)}", label)
            cost = _cost_text(c.cost)
        name = _e(c.name) + (f'<div class="desc">{_e(c.description)}</div>' if c.description else "")
        if c.fixed:
            name += " " + _flag("fixed")
        rows.append(
            [
                name,
                cu.cell(_i(c.nominal), label),
                cu.cell(_i(c.tolerance), label),
                limits,
                _e(c.distribution),
                _i(c.cp) if c.distribution == "normal" else "—",
                _i(c.mean_shift),
                str(c.count),
                cost,
            ]
        )
    contributors = _table(
        ["Contributor", cu.head("Nominal"), cu.head("Current ±"), cu.head("Achievable ±"), "Distribution",
         "cp", "Mean shift [×&nbsp;t]", "Count", f"Unit cost{_unit(case.currency)} at ±t" + cu.head("")],
        rows,
        numeric=[False, True, True, True, False, True, True, True, False],
        caption="Contributors as stated in the case file",
    )
    ru = _Units(case.requirement_units(r.name) for r in case.requirements)
    req_rows = [
        [_e(r.name), _chain_text(r), ru.cell(_i(r.lower), case.requirement_units(r.name)),
         ru.cell(_i(r.upper), case.requirement_units(r.name)), _ppm(r.fallout_ppm)]
        for r in case.requirements
    ]
    requirements = _table(
        ["Requirement", "Response y", ru.head("Lower limit"), ru.head("Upper limit"), "Fallout target [ppm]"],
        req_rows,
        numeric=[False, False, True, True, True],
        caption="Requirements (the fallout target applies to the statistical models)",
    )
    models = "<ul>" + "".join(
        f"<li><strong>{_model(m)}</strong>: {_e(MODEL_EXPLANATIONS.get(m, ''))}.</li>" for m in report.models
    ) + "</ul>"
    assumptions = (
        "<ul>"
        "<li>A tolerance ±t is a symmetric half-width about the nominal.</li>"
        "<li>σ of a contributor: t/(3·cp) for normal, t/√3 for uniform, t/√6 for triangular.</li>"
        "<li>Contributors vary independently; a contributor with count n stands for n independent parts.</li>"
        "<li>Unit costs follow the stated curves; an assembly costs Σ count · unit cost.</li>"
        "</ul>"
    )
    return _section(
        report,
        "summary",
        _dl(facts) + contributors + requirements + "<h3>Models</h3>" + models + "<h3>Assumptions</h3>" + assumptions,
    )


def _worst_case_flag(r) -> str:
    """'yes', or 'NO' with the amount past each limit (as judged by the analysis)."""
    if r.worst_case_ok:
        return _flag("yes")
    misses = [
        f"{_n(amount, 3)} {side}"
        for amount, side in ((r.worst_case_below, "below lower"), (r.worst_case_above, "above upper"))
        if amount
    ]
    return _flag("NO", "bad") + " " + ", ".join(misses)


def _analysis_table(analysis, caption: str) -> str:
    reqs = analysis.requirements
    headers = ["Quantity"] + [_e(r.name) for r in reqs]
    ru = _Units(r.units for r in reqs)

    def row(label, values):
        return [label] + values

    def measured(label, values):
        """A row in the requirements' units: in the label when shared, else after each value."""
        return [ru.head(label)] + [ru.cell(v, r.units) for v, r in zip(values, reqs)]

    rows = [
        measured("Nominal response ȳ", [_r(r.nominal) for r in reqs]),
        measured("Limits", [f"{_i(r.lower)} to {_i(r.upper)}" for r in reqs]),
        measured("Worst case, lowest", [_r(r.worst_case_min) for r in reqs]),
        measured("Worst case, highest", [_r(r.worst_case_max) for r in reqs]),
        row("Worst case within limits", [_worst_case_flag(r) for r in reqs]),
        measured("RSS σ", [_n(r.sigma) for r in reqs]),
        row("Cpk of the response", [_n(r.cpk, 3) for r in reqs]),
        row("Predicted fallout, RSS [ppm]", [_ppm(r.fallout_ppm) for r in reqs]),
        row("  of which below / above [ppm]", [f"{_ppm(r.fallout_below_ppm)} / {_ppm(r.fallout_above_ppm)}" for r in reqs]),
        measured("Mean-shift band ±δ", [_n(r.mean_shift) for r in reqs]),
        row("Predicted fallout, mean at worst place [ppm]", [_ppm(r.mean_shift_ppm) for r in reqs]),
        row("Fallout target [ppm]", [_ppm(r.target_ppm) for r in reqs]),
        row("Meets target (RSS)", [_flag("yes") if r.fallout_ppm <= r.target_ppm else _flag("NO", "bad") for r in reqs]),
        row("Response", ["linear chain" if r.linear else "expression, linearised" for r in reqs]),
    ]
    return _table(headers, rows, numeric=[False] + [True] * len(reqs), caption=caption, cls="metrics")


def _section_analysis(report: Report) -> str:
    intro = (
        "<p>The design as it is today: every contributor at its current tolerance. "
        "Computed by <code>allocator.analysis.analyze</code>.</p>"
    )
    table = _analysis_table(report.analysis, "Stack results at the current tolerances")
    parts = [intro, table]
    for r in report.analysis.requirements:
        per = _Units(c.sensitivity_units for c in r.contributions)
        tol = _Units(c.units for c in r.contributions)
        rows = [
            [_e(c.name), per.cell(_n(c.sensitivity), c.sensitivity_units), str(c.count),
             tol.cell(_i(c.tolerance), c.units), _n(c.worst_case), _n(100 * c.variance_share, 3)]
            for c in r.contributions
        ]
        parts.append(
            _table(
                ["Contributor", per.head("Sensitivity ∂y/∂x"), "Count", tol.head("±t"),
                 f"± worst-case share{_unit(r.units)}", "Share of σ² [%]"],
                rows,
                numeric=[False, True, True, True, True, True],
                caption=f"Contributors to {_e(r.name)}",
            )
        )
    return _section(report, "analysis", "\n".join(parts))


def _bound_note(bound: str) -> str:
    return {"tightest": " " + _flag("tightest"), "loosest": " " + _flag("loosest"), "fixed": " " + _flag("fixed"),
            "held": " " + _flag("held")}.get(bound, "")


def _section_allocation(report: Report) -> str:
    case = report.case
    cur = case.currency
    allocs = report.allocations
    models = list(allocs)
    cu = _Units(case.contributor_units(c.name) for c in case.contributors)
    headers = ["Contributor", cu.head("Current ±")] + [
        cu.head(f"{_model(m)} ±") + (" (recommended)" if m == report.recommended else "") for m in models
    ]
    rows = []
    for i, c in enumerate(case.contributors):
        label = case.contributor_units(c.name)
        cells = [_e(c.name), cu.cell(_i(c.tolerance), label)]
        for m in models:
            a = allocs[m]
            if not a.success:
                cells.append("—")
                continue
            t = a.tolerances[c.name]
            under = [a.processes.get(c.name, ""), (getattr(a, "grades", None) or {}).get(c.name, "")]
            under = " · ".join(x for x in under if x)
            cells.append(
                cu.cell(_t(t), label) + _bound_note(str(a.active[c.name]))
                + (f'<div class="desc">{_e(under)}</div>' if under else "")
            )
        rows.append(cells)
    cost_label = f"{_unit(cur)}" if cur else ""
    first = next(iter(allocs.values()), None)
    current_cost = _n(first.current_cost) if first is not None else "—"
    ok = {m: allocs[m].success for m in models}
    rows.append(_Row(["Cost per assembly" + cost_label, current_cost]
                     + [_n(allocs[m].total_cost) if ok[m] else "—" for m in models], "sum first"))
    rows.append(_Row(["Saving against current" + cost_label, ""]
                     + [_saving(allocs[m].savings) if ok[m] else "—" for m in models], "sum"))
    rows.append(_Row(["Saving against current [%]", ""]
                     + [_saving(allocs[m].savings_percent, 3, percent=True) if ok[m] else "—" for m in models], "sum"))
    # rounded allocations (case [allocation].rounding) say what the rounding cost
    rounding_cost = {m: getattr(allocs[m], "rounding_cost", None) for m in models}
    if any(v is not None for v in rounding_cost.values()):
        rows.append(_Row([f"Cost of rounding the tolerances{cost_label}", ""]
                         + [_n(rounding_cost[m], signed=True) if ok[m] else "—" for m in models], "sum"))
    rows.append(_Row(["Status", ""] + [_flag(allocs[m].status, "" if ok[m] else "bad") for m in models], "sum"))
    table = _table(headers, rows, numeric=[False] + [True] * (1 + len(models)),
                   caption="Least-cost ± tolerances per stack model (side by side)", cls="alloc")
    legend = (
        '<p class="note">Tags: <span class="tag">tightest</span> the tolerance sits at its tightest achievable value '
        '(the cost curve ends there); <span class="tag">loosest</span> at its loosest; <span class="tag">fixed</span> held '
        "by the case. Under a value: the process chosen, when there is a choice, and the ISO 286 grade when the "
        "case rounds to grades. Computed by "
        "<code>allocator.solve.allocate</code>; every optimum is re-checked against every requirement.</p>"
    )
    # predicted requirement results per model
    req_rows = []
    ru = _Units(case.requirement_units(r.name) for r in case.requirements)
    for r_i, req in enumerate(case.requirements):
        label = case.requirement_units(req.name)
        for m in models:
            a = allocs[m]
            if not a.success:
                req_rows.append([_e(req.name), _model(m), "—", "—", "—", "—", "—"])
                continue
            rr = a.requirements[r_i]
            req_rows.append(
                [
                    _e(rr.name),
                    _model(m),
                    ru.cell(f"{_r(rr.worst_case_min)} to {_r(rr.worst_case_max)}", label),
                    ru.cell(_n(rr.sigma), label),
                    _ppm(rr.fallout_ppm),
                    _ppm(rr.target_ppm),
                    _e(rr.binding or "—"),
                ]
            )
    req_table = _table(
        ["Requirement", "Model", ru.head("Worst-case range"), ru.head("RSS σ"), "Predicted fallout [ppm]",
         "Target [ppm]", "Limit pressed"],
        req_rows,
        numeric=[False, False, True, True, True, True, False],
        caption="Each requirement at each allocation",
    )
    failures = "".join(
        f'<div class="alert"><p><strong>{_model(m)}: {_e(a.status.upper())}.</strong> {_e(a.message)}</p></div>'
        for m, a in allocs.items()
        if not a.success
    )
    rec_note = (
        f"<p>The report recommends the <strong>{_model(report.recommended)}</strong> allocation: the most "
        "conservative statistical model that found an optimum (mean shift before RSS; worst case when no "
        "statistical model was requested). This is the report's default, not an engineering judgement; "
        "choose the model that fits the product and its risks.</p>"
        if report.recommended
        else ""
    )
    return _section(report, "allocation", failures + rec_note + table + legend + req_table)


def _section_frontier(report: Report, svg: str | None) -> str:
    front = report.frontier
    if front is None or svg is None:
        return _section(report, "frontier", f'<p class="note">No cost frontier: {_e(report.frontier_message)}.</p>')
    case = report.case
    cur = case.currency
    swept = "fallout target [ppm]" if front.vary == "fallout_ppm" else f"{front.vary} limit{_unit(front.units)}"
    intro = (
        f"<p>The least cost per assembly of each model as the {_e(swept.split(' [')[0])} of "
        f"<strong>{_e(front.requirement)}</strong> moves from {_e(fmt_number(front.values[0], 6, strip=True))} to "
        f"{_e(fmt_number(front.values[-1], 6, strip=True))} "
        f"({len(front.values)} points; every point a complete allocation, every other limit as in the case). "
        "Computed by <code>allocator.sweep.frontier</code>, drawn by <code>allocator.plots.frontier_figure</code>."
        "</p>"
    )
    guide = (
        "<p><strong>How to read it.</strong> Each point is a complete least-cost allocation for one value of the "
        "swept limit or target; a line joins one model's points, told apart by dash pattern and marker. Moving "
        "along the axis towards a looser requirement the cost can only fall. Where a curve is steep, relaxing the "
        "requirement a little buys a lot (ask whether the limit is really needed there); where it is flat, "
        "relaxing buys nothing. The vertical gap between two models at the same value is the price of the more "
        "conservative model. The star is the current design at the case's own value; shaded spans are values "
        "that no model (or only some models) can meet.</p>"
    )
    status = ""
    if front.status != "optimal" or front.notes:
        lines = ([front.message] if front.message else []) + list(front.notes)
        status = '<p class="note">' + "<br>".join(_e(x) for x in lines) + "</p>"
    current = front.current or {}
    facts = []
    if current.get("value") is not None:
        value_units = "ppm" if front.vary == "fallout_ppm" else front.units
        facts.append(("Case value of the swept quantity", _i(current["value"]) + (f"&nbsp;{_e(value_units)}" if value_units else "")))
    if current.get("total_cost") is not None:
        facts.append((f"Cost of the current design{_unit(cur)}", _n(current["total_cost"])))
    for model, cost in (current.get("optimal") or {}).items():
        facts.append((f"Least cost at the case value, {_model(model)}{_unit(cur)}", _n(cost)))
    rows = [
        [_ppm(v) if front.vary == "fallout_ppm" else _e(fmt_number(v, strip=True))] + [_n(front.costs[m][i]) if front.costs[m][i] is not None else _e(front.statuses[m][i]) for m in front.models]
        for i, v in enumerate(front.values)
    ]
    table = _table(
        [_e(swept[0].upper() + swept[1:])] + [f"{_model(m)}{_unit(cur)}" for m in front.models],
        rows,
        numeric=[True] * (1 + len(front.models)),
        caption="The frontier's points: least cost per assembly",
        cls="compact",
    )
    figure = f'<figure class="plot">{svg}<figcaption>Least cost per assembly against the swept value, per model.</figcaption></figure>'
    return _section(report, "frontier", intro + figure + guide + status + (_dl(facts) if facts else "") + table)


def _section_contributions(report: Report, svg: str) -> str:
    text = (
        "<p>Share of the response variance σ² that each contributor causes (count · (∂y/∂x · σ)² over the total), "
        "from <code>allocator.analysis.analyze</code> at the current tolerances"
        + (f" and at the {_model(report.recommended)} allocation" if report.recommended else "")
        + ". A long bar is where a tighter tolerance narrows the stack most; a short one is a part whose "
        "tolerance hardly matters to this requirement.</p>"
    )
    legend = "Dark solid bars: current design." + (
        f" White hatched bars: {_e(MODEL_LABELS.get(report.recommended))} allocation." if report.recommended else ""
    )
    return _section(report, "contributions", text + f'<figure class="plot">{svg}<figcaption>{legend}</figcaption></figure>')


def _verdict(check) -> str:
    if check.status == "fail":
        return _flag("fail", "bad")
    return _flag("pass") if check.decided else _flag("undecided")


def _section_verification(report: Report, svg: str) -> str:
    v = report.verification
    case = report.case
    ru = _Units(c.units for c in v.requirements)
    basis = (
        f"the recommended {_model(report.recommended)} allocation"
        if report.verification_basis == "allocation"
        else "the current design (no allocation was available)"
    )
    intro = (
        f"<p>{v.samples:,} whole assemblies drawn at random for {basis}, every part from its stated distribution"
        + (
            ", process means placed at the worst end of their mean shift"
            if v.shift_means and any(c.mean_shift > 0 for c in case.contributors)
            else ""
        )
        + f"; seed {v.seed}. Computed by <code>allocator.simulate.verify</code>; the interval is the exact "
        f"(Clopper–Pearson) {v.confidence:.0%} interval. Result: {_e(v.message)}.</p>"
    )
    if v.assumption_note:
        intro += f'<p class="note"><strong>Note:</strong> {_e(v.assumption_note)}.</p>'
    rows = [
        [
            _e(c.name),
            _ppm(c.fallout_ppm),
            f"{_ppm(c.ci_low_ppm)} to {_ppm(c.ci_high_ppm)}",
            _ppm(c.target_ppm),
            _ppm(c.predicted_ppm),
            _ppm(c.convolution_ppm),
            ru.cell(_r(c.mean), c.units),
            ru.cell(_n(c.std), c.units),
            _verdict(c),
        ]
        for c in v.requirements
    ]
    table = _table(
        ["Requirement", "Fallout, simulated [ppm]", f"{v.confidence:.0%} interval [ppm]", "Target [ppm]",
         "Analytic prediction [ppm]", "Exact convolution [ppm]", ru.head("Mean"), ru.head("Std. dev."), "Verdict"],
        rows,
        numeric=[False, True, True, True, True, True, True, True, False],
        caption="Simulated fallout against the target and the predictions",
    )
    note = (
        '<p class="note">Verdict: <span class="tag">pass</span> when the whole interval lies at or below the target; '
        '<span class="tag bad">fail</span> when it lies above; <span class="tag">undecided</span> when the target lies '
        "inside the interval (more samples would decide; nothing is shown to fail).</p>"
    )
    figure = f'<figure class="plot">{svg}<figcaption>Histogram of the simulated response with the limits (dashed) and the RSS normal curve (<code>allocator.simulate.render_verification_plot</code>).</figcaption></figure>'
    return _section(report, "verification", intro + table + note + figure)


def _section_shadow(report: Report) -> str:
    from .model import per_unit

    case = report.case
    cur = case.currency
    per_ppm = f"[{_e(cur or 'cost')}/ppm]"

    def per_limit(name: str) -> str:
        return per_unit(cur or "cost", case.requirement_units(name) or "unit")

    pu = _Units(per_limit(r.name) for r in case.requirements)
    rows = []
    for m, a in report.allocations.items():
        if not a.success:
            rows.append(["—", _model(m), _e(a.status), "—", "—", "—"])
            continue
        source = report.unrounded.get(m, a)
        for rr in source.requirements:
            rows.append(
                [
                    _e(rr.name),
                    _model(m) + (" <small>(unrounded)</small>" if m in report.unrounded else ""),
                    _e(rr.binding or "—"),
                    pu.cell(_n(rr.shadow_lower, signed=True), per_limit(rr.name)),
                    pu.cell(_n(rr.shadow_upper, signed=True), per_limit(rr.name)),
                    _n(rr.shadow_ppm, signed=True),
                ]
            )
    table = _table(
        ["Requirement", "Model", "Limit pressed", pu.head("Cost change per unit of lower limit"),
         pu.head("Cost change per unit of upper limit"), f"Cost change per ppm of target {per_ppm}"],
        rows,
        numeric=[False, False, False, True, True, True],
        caption="Marginal cost of each requirement limit (from the allocation's Lagrange multipliers)",
    )
    guide = (
        "<p><strong>How to read it.</strong> A shadow price is the change of the least cost per assembly when a "
        "limit moves by one unit, all else re-optimised; it holds for small moves. A negative value on an upper "
        "limit means raising that limit saves money; a positive value on a lower limit means lowering it saves "
        "money. The per-ppm column says what accepting one more ppm of fallout would save (statistical models). "
        "A zero or empty entry is a limit that does not constrain the optimum. Multiply by the change you have in "
        "mind (e.g. 0.01 of the unit) for a first estimate; the frontier shows larger moves exactly. "
        "Computed by <code>allocator.solve.allocate</code> together with each allocation.</p>"
    )
    if report.unrounded:
        guide += (
            '<p class="note">Marked <em>(unrounded)</em>: the allocation in section 3 is rounded to '
            f"{_e(report.case.allocation.rounding)}, so its cost moves in steps and has no derivative. These shadow "
            "prices belong to the same model solved without rounding (<code>allocate</code> on the case with "
            "<code>rounding</code> removed): what the limits are worth at the margin before rounding.</p>"
        )
    undefined = [
        m for m, a in report.allocations.items()
        if a.success and m not in report.unrounded and not _has_shadow_prices(a)
    ]
    if undefined:
        guide += (
            '<p class="note">No shadow prices for the '
            + ", ".join(_model(m) for m in undefined)
            + " allocation: its tolerances are a choice among listed, process or rounded values, where the cost "
            "moves in steps and has no derivative. The cost frontier (section 4) shows what a limit is worth there.</p>"
        )
    return _section(report, "shadow-prices", table + guide)


def _section_supplier(report: Report) -> str:
    case = report.case
    cur = case.currency
    cu = _Units(case.contributor_units(c.name) for c in case.contributors)
    allocs = report.allocations
    ok_models = [m for m, a in allocs.items() if a.success]
    rec = report.recommended
    money = _unit(cur)
    if rec is None:
        return _section(report, "supplier", '<p class="note">No allocation is available, so there is nothing to ask suppliers for yet.</p>')
    ask_headers = ["Contributor", "Count", cu.head("Current ±")] + [
        cu.head("Ask ±") + f", {_model(m)}" + (" (recommended)" if m == rec else "") for m in ok_models
    ] + [f"Unit cost at the recommended ±{money}"]
    ask_rows = []
    for c in case.contributors:
        label = case.contributor_units(c.name)
        row = [_e(c.name) + (f'<div class="desc">{_e(c.description)}</div>' if c.description else ""), str(c.count),
               cu.cell(_i(c.tolerance), label)]
        for m in ok_models:
            under = [allocs[m].processes.get(c.name, ""), (getattr(allocs[m], "grades", None) or {}).get(c.name, "")]
            under = " · ".join(x for x in under if x)
            row.append(cu.cell(_t(allocs[m].tolerances[c.name]), label)
                       + (f'<div class="desc">{_e(under)}</div>' if under else ""))
        row.append(_n(allocs[rec].unit_cost[c.name]))
        ask_rows.append(row)
    ask = _table(ask_headers, ask_rows, numeric=[False] + [True] * (len(ask_headers) - 1),
                 caption="Tolerance to ask of each supplier")
    sheet = report.supplier
    parts = [ask]
    if sheet is not None and sheet.rows:
        rows = []
        for r in sheet.rows:
            tightened = "<br>".join(
                f'<span class="nw">{_e(name)} {_t(before)} → '
                f'{cu.cell(_t(after), case.contributor_units(name))}</span>'
                for name, before, after in r.tightened
            ) or ("none" if r.status == "solved" else "")
            status = "" if r.status == "solved" else _flag(r.status, "bad" if r.status in ("infeasible", "failed") else "")
            rows.append(
                [
                    _e(r.contributor),
                    cu.cell(_t(r.tolerance), r.units),
                    _n(r.unit_cost),
                    (cu.cell(_t(r.looser), r.units) if r.looser is not None else "—") + (" " + status if status else ""),
                    _n(r.own_change, signed=True),
                    _n(r.elsewhere_change, signed=True),
                    _n(r.total_cost_change, signed=True),
                    tightened if r.status == "solved" else _e(r.message),
                ]
            )
        parts.append(
            _table(
                ["Contributor", cu.head("Asked ±"), f"Unit cost{money}", cu.head("One step looser ±"),
                 f"Change on this part{money}", f"Change elsewhere{money}", f"Change of total{money}",
                 cu.head("Other tolerances that must tighten")],
                rows,
                numeric=[False, True, True, True, True, True, True, False],
                caption=f"What loosening one tolerance by one step costs elsewhere ({_model(rec)} allocation)",
                cls="supplier",
            )
        )
    elif sheet is not None:
        parts.append(f'<p class="note">{_e(sheet.message)}</p>')
    step = sheet.step if sheet is not None else 0.1
    guide = (
        "<p><strong>How to read it.</strong> The first table is the tolerance to put on each drawing or purchase "
        "order, per model, and what the case's cost curve says one part costs there. The second answers the "
        "question a supplier asks: <em>what if I can only hold a little less?</em> For each contributor the "
        f"allocation is solved again with that contributor held one step looser (+{step:.0%}, rounded up to the "
        "case's rounding step; for listed tolerances, the next listed value) and everything else free. "
        "<em>Change on this part</em> is what the supplier's part gets cheaper (count · unit-cost change, usually "
        "negative); <em>change elsewhere</em> is what the other parts cost more because their tolerances must "
        "tighten; <em>change of total</em> is the sum, the net price of the concession per assembly. It is never "
        "negative, because the allocation already was the least cost; a small total means the concession is "
        "nearly free, a large one means the supplier's price must drop at least that much to be worth it. "
        "Computed by <code>allocator.supplier.supplier_sheet</code>.</p>"
    )
    parts.append(guide)
    return _section(report, "supplier", "\n".join(parts))


def _section_cautions(report: Report) -> str:
    items = "".join(f"<li>{_e(text)}</li>" for text in CAUTIONS)
    return _section(report, "cautions", f'<div class="cautions"><ul>{items}</ul></div>')


def _section_reproducibility(report: Report) -> str:
    case = report.case
    v = report.versions
    solver_rows = [
        [_model(m), _e(a.status), _e(a.solver), str(a.iterations), _n(a.gap) if a.gap is not None else "—", _e(a.message)]
        for m, a in report.allocations.items()
    ]
    solvers = _table(["Model", "Status", "Solver", "Iterations", "Relative gap", "Solver message"], solver_rows,
                     numeric=[False, False, False, True, True, False], caption="Solvers")
    model_flags = " ".join(f"--model {m}" for m in report.models)
    frontier_flag = (
        " --no-frontier"
        if not report.include_frontier
        else (f" --frontier-points {report.frontier_points}" if report.frontier_points is not None else "")
    )
    # the case path exactly as it was given (folder included), quoted for a shell
    command = (
        f"allocator report {shlex.quote(str(case.path)) if case.path else 'CASE'} {model_flags} "
        f"--samples {report.samples} --seed {report.seed}{frontier_flag} -o REPORT.html"
    )
    facts = [
        ("Tool", f"allocator {_e(v.get('allocator', ''))}"),
        ("Case file", _e(case.path) if case.path else "not read from a file"),
        ("Case file SHA-256", f"<code>{_e(case.sha256 or '—')}</code>"),
        ("Monte Carlo", f"{report.samples:,} assemblies, seed {report.seed}"),
        ("Created", f"{report.created:%Y-%m-%d %H:%M:%S} UTC"),
        ("Python and libraries", _e(", ".join(f"{k} {v[k]}" for k in ("python", *_VERSION_PACKAGES) if k in v))),
        ("Platform", _e(platform.platform(terse=True))),
        ("Same report again", f"<code>{_e(command)}</code>"),
    ]
    return _section(report, "reproducibility", _dl(facts) + solvers)


_CSS = """
:root { --ink: #111; --muted: #555; --rule: #999; --faint: #e9e9e9; }
* { box-sizing: border-box; }
html { font-size: 15px; }
body { margin: 0 auto; max-width: 72rem; padding: 1.5rem 2rem 3rem; color: var(--ink); background: #fff;
  font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; line-height: 1.45; }
h1 { font-size: 1.9rem; margin: 0.1rem 0 0.3rem; line-height: 1.2; }
h2 { font-size: 1.3rem; margin: 2.2rem 0 0.6rem; padding-bottom: 0.2rem; border-bottom: 2px solid var(--ink); }
h3 { font-size: 1.05rem; margin: 1.2rem 0 0.4rem; }
h2.toc { font-size: 1rem; border: 0; margin: 0 0 0.3rem; }
.kicker { margin: 0; text-transform: uppercase; letter-spacing: 0.08em; font-size: 0.8rem; color: var(--muted); }
.meta { margin: 0 0 1rem; color: var(--muted); font-size: 0.9rem; }
.verdict { font-size: 1.05rem; margin: 0.8rem 0; }
.alert { border: 3px double var(--ink); padding: 0.4rem 0.9rem; margin: 0.8rem 0; background: var(--faint); }
.alert p { margin: 0.3rem 0; }
.caution-brief { border-left: 6px solid var(--ink); padding: 0.3rem 0.9rem; margin: 1rem 0; background: #f6f6f6; }
.caution-brief p { margin: 0.2rem 0; }
.cautions { border: 2px solid var(--ink); padding: 0.2rem 1rem; }
.cautions li { margin: 0.4rem 0; }
nav ol { columns: 2; margin: 0; padding-left: 1.6rem; }
nav { border: 1px solid var(--rule); padding: 0.6rem 1rem; margin: 1rem 0; }
a { color: inherit; }
code { font-family: ui-monospace, "SF Mono", Menlo, Consolas, "DejaVu Sans Mono", monospace; font-size: 0.9em; }
.scroll { overflow-x: auto; margin: 0.8rem 0 1rem; }
table { border-collapse: collapse; font-size: 0.9rem; font-variant-numeric: tabular-nums; }
caption { text-align: left; font-weight: 600; padding: 0 0 0.3rem; caption-side: top; }
th, td { padding: 0.25rem 0.6rem; border-bottom: 1px solid #ccc; vertical-align: top; text-align: left; }
thead th { border-bottom: 2px solid var(--ink); font-weight: 600; vertical-align: bottom; }
tbody th { font-weight: 600; }
.num { text-align: right; white-space: nowrap; }
.nw { white-space: nowrap; display: inline-block; }
.proc + .proc { margin-top: 0.3rem; }
td.model, th.model { white-space: nowrap; }
th.num { white-space: normal; }
table.compact { font-size: 0.82rem; }
table.compact td, table.compact th { padding: 0.1rem 0.6rem; }
tr.sum { background: var(--faint); }
tr.first th, tr.first td { border-top: 2px solid var(--ink); }
.desc { font-weight: normal; color: var(--muted); font-size: 0.85em; white-space: normal; }
.tag { display: inline-block; border: 1px solid var(--ink); border-radius: 2px; padding: 0 0.3rem; font-size: 0.75rem;
  line-height: 1.3; font-weight: 600; text-transform: uppercase; letter-spacing: 0.04em; background: #fff; }
.tag.bad { background: var(--ink); color: #fff; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: 0.2rem 1.2rem; margin: 0.6rem 0 1rem; }
dl.facts dt { font-weight: 600; }
dl.facts dd { margin: 0; overflow-wrap: anywhere; }
.note { color: var(--muted); font-size: 0.9rem; }
figure.plot { margin: 1rem 0; }
figure.plot svg { max-width: 100%; height: auto; display: block; }
figcaption { font-size: 0.85rem; color: var(--muted); margin-top: 0.3rem; }
@page { size: A4; margin: 14mm 12mm; }
@media print {
  html { font-size: 10pt; }
  body { max-width: none; padding: 0; }
  nav { display: none; }
  h2 { break-after: avoid; page-break-after: avoid; }
  figure, tr, .alert, .caution-brief, dl.facts { break-inside: avoid; page-break-inside: avoid; }
  thead { display: table-header-group; }
  .scroll { overflow: visible; }
  a { text-decoration: none; }
  #cautions { break-before: page; }
}
"""
