"""`allocator analyze CASE`: worst case, RSS, mean-shift and exact (convolution) analysis at given tolerances."""

from __future__ import annotations

import click

from ..ppm import format_ppm
from .common import (
    CASE_ARGUMENT,
    csv_option,
    echo_json,
    fmt,
    handle_errors,
    unit_header,
    json_option,
    labelled,
    load_case_or_exit,
    shared_label,
    text_table,
    units_title,
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
    the fallout with the mean at its worst place; for a linear chain the exact fallout
    from the stated distributions (numerical convolution); per contributor: sensitivity,
    ± contribution to the worst case and share of the variance.
    """
    from ..analysis import analyze as run_analysis

    case = load_case_or_exit(case_file)
    result = run_analysis(case)
    if as_json:
        echo_json({"title": case.title, "units": case.units, **result.to_dict()})
        return
    if as_csv:
        # the CSV columns keep the names they always had
        write_csv(result.contributions_frame(), index_label=["requirement", "name"])
        return
    click.echo(f"{case.title}  [{units_title(case)}]")
    if result.unknowns:
        click.echo("")
        click.echo("closure equations solved at the nominals:")
        click.echo(
            text_table(
                [[u.name, fmt(u.nominal, 9), u.description] for u in result.unknowns],
                ["unknown", "nominal", "description"],
            )
        )
    for r in result.requirements:
        limits = f"[{fmt(r.lower, 6)}, {fmt(r.upper, 6)}]"
        click.echo("")
        name = f"{r.name} [{r.units}]" if r.units else r.name
        kind = ""
        if r.through_loop:
            kind = f"  (through the closure loop: {', '.join(r.through_loop)}; linearised)"
        elif not r.linear:
            kind = "  (linearised expression)"
        click.echo(f"requirement {name}: limits {limits}{kind}")
        verdict = "inside limits" if r.worst_case_ok else "OUTSIDE limits: " + _misses(r)
        click.echo(
            f"  nominal {fmt(r.nominal, 6)}   worst case [{fmt(r.worst_case_min, 6)}, "
            f"{fmt(r.worst_case_max, 6)}] {verdict}"
        )
        click.echo(
            f"  rss sigma {fmt(r.sigma)}   Cpk {fmt(r.cpk, 3)}   fallout {format_ppm(r.rss_ppm)} "
            f"(below {format_ppm(r.fallout_below_ppm)}, above {format_ppm(r.fallout_above_ppm)}; "
            f"target {format_ppm(r.target_ppm)})"
        )
        if r.mean_shift > 0:
            click.echo(
                f"  mean shift ±{fmt(r.mean_shift)}: fallout {format_ppm(r.mean_shift_ppm)} "
                f"(below {format_ppm(r.mean_shift_below_ppm)}, above {format_ppm(r.mean_shift_above_ppm)})"
            )
        if r.convolution_ppm is not None:
            where = " at the worse end of the mean-shift band" if r.mean_shift > 0 else ""
            click.echo(
                f"  exact (convolution of the stated distributions{where}): fallout "
                f"{format_ppm(r.convolution_ppm)} (below {format_ppm(r.convolution_below_ppm)}, "
                f"above {format_ppm(r.convolution_above_ppm)})"
            )
        per = shared_label(c.sensitivity_units for c in r.contributions)
        tol = shared_label(c.units for c in r.contributions)
        rows = [
            [c.name, labelled(fmt(c.sensitivity), c.sensitivity_units, per), c.count,
             labelled(fmt(c.tolerance), c.units, tol), fmt(c.worst_case), f"{100 * c.variance_share:.1f}"]
            for c in r.contributions
        ]
        headers = ["contributor", unit_header("sensitivity", per), "count", unit_header("± tol", tol),
                   unit_header("± worst case", r.units), "% variance"]
        if r.through_loop:  # the total split: held unknowns + through the loop
            for row, c in zip(rows, r.contributions):
                row[2:2] = [fmt(c.direct_sensitivity), fmt(c.loop_sensitivity)]
            headers[2:2] = ["direct", "through loop"]
        click.echo(text_table(rows, headers))


def _misses(r) -> str:
    """Which limit the worst case passes and by how much (the amounts the analysis judged)."""
    parts = []
    if r.worst_case_below:
        parts.append(f"{fmt(r.worst_case_below, 3)} below lower {fmt(r.lower, 6)}")
    if r.worst_case_above:
        parts.append(f"{fmt(r.worst_case_above, 3)} above upper {fmt(r.upper, 6)}")
    return " and ".join(parts)
