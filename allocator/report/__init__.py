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

Where to find what:

- ``build.py``: :class:`Report` and :func:`build_report` / :func:`write_report` — the
  library calls, the status and exit code; no HTML.
- ``outline.py``: :data:`SECTIONS` (id and heading of each numbered section) and how an
  unexpected error names the section it broke.
- ``sections.py``: one function per numbered section, in order, plus the page header and
  the assembled page; :data:`CAUTIONS`.
- ``html.py``: number formatting (:func:`fmt_number`, ...), escaping, tables, tags.
- ``figures.py``: the plots as inline SVG.
- ``style.css``: the stylesheet (screen, A4 print, greyscale), a package data file.
"""

from __future__ import annotations

from .build import Report, build_report, recommended_model, write_report
from .html import MODEL_LABELS, fmt_input, fmt_number, fmt_tolerance
from .outline import SECTIONS
from .sections import CAUTIONS, MODEL_EXPLANATIONS

__all__ = [
    "SECTIONS",
    "CAUTIONS",
    "MODEL_LABELS",
    "MODEL_EXPLANATIONS",
    "Report",
    "build_report",
    "write_report",
    "recommended_model",
    "fmt_number",
    "fmt_input",
    "fmt_tolerance",
]
