"""Pieces shared by the commands: error handling, output options, safe writing."""

from __future__ import annotations

import functools
import json
import math
import os
import sys
from pathlib import Path

import click

from ..errors import AllocatorError
from ..model import MODELS

MIN_SAMPLES = 1_000
MAX_SAMPLES = 1_000_000_000
# a shell reports a command stopped by SIGPIPE as 128 + 13; the same code when the
# reader of our output (`| head`) goes away first
EXIT_BROKEN_PIPE = 141


class OneLineUsageError(click.UsageError):
    """A usage problem click finds while parsing, shown as one line (``error: ...``), exit 2.

    Click's own form is three lines (usage, a hint, ``Error: ...``); the commands' errors are
    one line, ``error: <file>: <field>: <problem>``, and so are these.
    """

    exit_code = 2

    def show(self, file=None) -> None:
        echo_error(self.format_message())


def _option_name(param) -> str | None:
    """``--output`` for an option (its longest name), None for an argument."""
    if param is not None and param.param_type_name == "option":
        return max(param.opts, key=len)
    return None


class FilePath(click.ParamType):
    """A path that must name a file, not a folder; the text is passed on as given.

    A folder is refused in one line, ``error: <path>: <option>: is a folder, not a file``
    (the case argument: ``error: <path>: is a folder, not a case file``, as the library
    says it), exit code 2. Whether the file exists is left to the command (a missing case
    is reported by the case reader, a missing output is written).
    """

    name = "file"

    def __init__(self, what: str = "a file"):
        self.what = what

    def convert(self, value, param, ctx):
        text = os.fspath(value)
        if Path(text).is_dir():
            where = ": ".join(x for x in (text, _option_name(param)) if x)
            raise OneLineUsageError(f"{where}: is a folder, not {self.what}", ctx)
        return text


class SampleCount(click.ParamType):
    """A whole number of assemblies; accepts ``200000``, ``2e5`` and ``200_000``.

    ``2.5``, ``-1`` and values outside ``MIN_SAMPLES..MAX_SAMPLES`` are refused in one
    line, ``error: --samples: <problem>``, exit code 2.
    """

    name = "N"

    def fail(self, message, param=None, ctx=None):
        where = _option_name(param) or "N"
        raise OneLineUsageError(f"{where}: {message}", ctx)

    def convert(self, value, param, ctx):
        if isinstance(value, int) and not isinstance(value, bool):
            number = value
        else:
            text = str(value).strip().replace("_", "")
            try:
                as_float = float(text)
            except ValueError:
                self.fail(f"{value!r} is not a number", param, ctx)
            if not math.isfinite(as_float) or as_float != int(as_float):
                self.fail(f"{value!r} is not a whole number", param, ctx)
            number = int(as_float)
        if not MIN_SAMPLES <= number <= MAX_SAMPLES:
            self.fail(f"{number} is outside {MIN_SAMPLES:,} .. {MAX_SAMPLES:,}", param, ctx)
        return number


CASE_ARGUMENT = click.argument("case_file", metavar="CASE", type=FilePath("a case file"))


def exit_quietly_on_broken_pipe() -> None:
    """The reader of stdout went away (``allocator ... | head -1``): stop without a word.

    As the Python documentation recommends (``signal`` module, note on SIGPIPE): point
    stdout at the null device, so that flushing it at exit cannot fail again, and exit.
    """
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):  # stdout without a file descriptor
        pass
    sys.exit(EXIT_BROKEN_PIPE)


def echo_error(message) -> None:
    """``error: <message>`` on stderr: one line (inner line breaks folded), ending in a newline."""
    click.echo("error: " + " ".join(str(message).split()), err=True)


def exit_failed(summary: str) -> None:
    """Exit code 1 (a requirement cannot be met, no verified optimum, a verification fails).

    The reason is printed once, in the command's output (table or JSON); stderr gets only
    this short line.
    """
    echo_error(summary)
    sys.exit(1)


def json_option(f):
    return click.option("--json", "as_json", is_flag=True, help="Print one JSON document on stdout.")(f)


def csv_option(f):
    return click.option("--csv", "as_csv", is_flag=True, help="Print CSV on stdout.")(f)


def model_option(f):
    return click.option(
        "--model",
        "models",
        multiple=True,
        type=click.Choice(list(MODELS)),
        help="Stack model (repeatable); default: the case's [allocation].models.",
    )(f)


def xlsx_option(f):
    return click.option(
        "--xlsx", "xlsx", type=FilePath(), default=None, metavar="FILE.xlsx",
        help='Also write the tables as sheets of one .xlsx workbook (needs pip install "allocator[sheets]").',
    )(f)


def check_xlsx(path, *protect) -> None:
    """A bad --xlsx path (or openpyxl missing) is a usage error, found before any work."""
    if path is not None:
        from ..sheets import check_workbook_path

        check_workbook_path(path, protect=protect)


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
            echo_error(err)
            sys.exit(err.exit_code)
        except BrokenPipeError:
            exit_quietly_on_broken_pipe()
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
            echo_error(f"{where}{(err.strerror or str(err)).lower()}")
            sys.exit(2)

    return wrapper


def load_case_or_exit(path):
    """Load a case file, or a case workbook (.xlsx, docs/spreadsheets.md); the library
    raises CaseError on any problem."""
    if Path(path).suffix.lower() == ".xlsx":
        from ..workbook import load_workbook_case

        return load_workbook_case(path)
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


def write_csv(frame, index_label=None) -> None:
    """Print a pandas DataFrame as CSV on stdout (``index_label``: the index's column
    name(s) in the CSV, when they differ from the frame's index names)."""
    click.echo(frame.to_csv(index_label=index_label), nl=False)
