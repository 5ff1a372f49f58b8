"""The report's plots as inline SVG.

Matplotlib draws each figure with glyphs as paths (no font files), a fixed hash salt (the
same input gives the same bytes) and greys only (fills print the same in greyscale);
:func:`inline_svg` makes the SVG text fit to sit inside the HTML page.
"""

from __future__ import annotations

import io
import re

from ..model import MODEL_LABELS
from .html import esc


def svg_of(figure) -> str:
    """A matplotlib figure as SVG text, without date or creator (the same input, the same bytes)."""
    buffer = io.StringIO()
    figure.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    return buffer.getvalue()


def svg_context():
    """Matplotlib settings for the report's plots: fixed hash salt, glyphs as paths, greys."""
    import matplotlib
    from cycler import cycler

    # greys for every colour a plot does not set itself, so fills print the same in greyscale
    greys = cycler(color=["0.35", "0.0", "0.6", "0.15", "0.75"])
    return matplotlib.rc_context(
        {
            # fixed hash salt: identical reports for identical input; glyphs as paths: no fonts needed
            "svg.hashsalt": "allocator-report",
            "svg.fonttype": "path",
            "axes.prop_cycle": greys,
            # a '$' in a case title is text, not mathtext (which could also fail to parse)
            "text.parse_math": False,
        }
    )


_ID = re.compile(r'\bid="([^"]+)"')


def inline_svg(svg: str, prefix: str, label: str) -> str:
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
    svg = svg.replace("<svg ", f'<svg role="img" aria-label="{esc(label)}" ', 1)
    return svg.strip()


def frontier_svg(report) -> str:
    """Section 4: the cost frontier (:func:`allocator.plots.frontier_figure`) as SVG."""
    from .. import plots

    with svg_context():
        return svg_of(plots.frontier_figure(report.frontier))


def verification_svg(report) -> str:
    """Section 6: the Monte Carlo histogram (:func:`allocator.simulate.render_verification_plot`) as SVG."""
    from ..simulate import render_verification_plot

    with svg_context():
        return render_verification_plot(report.verification, "svg").decode("utf-8")


def contributions_svg(report) -> str:
    """Section 5: the shares of σ² per contributor (:func:`allocator.plots.contributions_figure`) as SVG."""
    from .. import plots

    allocated = report.recommended_analysis
    label = f"{MODEL_LABELS.get(report.recommended)} allocation"
    with svg_context():
        return svg_of(plots.contributions_figure(report.analysis, allocated, allocation_label=label))
