"""``allocator capability CASE MEASUREMENTS.csv``: Cp, Cpk and mean shift from measured parts."""

from __future__ import annotations

import click

from ..errors import UsageError
from .common import CASE_ARGUMENT, FilePath, echo_json, fmt, handle_errors, json_option, load_case_or_exit, text_table

CAUTION = ("Capability figures assume a stable process (in statistical control) and "
           "independent parts measured with a capable gauge.")


@click.command()
@CASE_ARGUMENT
@click.argument("measurements_file", metavar="MEASUREMENTS.csv", type=FilePath("a CSV file"))
@click.option("--confidence", type=float, default=0.95, show_default=True,
              help="Level of the confidence intervals and of the normality test.")
@json_option
@click.option("--write", "out_file", type=FilePath(), metavar="OUT.toml", default=None,
              help="Write a copy of CASE with cp and mean_shift from the data.")
@click.option("--conservative", is_flag=True,
              help="With --write: the lower confidence bound of Cp and the upper bound of the offset.")
@handle_errors
def capability(case_file, measurements_file, confidence, as_json, out_file, conservative):
    """Capability of the contributors measured in MEASUREMENTS.csv.

    The CSV has one column per measured contributor of CASE (header: contributor names)
    and one measured value per row. Per column: n, mean, standard deviation, offset from
    the nominal, mean_shift, Cp and Cpk with confidence intervals, an Anderson-Darling
    normality test and the parts outside ± tolerance.
    """
    from ..caseout import write_case
    from ..files import check_output_path
    from ..measured import capability as run

    if conservative and not out_file:
        raise UsageError("--conservative: only with --write OUT.toml (it chooses the values written)")
    if out_file:
        check_output_path(out_file, protect=[case_file, measurements_file], input_name="input file")
    case = load_case_or_exit(case_file)
    study = run(case, measurements_file, confidence=confidence)
    written = None
    if out_file:
        which = "confidence bounds (--conservative)" if conservative else "estimates"
        written = write_case(
            study.apply(conservative=conservative), out_file, protect=[case_file, measurements_file],
            comment=(f"Written by allocator capability: {case_file} with cp and mean_shift from "
                     f"{measurements_file} ({which}, {100 * confidence:g} % confidence).\n"
                     f"The comments of {case_file} are not carried over."),
        )
    if as_json:
        echo_json({"title": case.title, **study.to_dict(), "written": str(written) if written else None})
        return
    click.echo(f"{case.title}: capability at {100 * study.confidence:g} % confidence")
    rows = []
    for c in study.contributors:
        rows.append([
            c.name, c.n, fmt(c.mean, 6), fmt(c.std), fmt(c.offset), fmt(c.mean_shift, 3),
            f"{fmt(c.cp, 3)} [{fmt(c.cp_ci_low, 3)}, {fmt(c.cp_ci_high, 3)}]",
            f"{fmt(c.cpk, 3)} [{fmt(c.cpk_ci_low, 3)}, {fmt(c.cpk_ci_high, 3)}]",
            fmt(c.ad_pvalue, 2), c.outside, c.suggested or "-",
        ])
    click.echo(text_table(rows, ["contributor", "n", "mean", "std", "offset", "mean_shift",
                                 "cp [interval]", "cpk [interval]", "normal p", "outside", "suggested"]))
    for w in study.warnings:
        click.echo(f"warning: {w}")
    click.echo(CAUTION)
    if written:
        click.echo(f"wrote {written}")
