"""``allocator fit-costs QUOTES.csv``: cost curves fitted to supplier quotes."""

from __future__ import annotations

import math

import click

from ..quotes import FITTED_CURVES  # numpy and the cost registry; scipy only when fitting
from .common import FilePath, echo_json, exit_failed, fmt, handle_errors, json_option, text_table


@click.command("fit-costs")
@click.argument("quotes_file", metavar="QUOTES.csv", type=FilePath("a CSV file"))
@click.option("--curve", type=click.Choice(FITTED_CURVES),
              help="Fit this family for every group; default: chosen per group (AICc).")
@json_option
@click.option("--plot", "plot_file", type=FilePath(), metavar="FILE",
              help="Plot quotes and fitted curves to FILE (.png or .svg).")
@click.option("--write", "write", nargs=2, type=(FilePath("a case file"), FilePath()),
              metavar="CASE OUT.toml", default=None,
              help="Write a copy of CASE with the fitted curves to OUT.toml (never over an input).")
@handle_errors
def fit_costs(quotes_file, curve, as_json, plot_file, write):
    """Fit cost curves to the quotes in QUOTES.csv (header contributor,supplier,tolerance,cost).

    One curve per contributor and supplier, by least squares on relative residuals;
    the family is chosen by AICc (ties go to fewer parameters) unless --curve forces one.
    Warnings (too few quotes, a quote far off the fit, a curve used far outside its
    quotes) do not stop the command.
    """
    from ..case import load_case
    from ..caseout import write_case
    from ..files import check_output_path
    from ..plots import format_for
    from ..quotes import fit_costs as run

    case_file, out_file = write if write else (None, None)
    inputs = [quotes_file, case_file]
    if plot_file:
        format_for(plot_file)
        check_output_path(plot_file, protect=inputs)
    if out_file:
        check_output_path(out_file, protect=[*inputs, plot_file], input_name="input file")
    case = load_case(case_file) if case_file else None
    fits = run(quotes_file, curve=curve, case=case)
    written = None
    if fits.success and out_file:
        written = write_case(
            fits.apply(), out_file, protect=[*inputs, plot_file],
            comment=(f"Written by allocator fit-costs: {case_file} with cost curves fitted to "
                     f"{quotes_file}.\nThe comments of {case_file} are not carried over."),
        )
    if fits.success and plot_file:
        from ..plots import quotes_figure, save

        save(quotes_figure(fits), plot_file, protect=[*inputs, out_file])
    if as_json:
        echo_json({**fits.to_dict(), "written": str(written) if written else None})
    else:
        _table(fits)
        if written:
            click.echo(f"wrote {written}")
        if plot_file and fits.success:
            click.echo(f"wrote {plot_file}")
    if not fits.success:
        exit_failed(fits.message)


def _table(fits) -> None:
    rows = []
    for f in fits.fits:
        params = ", ".join(f"{k} = {fmt(v)}" for k, v in f.params.items())
        criteria = "  ".join(
            f"{fam.curve} {fmt(fam.criterion, 4) if math.isfinite(fam.criterion) else '-'}" for fam in f.families
        ) if len(f.families) > 1 else "(forced)"
        rows.append([f.contributor, f.supplier or "-", f.curve, params,
                     f"{100 * f.rms_relative:.2g}", f"{100 * f.max_relative:.2g}", f.points, criteria])
    click.echo(text_table(rows, ["contributor", "supplier", "curve", "parameters", "rms %",
                                 "max %", "quotes", "AICc"]))
    for w in fits.warnings:
        click.echo(f"warning: {w}")
