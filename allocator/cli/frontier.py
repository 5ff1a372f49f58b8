"""`allocator frontier CASE`: least cost against one requirement's limit or fallout target."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from ..errors import UsageError
from ..model import MODEL_LABELS
from .common import (
    CASE_ARGUMENT,
    check_xlsx,
    csv_option,
    echo_json,
    exit_failed,
    fmt,
    handle_errors,
    json_option,
    load_case_or_exit,
    model_option,
    text_table,
    units_title,
    xlsx_option,
)

SOURCES = {
    "argument": "from --range",
    "case": "from the case's [frontier]",
    "automatic": "chosen automatically",
    "values": "as given",
}
LABELS = {model: label.lower() for model, label in MODEL_LABELS.items()}  # table text is lower case


def _check_plot_paths(case_file, *paths) -> None:
    """Bad plot paths are usage errors, found before any work is done."""
    from ..files import check_output_path
    from ..plots import format_for

    given = [p for p in paths if p]
    for p in given:
        format_for(p)
        check_output_path(p, protect=(case_file,), input_name="input case file")
    if len(given) == 2 and Path(given[0]).resolve() == Path(given[1]).resolve():
        raise UsageError(f"{given[0]}: --plot and --economics-plot name the same file")


@click.command()
@CASE_ARGUMENT
@click.option("--requirement", "requirement", metavar="NAME", default=None,
              help="Requirement to sweep; default [frontier].requirement, else the first.")
@click.option("--vary", "vary", metavar="lower|upper|fallout_ppm", default=None,
              help="What to sweep; default [frontier].vary (upper).")
@click.option("--range", "span", nargs=2, type=float, metavar="FROM TO", default=None,
              help="Sweep from FROM to TO (FROM < TO); default [frontier].range, else automatic.")
@click.option("--points", type=int, default=None, metavar="N",
              help="Number of values, 2..2000; default [frontier].points (25).")
@model_option
@click.option("--plot", "plot", metavar="FILE", default=None,
              help="Write the frontier plot (.png or .svg).")
@click.option("--economics-plot", "economics_plot", metavar="FILE", default=None,
              help="Write manufacturing, scrap and total cost against the fallout target (.png or .svg).")
@json_option
@csv_option
@xlsx_option
@handle_errors
def frontier(case_file, requirement, vary, span, points, models, plot, economics_plot, as_json, as_csv, xlsx):
    """Least cost of CASE against one requirement's limit or fallout target.

    For each value of the swept limit (or target) and each stack model: the least total
    cost per assembly of a full allocation, and what rss / mean shift save over worst
    case there. Values that a model cannot meet are listed as infeasible (they are part
    of the frontier). With [economics] scrap_cost in the case, also the fallout target
    that minimises manufacturing plus scrap cost per assembly.

    Exit code 1 when no value can be met by any model, or a solver gave no verified
    optimum; 2 for bad input.
    """
    from ..sweep import frontier as run_frontier

    if as_json and as_csv:
        raise UsageError("--json and --csv cannot be used together")
    _check_plot_paths(case_file, plot, economics_plot)
    check_xlsx(xlsx, case_file, plot, economics_plot)
    case = load_case_or_exit(case_file)
    if economics_plot and case.economics.scrap_cost is None:
        raise UsageError(f"--economics-plot: {case_file} has no [economics] scrap_cost")

    # a progress bar (with the time left) only where someone watches: never on a pipe
    progress = sys.stderr.isatty()
    result = run_frontier(
        case,
        requirement=requirement,
        vary=vary,
        span=span,
        points=points,
        models=tuple(models) or None,
        progress=progress,
    )
    economics, economics_note = _economics(case, result, progress)

    # which files were written: on stderr when stdout carries the JSON or CSV
    written = []
    if plot:
        from ..plots import plot_frontier

        plot_frontier(result, plot, protect=(case_file,))
        written.append(f"wrote frontier plot {plot}")
    if economics_plot and economics is not None:
        from ..plots import plot_economics

        plot_economics(economics, economics_plot, protect=(case_file,))
        written.append(f"wrote economics plot {economics_plot}")
    if xlsx:
        from ..sheets import frontier_sheets, write_workbook

        write_workbook(xlsx, frontier_sheets(result, economics), protect=(case_file, plot, economics_plot))
        written.append(f"wrote {xlsx}")

    if as_json:
        document = {"title": case.title, **result.to_dict()}
        if economics is not None:
            document["economics"] = economics.to_dict()
        elif economics_note:
            document["economics_note"] = economics_note
        echo_json(document)
    elif as_csv:
        value_units = "ppm" if result.vary == "fallout_ppm" else result.units
        click.echo(result.to_frame().assign(value_units=value_units).to_csv(index=False), nl=False)
    else:
        _print_human(case, result, economics, economics_note)
    for line in written:
        click.echo(line, err=as_json or as_csv)

    if economics_plot and economics is None:
        click.echo(f"warning: no economics plot written: {economics_note}", err=True)
    if not result.success:  # the reason is in the output; stderr gets one short line
        exit_failed(f"frontier of {result.requirement}: {result.status}")


def _economics(case, result, progress=False):
    """The fallout economics when the case prices scrap (None and why not, otherwise)."""
    if case.economics.scrap_cost is None:
        return None, ""
    statistical = [m for m in result.models if m != "worst-case"]
    if not statistical:
        return None, "no statistical model selected (worst case does not use the fallout target)"
    from ..economics import fallout_economics

    return fallout_economics(case, requirement=result.requirement, models=statistical, progress=progress), ""


def _print_human(case, result, economics, economics_note) -> None:
    money = f" {case.currency}" if case.currency else ""
    click.echo(f"{case.title}  [{units_title(case)}{',' + money if money else ''}]")
    if result.vary == "fallout_ppm":
        what, unit = "fallout target", "ppm"
    else:
        what, unit = f"{result.vary} limit", result.units  # the swept requirement's units
    values = result.values
    click.echo(
        f"frontier of {result.requirement}: least cost per assembly against its {what}, "
        f"{len(values)} values {fmt(values[0], 6)} .. {fmt(values[-1], 6)} {unit} "
        f"({SOURCES.get(result.range_source, result.range_source)})"
    )
    for model, how in result.solvers.items():
        click.echo(f"  {model}: {how}")
    for note in result.notes:
        click.echo(f"note: {note}")
    click.echo("")

    stat = [m for m in result.models if m != "worst-case"] if "worst-case" in result.models else []
    headers = [f"{result.vary} [{unit}]"] + [f"{LABELS[m]}{money}" for m in result.models]
    headers += [f"{LABELS[m]} saves" for m in stat]
    savings = {m: result.savings(m) for m in stat}
    rows = []
    for i, value in enumerate(values):
        row = [fmt(float(value), 6)]
        for m in result.models:
            cost = result.costs[m][i]
            row.append(fmt(cost, 6) if cost is not None else result.statuses[m][i])
        for m in stat:
            s = savings[m][i]
            base = result.costs["worst-case"][i]
            row.append("-" if s is None else f"{fmt(s, 4)} ({100 * s / base:.1f} %)" if base else fmt(s, 4))
        rows.append(row)
    click.echo(text_table(rows, headers))

    current = result.current
    click.echo("")
    line = f"current design: {result.vary} {fmt(current['value'], 6)} {unit}"
    if current.get("total_cost") is not None:
        line += f", cost {fmt(current['total_cost'], 6)}{money} per assembly"
    optimal = [f"{LABELS[m]} {fmt(c, 6)}" if c is not None else f"{LABELS[m]} infeasible"
               for m, c in current.get("optimal", {}).items()]
    if optimal:
        line += "; least cost there: " + ", ".join(optimal)
    click.echo(line)
    click.echo(f"status: {result.status}: {result.message}")

    if economics is not None:
        _print_economics(economics, money)
    elif economics_note:
        click.echo("")
        click.echo(f"fallout economics: skipped ({economics_note})")


def _print_economics(economics, money) -> None:
    from ..ppm import format_ppm

    click.echo("")
    volume = economics.volume
    head = (
        f"fallout economics of {economics.requirement}: cost per assembly = manufacturing + "
        f"{fmt(economics.scrap_cost)}{money} scrap x fallout"
    )
    if volume is not None:
        head += f"; {fmt(volume, 8)} assemblies per year"
    click.echo(head)
    for note in economics.notes:
        click.echo(f"note: {note}")
    headers = ["model", "target [ppm]", f"manufacturing{money}", f"scrap{money}", f"total{money}"]
    if volume is not None:
        headers.append(f"per year{money}")
    rows = []
    for r in economics.results:
        if r.optimal_ppm is None:
            continue
        for label, ppm, m, s, t, year in (
            (f"{LABELS[r.model]}: optimum", r.optimal_ppm, r.manufacturing_cost, r.scrap_cost,
             r.total_cost, r.annual_total),
            (f"{LABELS[r.model]}: current target", r.current_ppm, r.current_manufacturing,
             r.current_scrap, r.current_total, r.annual_current_total),
        ):
            row = [label, format_ppm(ppm, unit=False), fmt(m, 6), fmt(s, 4), fmt(t, 6)]
            if volume is not None:
                row.append(fmt(year, 8))
            rows.append(row)
    if rows:
        click.echo(text_table(rows, headers))
    for r in economics.results:
        if r.optimal_ppm is None:
            click.echo(f"{LABELS[r.model]}: {r.status}: {r.message}")
            continue
        text = f"{LABELS[r.model]}: {r.status}: {r.message}"
        if r.annual_saving is not None:
            text += f"; moving the target saves {fmt(r.annual_saving, 6)}{money} per year"
        elif r.saving_per_assembly is not None:
            text += f"; moving the target saves {fmt(r.saving_per_assembly, 4)}{money} per assembly"
        click.echo(text)
