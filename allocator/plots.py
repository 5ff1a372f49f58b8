"""Shared plotting helpers: a plain, greyscale-readable look for every figure we draw.

Series are told apart by dash pattern and marker, never by colour alone, so a figure
printed in black and white (or read by someone who does not see colour) loses nothing.
Figures are bare :class:`matplotlib.figure.Figure` objects rendered by the Agg (PNG) or
SVG canvas: no pyplot, no display, no global backend switch. matplotlib is imported only
when a figure is drawn.

- :func:`series_style` gives the style of a named series (the three stack models have
  fixed styles; anything else takes the next free one);
- :func:`new_figure`, :func:`finish_axes` give every figure the same frame;
- :func:`render` turns a figure into PNG or SVG bytes (SVG text stays text);
- :func:`save` writes them by the file's extension through a temporary file and an
  atomic rename, refusing to overwrite protected paths (the input case);
- :func:`frontier_figure`, :func:`economics_figure`, :func:`verification_figure` and
  :func:`contributions_figure` draw the results of :mod:`allocator.sweep`,
  :mod:`allocator.economics`, :mod:`allocator.simulate` and :mod:`allocator.analysis`
  (the report's figures, :mod:`allocator.report.figures`, are these drawn as inline SVG).
"""

from __future__ import annotations

import io
import math
from pathlib import Path

from .errors import UsageError
from .files import atomic_write
from .model import MODEL_LABELS

__all__ = [
    "FORMATS",
    "MODEL_LABELS",
    "series_style",
    "new_figure",
    "finish_axes",
    "log_axis",
    "render",
    "format_for",
    "save",
    "frontier_figure",
    "economics_figure",
    "verification_figure",
    "contributions_figure",
    "quotes_figure",
    "render_frontier_plot",
    "render_economics_plot",
    "plot_frontier",
    "plot_economics",
]

FORMATS = {".png": "png", ".svg": "svg"}


# Greys from black to mid grey; every one stays visible on white when printed.
_INK = ("0.0", "0.35", "0.55", "0.2", "0.45")
_DASHES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1, 1, 1)))
_MARKERS = ("o", "s", "^", "D", "v")
_FIXED = {"worst-case": 0, "rss": 1, "mean-shift": 2, "convolution": 3}

SHADE = {"facecolor": "0.93", "edgecolor": "0.6", "hatch": "///", "linewidth": 0.0}
SHADE_PARTIAL = {"facecolor": "white", "edgecolor": "0.75", "hatch": "..", "linewidth": 0.0}


def series_style(key, *, used=None) -> dict:
    """Line style of a series: ``color``, ``linestyle``, ``marker`` (greyscale-safe).

    Parameters
    ----------
    key : str or int
        A stack model name (fixed style), or an index into the style cycle.
    used : set of int, optional
        Styles already taken in this figure; an unnamed series takes the next free one.

    Returns
    -------
    dict
        Keyword arguments for :meth:`matplotlib.axes.Axes.plot`.
    """
    if isinstance(key, str) and key in _FIXED:
        i = _FIXED[key]
    elif isinstance(key, int):
        i = key % len(_DASHES)
    else:
        taken = used or set()
        i = next((j for j in range(len(_DASHES)) if j not in taken), 0)
    return {
        "color": _INK[i],
        "linestyle": _DASHES[i],
        "marker": _MARKERS[i],
        "markersize": 4.5,
        "markerfacecolor": "white" if i % 2 else _INK[i],
        "markeredgecolor": _INK[i],
        "linewidth": 1.4,
    }


def new_figure(width: float = 7.0, height: float = 4.2):
    """A bare constrained-layout Figure (no pyplot state)."""
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), layout="constrained")


def finish_axes(ax, *, legend: bool = True) -> None:
    """Light grid, no top/right frame, a framed legend that stays out of the way."""
    ax.grid(True, color="0.88", linewidth=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    if legend and ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize="small", frameon=True, framealpha=0.95, edgecolor="0.7")


def format_for(path) -> str:
    """``'png'`` or ``'svg'`` from a file name; UsageError for anything else."""
    suffix = Path(path).suffix.lower()
    if suffix not in FORMATS:
        raise UsageError(f"{path}: plot file must end in .png or .svg (got {suffix or 'no extension'!r})")
    return FORMATS[suffix]


def render(figure, fmt: str = "png") -> bytes:
    """PNG or SVG bytes of ``figure``.

    SVG keeps text as ``<text>`` elements (searchable, selectable); no dates or
    version stamps are written, so the same figure gives the same bytes.
    """
    import matplotlib

    if fmt not in ("png", "svg"):
        raise UsageError(f"unknown plot format {fmt!r} (png or svg)")
    buffer = io.BytesIO()
    metadata = {"Software": None} if fmt == "png" else {"Date": None, "Creator": None}
    with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": "allocator"}):
        figure.savefig(buffer, format=fmt, dpi=150, metadata=metadata)
    return buffer.getvalue()


def save(figure, path, *, protect=()) -> Path:
    """Render ``figure`` in the format the extension of ``path`` names and write it atomically."""
    fmt = format_for(path)
    return atomic_write(path, render(figure, fmt), protect=protect)


# --------------------------------------------------------------------------- labels


def _money(currency: str) -> str:
    return f" [{currency}]" if currency else ""


def _value_label(vary: str, requirement: str, units: str) -> str:
    if vary == "fallout_ppm":
        return f"fallout target of {requirement} [ppm]"
    return f"{vary} limit of {requirement} [{units}]"


def log_axis(ax) -> None:
    """A log x axis labelled in plain numbers (0.01, 1, 1,000, 100,000), not powers of ten.

    Plain labels read better for ppm and need no mathtext (which is slow to start).
    """
    from matplotlib import ticker

    ax.set_xscale("log")
    ax.xaxis.set_major_locator(ticker.LogLocator(base=10.0))
    ax.xaxis.set_major_formatter(ticker.FuncFormatter(lambda x, _: _plain(x)))
    ax.xaxis.set_minor_formatter(ticker.NullFormatter())


def _plain(x: float) -> str:
    if x >= 1:
        return f"{x:,.0f}"
    if x < 1e-6:
        return f"{x:g}"
    return f"{x:.10f}".rstrip("0")


def _runs(mask):
    """Index ranges ``[(i, j), ...]`` of consecutive True values."""
    out, start = [], None
    for i, flag in enumerate(mask):
        if flag and start is None:
            start = i
        elif not flag and start is not None:
            out.append((start, i - 1))
            start = None
    if start is not None:
        out.append((start, len(mask) - 1))
    return out


def _edges(values, i: int, j: int, log: bool):
    """The x-span covering points i..j, reaching halfway to their neighbours."""
    def mid(a, b):
        return math.sqrt(a * b) if log else 0.5 * (a + b)

    left = values[i] if i == 0 else mid(values[i - 1], values[i])
    right = values[j] if j == len(values) - 1 else mid(values[j], values[j + 1])
    if left == right:  # a single isolated point: give it a visible width
        pad = (values[-1] - values[0]) / (4 * max(len(values) - 1, 1)) if not log else 0.0
        left, right = (left / 1.15, right * 1.15) if log else (left - pad, right + pad)
    return left, right


# --------------------------------------------------------------------------- frontier


def frontier_figure(frontier):
    """Least cost against the swept limit (or fallout target), one line per model.

    Parameters
    ----------
    frontier : allocator.sweep.Frontier

    Returns
    -------
    matplotlib.figure.Figure
        Lines per model (distinct dash and marker); the current design as a labelled
        star; values where no model (hatched) or only some models (dotted) can be met
        shaded. A fallout sweep has a log x axis; a lower-limit sweep has its x axis
        reversed so that the requirement loosens to the right in every frontier plot.
    """
    import numpy as np

    fig = new_figure()
    ax = fig.subplots()
    values = np.asarray(frontier.values, dtype=float)
    log = frontier.vary == "fallout_ppm"
    infeasible = {m: np.array([s != "optimal" for s in frontier.statuses[m]]) for m in frontier.models}
    for model in frontier.models:
        cost = np.array([np.nan if c is None else c for c in frontier.costs[model]], dtype=float)
        label = MODEL_LABELS.get(model, model)
        if model in frontier.flat_models:
            label += " (does not use the target: flat)"
        ax.plot(values, cost, label=label, markevery=_mark_every(len(values)), **series_style(model))

    if len(values):
        every = np.all(np.vstack(list(infeasible.values())), axis=0)
        some = np.any(np.vstack(list(infeasible.values())), axis=0) & ~every
        for mask, shade, label in (
            (every, SHADE, "no model can meet it"),
            (some, SHADE_PARTIAL, "only some models can meet it"),
        ):
            for k, (i, j) in enumerate(_runs(mask)):
                left, right = _edges(values, i, j, log)
                ax.axvspan(left, right, label=label if k == 0 else None, zorder=0, **shade)

    current = frontier.current
    if current and current.get("value") is not None and current.get("total_cost") is not None:
        x, y = current["value"], current["total_cost"]
        ax.plot([x], [y], linestyle="none", marker="*", markersize=12, color="black",
                markerfacecolor="white", markeredgewidth=1.2, label="current design", zorder=5)
        ax.annotate(f"current design\n{y:.4g}{(' ' + frontier.currency) if frontier.currency else ''}",
                    (x, y), xytext=(8, 8), textcoords="offset points", fontsize="small")

    if log:
        log_axis(ax)
    if frontier.vary == "lower":
        ax.invert_xaxis()
    x_label = _value_label(frontier.vary, frontier.requirement, frontier.units)
    if frontier.vary == "lower":
        x_label += "  (looser to the right)"
    ax.set_xlabel(x_label, parse_math=False)  # the units label is text from the case, never mathtext
    ax.set_ylabel(f"least cost per assembly{_money(frontier.currency)}")
    what = "fallout target" if log else f"{frontier.vary} limit"
    ax.set_title(f"{frontier.title}\ncost against the {what} of {frontier.requirement}", fontsize="medium")
    finish_axes(ax)
    return fig


def _mark_every(n: int) -> int:
    # markers on every point up to ~25 points, then thinned so the dashes stay readable
    return max(1, math.ceil(n / 25))


# --------------------------------------------------------------------------- economics


def economics_figure(economics):
    """Manufacturing, scrap and total cost per assembly against the fallout target.

    Parameters
    ----------
    economics : allocator.economics.FalloutEconomics

    Returns
    -------
    matplotlib.figure.Figure
        Log x axis [ppm]. Per statistical model (told apart by marker): manufacturing
        cost dashed, total solid; the scrap cost dotted; each optimum a star named in the
        legend; the requirement's current target a thin vertical line.
    """
    import numpy as np

    from .economics import scrap_cost_per_assembly

    fig = new_figure()
    ax = fig.subplots()
    money = economics.currency
    for k, result in enumerate(economics.results):
        if result.curve_ppm is None or not len(result.curve_ppm):
            continue
        ppm = np.asarray(result.curve_ppm, dtype=float)
        manufacturing = np.asarray(result.curve_manufacturing, dtype=float)
        scrap = scrap_cost_per_assembly(ppm, economics.scrap_cost)
        style = series_style(result.model)
        marker, ink = style["marker"], style["color"]
        name = MODEL_LABELS.get(result.model, result.model)
        every = _mark_every(len(ppm))
        common = dict(color=ink, marker=marker, markersize=4, markevery=every,
                      markerfacecolor="white", markeredgecolor=ink)
        ax.plot(ppm, manufacturing + scrap, linestyle="-", linewidth=1.6, label=f"{name}: total", **common)
        ax.plot(ppm, manufacturing, linestyle="--", linewidth=1.2, label=f"{name}: manufacturing", **common)
        if k == 0:  # scrap cost depends on the target only: the same line for every model
            ax.plot(ppm, scrap, linestyle=":", linewidth=1.4, color="0.3", label="scrap")
        if result.optimal_ppm is not None:
            ax.plot([result.optimal_ppm], [result.total_cost], linestyle="none", marker="*",
                    markersize=13, color="black", markerfacecolor="white" if k % 2 else ink, zorder=5,
                    label=f"{name} optimum: {result.optimal_ppm:.4g} ppm, {result.total_cost:.4g}"
                    + (f" {money}" if money else ""))
    if economics.current_ppm is not None:
        ax.axvline(economics.current_ppm, color="0.5", linewidth=0.8, linestyle=(0, (2, 2)),
                   label=f"current target {economics.current_ppm:g} ppm")
    log_axis(ax)
    ax.set_xlabel(f"fallout target of {economics.requirement} [ppm]")
    ax.set_ylabel(f"cost per assembly{_money(money)}")
    ax.set_title(
        f"{economics.title}\nmanufacturing + scrap ({economics.scrap_cost:g}{(' ' + money) if money else ''}"
        " per assembly outside the limits)",
        fontsize="medium",
    )
    finish_axes(ax)
    return fig


def verification_figure(verification):
    """Response histograms of a verification (:func:`allocator.simulate.verify` or
    :func:`allocator.importance.verify_importance`).

    Parameters
    ----------
    verification : allocator.simulate.Verification or allocator.importance.ImportanceVerification

    Returns
    -------
    matplotlib.figure.Figure
        One panel per requirement: the simulated density (grey), the limits (dashed),
        the RSS normal approximation at the shifted mean (solid) and, for linear chains,
        the exact density by convolution (dotted) [density against the response in the
        requirement's units]. An importance-sampling panel shows the weighted density on
        a log scale, so that the tails it aimed at can be seen.
    """
    # a bare Figure renders through the Agg/SVG canvases without touching pyplot's backend
    import numpy as np
    from matplotlib.figure import Figure
    from scipy import stats

    checks = verification.requirements
    fig = Figure(figsize=(7.0, 3.2 * len(checks)), layout="constrained")
    axes = fig.subplots(len(checks), 1, squeeze=False)[:, 0]
    for ax, c in zip(axes, checks):
        edges = c.histogram_edges
        width = edges[1] - edges[0]
        weighted = getattr(c, "method", "monte-carlo") == "importance"
        if weighted:
            density = c.histogram_density
            label = f"importance sampling, weighted ({c.samples:,} assemblies)"
        else:
            density = c.histogram_counts / (c.samples * width)
            label = f"Monte Carlo ({c.samples:,} assemblies)"
        ax.stairs(density, edges, fill=True, color="0.75", label=label)
        exact = getattr(c, "exact_density", None)
        if exact is not None:
            ax.stairs(exact, edges, color="black", linestyle=":", linewidth=1.4, label="exact (convolution)")
        lo_x, hi_x = edges[0], edges[-1]
        for limit, label in ((c.lower, "limits"), (c.upper, "limits" if c.lower is None else "_nolegend_")):
            if limit is not None:
                ax.axvline(limit, color="black", linestyle="--", linewidth=1.2, label=label)
                lo_x, hi_x = min(lo_x, limit), max(hi_x, limit)
        if c.sigma > 0:
            xs = np.linspace(lo_x, hi_x, 600)
            label = "RSS normal" + (" at the worst mean shift" if c.shift_side else "")
            ax.plot(xs, stats.norm.pdf(xs, c.shifted_mean, c.sigma), color="black", linewidth=1.2, label=label)
        if weighted:
            positive = density[density > 0]
            ax.set_yscale("log")
            if positive.size:
                ax.set_ylim(positive.min() / 10.0, positive.max() * 10.0)
        pad = 0.03 * (hi_x - lo_x)
        ax.set_xlim(lo_x - pad, hi_x + pad)
        ax.set_title(f"{c.name}: {c.fallout_ppm:.4g} ppm outside (target {c.target_ppm:g} ppm)")
        # a units label is text from the case: never mathtext
        ax.set_xlabel(f"{c.name} [{c.units}]" if c.units else f"{c.name} (response)", parse_math=False)
        ax.set_ylabel("density")
        ax.legend(fontsize="small", loc="upper right")
    return fig


def contributions_figure(analysis, allocated_analysis=None, *, allocation_label: str = "allocation"):
    """Horizontal bars: each contributor's share of the response variance σ², per requirement.

    Parameters
    ----------
    analysis : allocator.analysis.Analysis
        The current design: solid dark bars.
    allocated_analysis : allocator.analysis.Analysis, optional
        The same case at allocated tolerances: white hatched bars beside the current ones,
        told apart by fill pattern and legend, not by colour.
    allocation_label : str
        Legend text of the hatched bars.

    Returns
    -------
    matplotlib.figure.Figure
        One panel per requirement [share of σ² in %].
    """
    import numpy as np
    from matplotlib.figure import Figure

    current = analysis.requirements
    allocated = allocated_analysis.requirements if allocated_analysis is not None else None
    n_rows = [max(len(r.contributions), 1) for r in current]
    height = sum(0.26 * n * (2 if allocated else 1) + 1.0 for n in n_rows)
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
                    linewidth=0.6, label=allocation_label)
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
    return fig


# --------------------------------------------------------------------------- quotes


def quotes_figure(fits):
    """Quotes and fitted cost curves, one panel per contributor, one series per supplier.

    Parameters
    ----------
    fits : allocator.quotes.CostFits

    Returns
    -------
    matplotlib.figure.Figure
        Log tolerance axis [length]; quotes as markers, the fitted curve solid over the
        quoted range and dotted a little beyond it (where it would be extrapolated);
        suppliers told apart by marker and dash, never by colour alone.
    """
    import numpy as np
    from matplotlib.figure import Figure

    from .costs import cost_value

    names = list(dict.fromkeys(f.contributor for f in fits.fits))
    case = fits.case
    currency = case.currency if case is not None else ""
    fig = Figure(figsize=(7.0, max(2.8, 2.8 * len(names))), layout="constrained")
    axes = fig.subplots(len(names), 1, squeeze=False)[:, 0]
    for ax, name in zip(axes, names):
        groups = [f for f in fits.fits if f.contributor == name]
        for i, g in enumerate(groups):
            style = series_style(i)
            lo, hi = g.quoted_range
            who = f"{g.supplier}: " if g.supplier else ""
            inside = np.geomspace(lo, hi, 120)
            ax.plot(inside, cost_value(g.cost_curve, inside), color=style["color"],
                    linestyle=style["linestyle"], linewidth=1.4, label=f"{who}{g.curve} fit")
            for a, b in ((lo / 1.3, lo), (hi, hi * 1.3)):
                beyond = np.geomspace(a, b, 30)
                ax.plot(beyond, cost_value(g.cost_curve, beyond), color=style["color"],
                        linestyle=":", linewidth=1.0)
            ax.plot(g.tolerances, g.costs, linestyle="none", marker=style["marker"], markersize=6,
                    color=style["color"], markerfacecolor=style["markerfacecolor"],
                    markeredgecolor=style["markeredgecolor"], label=f"{who}quotes")
        log_axis(ax)
        units = case.contributor_units(name) if case is not None else ""
        ax.set_title(name, loc="left", fontsize="medium")
        # units labels are text from the case: never mathtext
        ax.set_xlabel(f"± tolerance [{units}]" if units else "± tolerance", parse_math=False)
        ax.set_ylabel(f"unit cost{_money(currency)}", parse_math=False)
        finish_axes(ax)
    return fig


# --------------------------------------------------------------------------- shortcuts


def render_frontier_plot(frontier, fmt: str = "png") -> bytes:
    """:func:`frontier_figure` as PNG or SVG bytes."""
    return render(frontier_figure(frontier), fmt)


def render_economics_plot(economics, fmt: str = "png") -> bytes:
    """:func:`economics_figure` as PNG or SVG bytes."""
    return render(economics_figure(economics), fmt)


def plot_frontier(frontier, path, *, protect=()) -> Path:
    """Write the frontier plot to ``path`` (.png or .svg), atomically."""
    fmt = format_for(path)
    return atomic_write(path, render_frontier_plot(frontier, fmt), protect=protect)


def plot_economics(economics, path, *, protect=()) -> Path:
    """Write the economics plot to ``path`` (.png or .svg), atomically."""
    fmt = format_for(path)
    return atomic_write(path, render_economics_plot(economics, fmt), protect=protect)
