"""`allocator allocate CASE`: least-cost tolerances per stack model."""

from __future__ import annotations

import sys

import click

from ..errors import AllocatorError, InternalError, UsageError
from ..ppm import format_ppm
from .common import (
    CASE_ARGUMENT,
    check_xlsx,
    csv_option,
    echo_error,
    echo_json,
    exit_failed,
    fmt,
    handle_errors,
    unit_header,
    json_option,
    labelled,
    load_case_or_exit,
    model_option,
    shared_label,
    text_table,
    units_title,
    xlsx_option,
)

CSV_COLUMNS = (
    "model", "status", "contributor", "process", "count", "current", "allocated", "bound",
    "tightest", "loosest", "unit_cost_current", "unit_cost_allocated", "units",
)


def _parse_fix(items) -> dict[str, float]:
    """``("NAME=T", ...)`` -> ``{NAME: T}``; names and values are checked by the library."""
    out = {}
    for item in items:
        name, sep, value = item.partition("=")
        name = name.strip()
        if not sep or not name:
            raise UsageError(f"--fix {item!r}: expected NAME=T, e.g. --fix spacer=0.02")
        try:
            out[name] = float(value)
        except ValueError:
            raise UsageError(f"--fix {item!r}: tolerance {value.strip()!r} is not a number") from None
    return out


@click.command()
@CASE_ARGUMENT
@model_option
@click.option(
    "--fix",
    "fixes",
    multiple=True,
    metavar="NAME=T",
    help="Hold contributor NAME at ± T (repeatable); also shows the cost against the unheld optimum.",
)
@json_option
@csv_option
@xlsx_option
@handle_errors
def allocate(case_file, models, fixes, as_json, as_csv, xlsx):
    """Find the least-cost tolerances of CASE.

    For each stack model: the allocated ± tolerance of every contributor (and whether it
    sits at its tightest or loosest limit), unit costs before and after, the total cost
    against the current one, and per requirement the worst-case range, sigma, predicted
    fallout against its target and the shadow price of its limits.

    Exit code 1 when a model's requirements cannot be met (the reason names the
    requirement, by how much the tightest tolerances miss it and the largest
    contributors) or no verified optimum was found; 3 when a model's solver failed
    unexpectedly (a bug: the models that solved are still shown, then the error).
    """
    from ..solve import allocate as run

    if as_json and as_csv:
        raise UsageError("--json and --csv cannot be used together")
    fix = _parse_fix(fixes)
    check_xlsx(xlsx, case_file)
    case = load_case_or_exit(case_file)
    models = tuple(models) or tuple(case.allocation.models)
    results, baselines, crashed = _run_models(case, models, fix, run)

    if as_json:
        documents = []
        for result, base in zip(results, baselines):
            doc = result.to_dict()
            if base is not None:
                doc["unfixed_total_cost"] = base.total_cost
                doc["cost_delta"] = result.cost_delta(base)
            documents.append(doc)
        echo_json({"title": case.title, "units": case.units, "currency": case.currency,
                   "results": documents})
    elif as_csv:
        _write_csv(results)
    else:
        _print_human(case, results, baselines)

    failed = [r for r in results if not r.success]
    if xlsx is not None and results and not crashed:
        from ..sheets import allocation_sheets, write_workbook

        write_workbook(xlsx, allocation_sheets(results), protect=(case_file,))
        click.echo(f"wrote {xlsx}", err=as_json or as_csv)
    if crashed:
        # the models that solved are printed above; the crash gets one line
        echo_error(crashed[0])
        sys.exit(crashed[0].exit_code)
    if failed:
        # the reason is in the output above (table or JSON); stderr gets one short line
        exit_failed("allocation with " + "; ".join(f"model {r.model}: {r.status}" for r in failed))


def _run_models(case, models, fix, run):
    """Each model's allocation (and, when holding, without ``fix``), with a progress bar
    per model on a terminal (drawn at once when the models are mixed-integer solves).

    Returns (results, baselines, crashed): a bug in one model must not hide the others.
    """
    from ..progress import progress_bar
    from ..solve.dispatch import needs_discrete

    results, baselines, crashed = [], [], []
    bar = progress_bar(len(models) * (2 if fix else 1), desc="allocate", unit="model",
                       enabled=sys.stderr.isatty(), slow=needs_discrete(case, fix) or needs_discrete(case))
    try:
        for m in models:
            bar.describe(m)
            try:
                result = run(case, m, fix=fix)
                bar.update(1)
                base = run(case, m) if fix else None
                bar.update(1 if fix else 0)
            except AllocatorError:
                raise  # bad input: one line, exit 2, nothing else
            except Exception as err:  # a bug in one model must not hide the others
                crashed.append(InternalError(f"model {m}", err))
                continue
            results.append(result)
            baselines.append(base)
    finally:
        bar.close()
    return results, baselines, crashed


def _write_csv(results) -> None:
    import csv
    import io

    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for result in results:
        for row in result.rows():
            row = dict(row, model=result.model, status=result.status)
            writer.writerow(["" if row[c] is None else row[c] for c in CSV_COLUMNS])
    click.echo(buffer.getvalue(), nl=False)


def _count(n, noun: str) -> str:
    """``1 iteration``, ``3 iterations``."""
    return f"{n} {noun}" if n == 1 else f"{n} {noun}s"


def _saving(savings, percent) -> str:
    """``saves 1.18 (12.6 %)``, or for a dearer result ``costs 5.096 more (47.0 %)``."""
    if savings is None:
        return "saving unknown"
    share = f" ({abs(percent):.1f} %)" if percent is not None else ""
    if savings < 0:
        return f"costs {fmt(-savings, 4)} more{share}"
    return f"saves {fmt(savings, 4)}{share}"


def _print_human(case, results, baselines) -> None:
    from ..model import per_unit

    money = f" {case.currency}" if case.currency else ""
    click.echo(f"{case.title}  [{units_title(case)}{',' + money if money else ''}]")
    for result, base in zip(results, baselines):
        click.echo("")
        head = f"model {result.model}: {result.status}"
        if result.solver:
            head += f" ({result.solver}, {_count(result.iterations, 'iteration')}"
            head += f", gap {result.gap:.1e})" if result.gap is not None else ")"
        click.echo(head)
        if result.total_cost is None:
            click.echo(f"  {result.message}")
            continue
        if not result.success:
            click.echo(f"  warning: {result.message}")
        elif result.gap is None:  # no certified gap to show: say what the answer is (a KKT point ...)
            click.echo(f"  {result.message}")
        rows = []
        # a process column only where the case offers processes, a grade column only where
        # the tolerances are rounded to ISO 286 grades; a part without one has an empty cell
        with_process = any(r["process"] for r in result.rows())
        with_grade = bool(result.grades)
        u = shared_label(r["units"] for r in result.rows())
        for r in result.rows():
            name = r["contributor"]
            rows.append([
                name,
                *([r["process"] or ""] if with_process else []),
                *([result.grades.get(name, "")] if with_grade else []),
                labelled(f"±{fmt(r['current'])}", r["units"], u),
                labelled(f"±{fmt(r['allocated'])}", r["units"], u),
                r["bound"],
                f"{fmt(r['unit_cost_current'])} -> {fmt(r['unit_cost_allocated'])}",
                r["count"],
            ])
        click.echo(text_table(
            rows,
            ["contributor", *(["process"] if with_process else []), *(["grade"] if with_grade else []),
             unit_header("current", u), unit_header("allocated", u), "bound", f"unit cost{money}", "count"],
        ))
        click.echo(
            f"total cost {fmt(result.total_cost, 6)}{money} per assembly "
            f"(current {fmt(result.current_cost, 6)}; {_saving(result.savings, result.savings_percent)})"
        )
        if result.rounding:
            line = f"rounded to {result.rounding}"
            if result.rounding_cost is not None:
                line += (f": costs {fmt(result.rounding_cost, 4)}{money} more than the unrounded "
                         f"optimum ({fmt(result.unrounded_cost, 6)})")
            if result.grades:
                line += "; grades " + ", ".join(f"{k} {g}" for k, g in result.grades.items())
            click.echo(line)
        if result.held:
            held = ", ".join(f"{k} = ±{fmt(v)}" for k, v in result.held.items())
            line = f"held: {held}"
            if base is not None and base.total_cost is not None:
                line += (
                    f"; costs {fmt(result.cost_delta(base), 4)}{money} more than the unheld "
                    f"optimum ({fmt(base.total_cost, 6)})"
                )
            click.echo(line)
        for r in result.requirements:
            name = f"{r.name} [{r.units}]" if r.units else r.name
            click.echo(f"requirement {name}: limits [{fmt(r.lower, 6)}, {fmt(r.upper, 6)}]"
                       + ("" if r.linear else " (linearised expression)"))
            text = (
                f"  worst case [{fmt(r.worst_case_min, 6)}, {fmt(r.worst_case_max, 6)}]   "
                f"sigma {fmt(r.sigma)}   fallout {format_ppm(r.fallout_ppm)}"
            )
            if r.target_ppm is not None:
                text += f" (target {format_ppm(r.target_ppm)})"
            if r.mean_shift:
                text += f"   mean shift ±{fmt(r.mean_shift)}"
            click.echo(text)
            if r.binding:
                parts = []
                per_limit = per_unit(case.currency or "cost", r.units)
                if r.shadow_lower:
                    parts.append(f"{fmt(r.shadow_lower)} {per_limit} per lower")
                if r.shadow_upper:
                    parts.append(f"{fmt(r.shadow_upper)} {per_limit} per upper")
                if r.shadow_ppm:
                    parts.append(f"{fmt(r.shadow_ppm)}{money}/ppm of target")
                click.echo(f"  binding ({r.binding}); shadow prices: {', '.join(parts)}")
            elif r.shadow_price is None:
                click.echo("  shadow prices not defined (discrete choice)")
            else:
                click.echo("  not binding (shadow price 0)")
