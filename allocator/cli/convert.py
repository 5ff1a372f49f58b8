"""`allocator convert IN OUT`: a case as TOML <-> an .xlsx workbook."""

from __future__ import annotations

import click

from .common import FilePath, handle_errors


@click.command()
@click.argument("source", metavar="IN", type=FilePath("a case file"))
@click.argument("target", metavar="OUT", type=FilePath())
@handle_errors
def convert(source, target):
    """Convert the case IN between a TOML case file and an .xlsx workbook.

    The kind of each file comes from its extension (.toml or .xlsx). The workbook has
    the sheets settings, contributors, processes, tables and requirements (see
    docs/spreadsheets.md); it is checked by the same loader as a case file, and its
    errors name the sheet, row and column. IN is read and checked whole before OUT is
    written; OUT is never IN. Workbooks need openpyxl: pip install "allocator[sheets]".

    Exit codes: 0 written, 2 bad input or usage (nothing written).
    """
    from ..workbook import convert_case

    case = convert_case(source, target)
    counts = [(len(case.contributors), "contributor"), (len(case.requirements), "requirement")]
    click.echo(f"wrote {target}: " + ", ".join(f"{n} {noun}{'' if n == 1 else 's'}" for n, noun in counts))
