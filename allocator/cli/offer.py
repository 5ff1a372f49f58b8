"""`allocator offer CASE --offer NAME=T@PRICE`: what a supplier's offer saves, where it breaks even."""

from __future__ import annotations

import click

from ..errors import UsageError
from .common import (
    CASE_ARGUMENT,
    csv_option,
    echo_json,
    exit_failed,
    fmt,
    handle_errors,
    json_option,
    load_case_or_exit,
    model_option,
    units_title,
)


@click.command()
@CASE_ARGUMENT
@click.option(
    "--offer",
    "offer_texts",
    multiple=True,
    metavar="NAME=T@PRICE",
    help="Contributor NAME at ± T for PRICE per part (repeatable); default: the case's [[offer]] tables.",
)
@model_option
@json_option
@csv_option
@handle_errors
def offer(case_file, offer_texts, models, as_json, as_csv):
    """Evaluate supplier offers on CASE: saving, break-even price and counter-offer.

    For each offer and model: the least assembly cost with NAME held at ± T and paid at
    PRICE per part (a contributor with count n pays n x PRICE), every other tolerance
    re-optimised; the least cost without the offer; the saving; the price at which the
    saving is zero (break-even); and the counter-offer, the tolerance at which the part's
    own cost curve costs PRICE. Several offers: each alone, then all together. Offers
    given with --offer replace the case's [[offer]] tables.

    Exit codes: 0 at least one offer is feasible; 1 no offer is feasible (each row names
    the requirement and by how much it is missed); 2 bad input (unknown contributor, T
    outside its range, a malformed --offer): nothing evaluated.
    """
    from ..offers import evaluate_offers, parse_offer

    if as_json and as_csv:
        raise UsageError("--json and --csv cannot be used together")
    offers = [parse_offer(text) for text in offer_texts] or None
    case = load_case_or_exit(case_file)
    result = evaluate_offers(case, offers, models or None)
    if as_json:
        echo_json({"title": case.title, "units": case.units, **result.to_dict()})
    elif as_csv:
        click.echo(result.to_frame().to_csv(index=False), nl=False)
    else:
        _print_human(case, result)
    if not result.success:
        exit_failed(f"offers: {result.message}")


def _print_human(case, result) -> None:
    from .common import text_table

    money = f" {case.currency}" if case.currency else ""
    click.echo(f"{case.title}  [{units_title(case)}{',' + money if money else ''}]")
    groups: dict = {}
    for row in result.rows:
        groups.setdefault((row.contributor, row.tolerance, row.price, row.offers), []).append(row)
    for rows in groups.values():
        first = rows[0]
        click.echo("")
        if first.together:
            held = ", ".join(f"{o.contributor} ±{fmt(o.tolerance)} at {fmt(o.price)}" for o in first.offers)
            click.echo(f"all offers together: {held}")
        else:
            unit = f" {first.units}" if first.units else ""
            click.echo(f"offer {first.contributor} ±{fmt(first.tolerance)}{unit} at {fmt(first.price)}{money} per part"
                       + (f" x {first.count}" if first.count and first.count > 1 else "")
                       + (f"  ({first.note})" if first.note else ""))
            curve = "no cost curve" if first.curve_unit_cost is None else f"{fmt(first.curve_unit_cost)}{money}"
            click.echo(f"  own cost curve at ±{fmt(first.tolerance)}: {curve} per part")
            if first.counter_tolerance is not None:
                where = f" ({first.counter_note})" if first.counter_note else ""
                click.echo(f"  counter-offer: at {fmt(first.price)}{money} the curve makes "
                           f"±{fmt(first.counter_tolerance)}{unit}{where}")
            else:
                click.echo(f"  counter-offer: none ({first.counter_note})")
        table = []
        for r in rows:
            table.append([r.model, r.status, fmt(r.total_cost, 6), fmt(r.baseline_cost, 6), fmt(r.saving, 4),
                          *([] if first.together else [fmt(r.break_even_price, 4), r.process or ""])])
        headers = ["model", "status", f"with offer{money}", f"without{money}", "saving"]
        if not first.together:
            headers += ["break-even price", "process"]
            if not any(r.process for r in rows):
                headers.pop()
                table = [t[:-1] for t in table]
        click.echo("\n".join("  " + line for line in text_table(table, headers).splitlines()))
        for r in rows:
            if not r.success:
                click.echo(f"  {r.model}: {r.message}")
    click.echo("")
    click.echo(f"{result.status}: {result.message}")
