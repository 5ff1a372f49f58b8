"""`allocator report CASE -o FILE.html`: one self-contained HTML report."""

from __future__ import annotations

import sys

import click

from .common import CASE_ARGUMENT, FilePath, SampleCount, handle_errors, load_case_or_exit, model_option


@click.command()
@CASE_ARGUMENT
@click.option(
    "-o",
    "--output",
    "output",
    required=True,
    type=FilePath(),
    help="HTML file to write (never the case file itself).",
)
@model_option
@click.option(
    "--samples",
    type=SampleCount(),
    default=200_000,
    show_default=True,
    help="Monte Carlo assemblies for the verification section (1e3..1e9; 2e5 style accepted).",
)
@click.option(
    "--seed",
    type=click.IntRange(min=0),
    default=0,
    show_default=True,
    help="Random seed of the verification (the same seed gives the same report numbers).",
)
@click.option(
    "--frontier-points",
    type=click.IntRange(min=2, max=2000),
    default=None,
    help="Points on the cost frontier; default: the case's [frontier].points.",
)
@click.option(
    "--no-frontier",
    is_flag=True,
    help="Leave the cost frontier out (each of its points is a full allocation).",
)
@click.option(
    "--offer",
    "offer_texts",
    multiple=True,
    metavar="NAME=T@PRICE",
    help="A supplier offer to discuss (repeatable); default: the case's [[offer]] tables.",
)
@handle_errors
def report(case_file, output, models, samples, seed, frontier_points, no_frontier, offer_texts):
    """Write a self-contained HTML report on CASE for design reviews and supplier talks.

    Sections: case summary and assumptions, stack analysis of the current design,
    allocation per model side by side, cost frontier, contributions, Monte Carlo
    verification, shadow prices, supplier sheet (with the offers under discussion when
    the case or --offer names any), cautions, reproducibility. Plots are
    inline SVG; the file needs no network and prints on A4.

    Exit codes: 0 written and every allocation optimal (and its verification passes);
    1 written, but a model cannot meet a requirement (or the verification fails): the
    report says which, at the top; 2 bad input or usage: nothing written; 3 a section
    failed unexpectedly (a bug; the message names the section): nothing written.
    """
    from ..offers import parse_offer
    from ..report import write_report

    offers = [parse_offer(text) for text in offer_texts] or None
    case = load_case_or_exit(case_file)
    result = write_report(
        case,
        output,
        models or None,
        samples=samples,
        seed=seed,
        frontier_points=frontier_points,
        include_frontier=not no_frontier,
        progress=sys.stderr.isatty(),  # progress bars on a terminal only
        offers=offers,
    )
    line = f"wrote {output}: {result.status}"
    if result.recommended:
        line += f"; recommended allocation: {result.recommended}"
    click.echo(line)
    for problem in result.problems:
        click.echo(f"problem: {problem}", err=True)
    if result.exit_code:
        sys.exit(result.exit_code)
