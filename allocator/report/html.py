"""Small HTML pieces the report's sections are written with.

Number formatting (:func:`fmt_number` and its short forms), escaping, unit labels,
tables, definition lists and state tags. Every piece returns HTML text; every text from
the case goes through :func:`esc` on its way in, so a title ``<script>`` shows as those
characters.

The pieces are plain f-strings rather than templates: a table's rows, a unit shown in the
header or after each value, a tag only when a state needs one are decisions in Python
either way, and :class:`string.Template` has no loops or conditions, so templates would
split each section over two files without removing code. A template engine with
automatic escaping would be a new dependency for one HTML page; here escaping is explicit
at every insertion point (:func:`esc`, or a formatter that calls it).
"""

from __future__ import annotations

import html
import math
from dataclasses import dataclass

from ..model import MODEL_LABELS
from ..ppm import format_ppm


# --------------------------------------------------------------------------- numbers as text


def fmt_number(value: float | None, digits: int = 4, *, signed: bool = False, strip: bool = False) -> str:
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


def fmt_input(value: float | str | None) -> str:
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


def fmt_tolerance(value: float | None) -> str:
    """A ± tolerance: 4 significant digits without trailing zeros (as on a drawing).

    Examples
    --------
    >>> fmt_tolerance(0.041), fmt_tolerance(0.0411666), fmt_tolerance(50.0)
    ('0.041', '0.04117', '50')
    """
    return fmt_number(value, strip=True)


# --------------------------------------------------------------------------- HTML text


def esc(text) -> str:
    """Escape text from the case (or anything else) for HTML."""
    return html.escape("" if text is None else str(text), quote=True)


def num(value, digits: int = 4, *, signed: bool = False) -> str:
    """A computed number (:func:`fmt_number`), escaped."""
    return esc(fmt_number(value, digits, signed=signed))


def resp(value) -> str:
    """A response value (nominal, worst-case end, mean): 6 significant digits, no padding."""
    return esc(fmt_number(value, 6, strip=True))


def given(value) -> str:
    """A value as the case file states it (:func:`fmt_input`), escaped."""
    return esc(fmt_input(value))


def tol(value) -> str:
    """A ± tolerance as on a drawing (:func:`fmt_tolerance`), escaped."""
    return esc(fmt_tolerance(value))


def ppm(value) -> str:
    """A fallout in a column headed [ppm]: plain decimals, ppb for tiny values."""
    return esc(format_ppm(value, unit=False, missing="—"))


def saving(value, digits: int = 4, *, percent: bool = False) -> str:
    """A saving against the current design; a dearer result reads ``costs 5.096 more``."""
    if value is not None and float(value) < 0:
        return esc(f"costs {fmt_number(-float(value), digits)}{' %' if percent else ''} more")
    return num(value, digits, signed=True)


def model_name(name: str) -> str:
    """A stack model's label (:data:`MODEL_LABELS`) that never splits over two lines."""
    return esc(MODEL_LABELS.get(name, name)).replace(" ", "&nbsp;")


def unit_suffix(text: str) -> str:
    """`` [mm]`` after a column heading; nothing without a label."""
    return f" [{esc(text)}]" if text else ""


class Units:
    """Units of one table column (or row): in its header when every entry shares one
    label, otherwise after each value (a requirement in N beside lengths in mm)."""

    def __init__(self, labels):
        distinct = set(labels)
        self.shared = next(iter(distinct), "") if len(distinct) <= 1 else None

    def head(self, text: str) -> str:
        """``text`` with the shared label: ``"Current ± [mm]"`` (HTML)."""
        return text + unit_suffix(self.shared) if self.shared is not None else text

    def cell(self, value: str, label: str) -> str:
        """A value (HTML) followed by its own label when the column has no shared one."""
        if self.shared is not None or not label or value == "—":
            return value
        return f"{value}&nbsp;{esc(label)}"


# --------------------------------------------------------------------------- HTML blocks


@dataclass
class Row:
    """A table row with a CSS class (e.g. the totals under the allocation table)."""

    cells: list
    cls: str


def table(headers, rows, *, caption: str | None = None, numeric=None, cls: str = "") -> str:
    """An HTML table; ``numeric[i]`` right-aligns column i; the first column is a row header.

    ``headers`` and cells are HTML (already escaped); a :class:`Row` carries a CSS class.

    Examples
    --------
    >>> table(["Part", "± [mm]"], [["pin", "0.02"]], numeric=[False, True])
    '<div class="scroll"><table><thead><tr><th scope="col">Part</th><th scope="col" class=num>± [mm]</th></tr></thead><tbody><tr><th scope="row">pin</th><td class=num>0.02</td></tr></tbody></table></div>'
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
        if isinstance(row, Row):
            row, row_class = row.cells, f' class="{row.cls}"'
        cells = []
        for i, cell in enumerate(row):
            tag = "th scope=\"row\"" if i == 0 else "td"
            end = "th" if i == 0 else "td"
            cells.append(f"<{tag}{' class=num' if numeric[i] else ''}>{cell}</{end}>")
        out.append(f"<tr{row_class}>" + "".join(cells) + "</tr>")
    out.append("</tbody></table></div>")
    return "".join(out)


def facts_list(items) -> str:
    """A definition list of ``(term, value)`` pairs, both HTML: the report's fact sheets."""
    return "<dl class=\"facts\">" + "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in items) + "</dl>"


def flag(text: str, kind: str = "") -> str:
    """A state written as a word in a bordered tag (greyscale-safe).

    Examples
    --------
    >>> flag("NO", "bad")
    '<span class="tag bad">NO</span>'
    """
    return f'<span class="tag{(" " + kind) if kind else ""}">{esc(text)}</span>'
