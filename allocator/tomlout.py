"""Plain data as TOML text: the writing half that the standard library leaves out.

:mod:`tomllib` reads TOML; nothing in the standard library writes it. :func:`dumps` turns
a dict of str, int, float, bool, date/time, lists and dicts into TOML 1.0 text that
``tomllib.loads`` reads back to an equal dict (``nan`` excepted, which equals nothing).
It knows nothing about cases: :mod:`allocator.caseout` builds the dict of a case.

Layout: a table's plain values come first (``key = value``), then its sub-tables. At the
top level a dict becomes a ``[section]`` and a non-empty list of dicts an array of tables
(``[[contributor]]``, with ``[[contributor.process]]`` inside); deeper down a dict that
holds only plain values (no tables of tables) is written inline on one line,
``cost = { curve = "reciprocal", a = 0.8, b = 0.004 }``, as people write case files.
"""

from __future__ import annotations

import datetime as _dt
import math
import numbers
import re
from collections.abc import Mapping

__all__ = ["dumps"]

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+\Z")
_ESCAPES = {'"': '\\"', "\\": "\\\\", "\b": "\\b", "\t": "\\t", "\n": "\\n", "\f": "\\f", "\r": "\\r"}


def dumps(data: Mapping) -> str:
    """TOML text of ``data``.

    Parameters
    ----------
    data : mapping
        Keys are str; values are str, int, float, bool, ``datetime``/``date``/``time``,
        lists of values and mappings of the same (numpy integers and floats are
        written as the plain numbers they hold). There is no null in TOML: a None
        anywhere is refused.

    Returns
    -------
    str
        TOML 1.0 text, ending in a newline; ``tomllib.loads(dumps(d)) == d``.

    Raises
    ------
    TypeError
        A value TOML cannot hold (None, a set, an object), or a key that is not text;
        the message names the key path.

    Examples
    --------
    >>> print(dumps({"title": "Shim", "part": [{"name": "a", "cost": {"b": 0.5}}]}), end="")
    title = "Shim"
    <BLANKLINE>
    [[part]]
    name = "a"
    cost = { b = 0.5 }
    """
    if not isinstance(data, Mapping):
        raise TypeError(f"TOML needs a table (a mapping) at the top, not {type(data).__name__}")
    lines: list[str] = []
    _table(data, (), lines, top=True)
    while lines and not lines[0]:
        lines.pop(0)
    return "\n".join(lines) + "\n" if lines else ""


# --------------------------------------------------------------------------- pieces


def _key(key, path) -> str:
    if not isinstance(key, str):
        raise TypeError(f"{_where(path)}: TOML keys are text, not {type(key).__name__} {key!r}")
    return key if _BARE_KEY.match(key) else _string(key)


def _where(path) -> str:
    return ".".join(str(p) for p in path) or "top level"


def _string(text: str) -> str:
    out = []
    for ch in text:
        if ch in _ESCAPES:
            out.append(_ESCAPES[ch])
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _float(x: float) -> str:
    if math.isnan(x):
        return "nan"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    text = repr(float(x))  # the shortest text that reads back as the same double (numpy's repr is not)
    return text if any(ch in text for ch in ".eEn") else text + ".0"


def _is_table(value) -> bool:
    return isinstance(value, Mapping)


def _is_table_array(value) -> bool:
    return isinstance(value, (list, tuple)) and bool(value) and all(_is_table(v) for v in value)


def _value(value, path) -> str:
    """A value on one line (inline tables and arrays included)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, numbers.Integral):  # numpy's integers too
        return str(int(value))
    if isinstance(value, float):  # numpy's float64 too
        return _float(value)
    if isinstance(value, str):
        return _string(value)
    if isinstance(value, (_dt.datetime, _dt.date, _dt.time)):
        return value.isoformat()
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_value(v, (*path, i + 1)) for i, v in enumerate(value)) + "]"
    if _is_table(value):
        if not value:
            return "{}"
        return "{ " + ", ".join(f"{_key(k, path)} = {_value(v, (*path, k))}" for k, v in value.items()) + " }"
    what = "None (TOML has no null: leave the key out)" if value is None else type(value).__name__
    raise TypeError(f"{_where(path)}: TOML cannot hold {what}")


def _holds_tables(value) -> bool:
    """True for a dict with a table (or an array of tables) inside: not written inline."""
    return any(_is_table(v) or _is_table_array(v) for v in value.values())


def _table(data: Mapping, path: tuple, lines: list[str], *, top: bool) -> None:
    """The body of one table: plain values, then sub-tables and arrays of tables."""
    later = []
    for key, value in data.items():
        _key(key, path)  # a bad key fails here, in order
        if _is_table(value) and (top or _holds_tables(value)):
            later.append((key, value, False))
        elif _is_table_array(value):
            later.append((key, value, True))
        else:
            lines.append(f"{_key(key, path)} = {_value(value, (*path, key))}")
    for key, value, is_array in later:
        sub = (*path, key)
        header = ".".join(_key(k, path) for k in sub)
        items = value if is_array else [value]
        for item in items:
            lines.append("")
            lines.append(f"[[{header}]]" if is_array else f"[{header}]")
            _table(item, sub, lines, top=False)
