"""Pieces shared by the commands: error handling, output options, safe writing."""

from __future__ import annotations

import functools
import json
import math
import sys

import click

from ..errors import AllocatorError

CASE_ARGUMENT = click.argument("case_file", metavar="CASE", type=click.Path(dir_okay=False))


def json_option(f):
    return click.option("--json", "as_json", is_flag=True, help="Print one JSON document on stdout.")(f)


def csv_option(f):
    return click.option("--csv", "as_csv", is_flag=True, help="Print CSV on stdout.")(f)


def model_option(f):
    return click.option(
        "--model",
        "models",
        multiple=True,
        type=click.Choice(["worst-case", "rss", "mean-shift"]),
        help="Stack model (repeatable); default: the case's [allocation].models.",
    )(f)


def seed_option(f):
    return click.option("--seed", type=int, default=None, help="Random seed (reproducible runs).")(f)


def handle_errors(f):
    """Turn library errors into one line on stderr and the documented exit code.

    An operating-system error on a file the command reads or writes (disk full, no
    permission, a folder where a file was expected) is one line with exit code 2 too.
    Anything else is a bug and keeps its traceback, so that it can be reported.
    """

    @functools.wraps(f)
    def wrapper(*args, **kwargs):
        try:
            return f(*args, **kwargs)
        except AllocatorError as err:
            click.echo(f"error: {err}", err=True)
            sys.exit(err.exit_code)
        except click.exceptions.Exit:
            raise
        except click.ClickException:
            raise
        except KeyboardInterrupt:
            click.echo("interrupted", err=True)
            sys.exit(130)
        except OSError as err:
            # a file the command reads or writes (disk full, no permission, ...): one line
            # os.replace(tmp, target) names both: the target is the file the user named
            name = getattr(err, "filename2", None) or getattr(err, "filename", None)
            where = f"{name}: " if name else ""
            click.echo(f"error: {where}{(err.strerror or str(err)).lower()}", err=True)
            sys.exit(2)

    return wrapper


def load_case_or_exit(path):
    """Load a case file (the library raises CaseError on any problem)."""
    from ..case import load_case

    return load_case(path)


def _jsonable(value):
    """Replace non-finite floats by None so the output is strict JSON."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if hasattr(value, "item") and callable(value.item):  # numpy scalars
        return _jsonable(value.item())
    return value


def echo_json(document) -> None:
    click.echo(json.dumps(_jsonable(document), indent=2, allow_nan=False))


def text_table(rows, headers, *, floatfmt="g") -> str:
    """A plain-text table for the human output (no pandas import needed)."""
    from tabulate import tabulate

    return tabulate(rows, headers=headers, floatfmt=floatfmt, disable_numparse=True)


def fmt(value, digits: int = 4) -> str:
    """A number for the human tables: ``g`` format, '-' for None."""
    if value is None:
        return "-"
    if isinstance(value, float) and not math.isfinite(value):
        return "inf" if value > 0 else ("-inf" if value < 0 else "nan")
    return f"{value:.{digits}g}"


def shared_label(labels) -> str | None:
    """The one units label every row of a column shares, or None when they differ.

    A shared label goes in the column header (:func:`unit_header`); otherwise each value carries
    its own (:func:`labelled`).
    """
    distinct = set(labels)
    if len(distinct) > 1:
        return None
    return next(iter(distinct), "")


def unit_header(text: str, shared: str | None) -> str:
    """A column header with the column's shared units label: ``"± tol [mm]"``."""
    return f"{text} [{shared}]" if shared else text


def labelled(text: str, label: str, shared: str | None) -> str:
    """A value with its own units label when its column has no shared one: ``"0.05 mm"``."""
    return text if shared is not None or not label or text == "-" else f"{text} {label}"


def units_title(case) -> str:
    """The units labels a case uses, for the title line: ``"mm"`` or ``"mm, N"``."""
    return ", ".join(case.unit_labels)


def write_csv(frame) -> None:
    """Print a pandas DataFrame as CSV on stdout."""
    click.echo(frame.to_csv(), nl=False)
