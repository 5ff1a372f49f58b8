"""How results show in a notebook: a heading line and their ``to_frame()`` as an HTML table.

Jupyter calls ``_repr_html_`` on the last value of a cell; each main result delegates
to :func:`result_html`, so an analysis, allocation or verification renders as a table
without a call to ``to_frame()``. pandas is imported only then.
"""

from __future__ import annotations

import html
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # pandas is imported by the caller
    import pandas as pd


def result_html(heading: str, frame: pd.DataFrame, message: str = "") -> str:
    """``<p>heading</p>`` (with the message, escaped) followed by ``frame.to_html()``.

    Examples
    --------
    >>> import pandas as pd
    >>> text = result_html("Allocation rss: optimal", pd.DataFrame({"t": [0.1]}, index=["a"]))
    >>> text.startswith("<p><strong>Allocation rss: optimal</strong></p>") and "<table" in text
    True
    """
    head = f"<p><strong>{html.escape(heading)}</strong>"
    if message:
        head += f"<br>{html.escape(message)}"
    return head + "</p>" + frame.to_html()
