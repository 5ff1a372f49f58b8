"""`allocator analyze CASE`: worst case, RSS and mean-shift analysis at given tolerances."""

from __future__ import annotations

import click

from ..ppm import format_ppm
from .common import (
    CASE_ARGUMENT,
    csv_option,
    echo_json,
    fmt,
    handle_errors,
    json_option,
    load_case_or_exit,
    text_table,
    write_csv,
)


@click.command()
@CASE_ARGUMENT
@json_option
@csv_option
@handle_errors
def analyze(case_file, as_json, as_csv):
    """Analyse the stack of CASE at its current tolerances.

    For each requirement: nominal response, worst-case range, RSS sigma, predicted
    fallout (below / above / total, ppm) and, where contributors have a mean shift,
    the fallout with the mean at its worst place; per contributor: sensitivity,
    ± contribution to the worst case and share of the variance.
    """
    from ..analysis import analyze as run_analysis

    case = load_case_or_exit(case_file)
    result = run_analysis(case)
    if as_json:
        echo_json({"title": case.title, "units": case.units, **result.to_dict()})
        return
    if as_csv:
        write_csv(result.contributions_frame())
        return
    u = case.units
    click.echo(f"{case.title}  [{u}]")
    for r in result.requirements:
        limits = f"[{fmt(r.lower, 6)}, {fmt(r.upper, 6)}]"
        click.echo("")
        click.echo(f"requirement {r.name}: limits {limits}" + ("" if r.linear else "  (linearised expression)"))
        verdict = "inside limits" if r.worst_case_ok else "OUTSIDE limits"
        click.echo(
            f"  nominal {fmt(r.nominal, 6)}   worst case [{fmt(r.worst_case_min, 6)}, "
            f"{fmt(r.worst_case_max, 6)}] {verdict}"
        )
        click.echo(
            f"  rss sigma {fmt(r.sigma)}   Cpk {fmt(r.cpk, 3)}   fallout {format_ppm(r.fallout_ppm)} "
            f"(below {format_ppm(r.fallout_below_ppm)}, above {format_ppm(r.fallout_above_ppm)}; "
            f"target {format_ppm(r.target_ppm)})"
        )
        if r.mean_shift > 0:
            click.echo(
                f"  mean shift ±{fmt(r.mean_shift)}: fallout {format_ppm(r.mean_shift_ppm)} "
                f"(below {format_ppm(r.mean_shift_below_ppm)}, above {format_ppm(r.mean_shift_above_ppm)})"
            )
        rows = [
            [c.name, fmt(c.sensitivity), c.count, fmt(c.tolerance), fmt(c.worst_case), f"{100 * c.variance_share:.1f}"]
            for c in r.contributions
        ]
        click.echo(
            text_table(
                rows,
                ["contributor", "sensitivity", "count", f"± tol [{u}]", "± worst case", "% variance"],
            )
        )
