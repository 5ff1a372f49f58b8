"""`allocator study CASE_OR_FOLDER...`: allocate many cases, one row per case and model."""

from __future__ import annotations

import sys

import click

from ..errors import UsageError
from .common import (
    FilePath,
    OneLineUsageError,
    csv_option,
    echo_error,
    echo_json,
    exit_failed,
    fmt,
    check_xlsx,
    handle_errors,
    json_option,
    model_option,
    text_table,
    xlsx_option,
)

EXIT_CODES = (
    "Exit codes: 0 every case solved under every model; 1 some case is infeasible (or a "
    "solver gave no verified optimum), the others solved; 2 some case is bad input (its row "
    "says why; the other cases are still studied and shown) or an option is wrong; 3 an "
    "internal error."
)


class WorkerCount(click.ParamType):
    """A whole number of worker processes, at least 1; anything else is one line, exit 2."""

    name = "N"

    def convert(self, value, param, ctx):
        try:
            number = int(str(value).strip())
        except ValueError:
            raise OneLineUsageError(f"--workers: {value!r} is not a whole number", ctx) from None
        if number < 1:
            raise OneLineUsageError(f"--workers: must be at least 1, got {number}", ctx)
        return number


@click.command(epilog=EXIT_CODES)
@click.argument("paths", metavar="CASE_OR_FOLDER...", nargs=-1, required=True, type=click.Path())
@model_option
@click.option("--workers", type=WorkerCount(), default=None, metavar="N",
              help="Local processes to run the cases in (default: the number of processors).")
@click.option("--scheduler", default=None, metavar="ADDRESS",
              help='Run the cases on a Dask distributed cluster (tcp://host:port); needs '
                   'pip install "allocator[cluster]". Its workers must read the case files at the same paths.')
@json_option
@csv_option
@click.option("-o", "--output", "output", type=FilePath("an HTML file"), default=None, metavar="FILE.html",
              help="Also write a short self-contained HTML summary page (chart, table, cautions).")
@xlsx_option
@handle_errors
def study(paths, models, workers, scheduler, as_json, as_csv, output, xlsx):
    """Allocate every case and tabulate the savings: a cost-reduction study.

    CASE_OR_FOLDER: case files, or folders whose *.toml files are all studied. Per case
    and stack model (--model, repeatable; default each case's own [allocation].models):
    the status, the current and the least cost per assembly, the saving per assembly and
    per year (where the case's [economics] gives a volume), the requirements that bind and
    the three contributors with the largest shadow prices of their tolerances; totals per
    model at the bottom. A bad or infeasible case gives its message in its row and the
    study goes on. Results equal those of `allocator allocate` on each case alone.
    """
    from ..files import check_output_path
    from ..studies import case_files
    from ..studies import study as run

    if as_json and as_csv:
        raise UsageError("--json and --csv cannot be used together")
    if scheduler is not None and workers is not None:
        raise UsageError("--workers and --scheduler cannot be used together (the cluster has its own workers)")
    files = case_files(paths)
    if output is not None:
        check_output_path(output, protect=files, input_name="input case file")
    check_xlsx(xlsx, *files, output)
    result = run(files, models=models, workers=workers, scheduler=scheduler, progress=sys.stderr.isatty())
    if output is not None:
        from ..report.study_page import write_study_page

        write_study_page(result, output)
    if xlsx is not None:
        from ..sheets import study_sheets, write_workbook

        write_workbook(xlsx, study_sheets(result), protect=(*files, output))

    if as_json:
        echo_json(result.to_dict())
    elif as_csv:
        click.echo(result.to_frame().to_csv(index=False), nl=False)
    else:
        _print_human(result, output)
    if xlsx is not None:
        click.echo(f"wrote {xlsx}", err=as_json or as_csv)

    if result.exit_code == 2:  # the reasons are in the rows above; stderr gets one line
        echo_error(f"study: {result.message}")
        sys.exit(2)
    if result.exit_code == 1:
        exit_failed(f"study: {result.message}")


def _money(value, currency: str) -> str:
    return "-" if value is None else f"{fmt(value, 6)}{' ' + currency if currency else ''}"


def _print_human(result, output) -> None:
    rows = []
    for r in result.rows:
        rows.append([
            r.file,
            r.model or "-",
            r.status,
            _money(r.current_cost, r.currency),
            _money(r.total_cost, r.currency),
            fmt(r.saving, 4),
            fmt(r.saving_per_year, 6),
            ", ".join(r.binding) or "-",
            ", ".join(f"{n} {fmt(p, 4)}" for n, p in r.largest_prices) or "-",
        ])
    click.echo(text_table(rows, ["case", "model", "status", "current", "least cost", "saving",
                                 "saving/year", "binding", "largest shadow prices"]))
    click.echo("")
    totals = [
        [t.model, t.currency or "-", f"{t.solved}/{t.cases}", fmt(t.current_cost, 6), fmt(t.total_cost, 6),
         fmt(t.saving, 6), fmt(t.saving_per_year, 6)]
        for t in result.totals
    ]
    if totals:
        click.echo("totals over the solved cases (one assembly of each; per year where a volume is given)")
        click.echo(text_table(totals, ["model", "currency", "solved", "current", "least cost", "saving",
                                       "saving/year"]))
    problems = [r for r in result.rows if not r.success]
    if problems:
        click.echo("")
        for r in problems:
            where = r.file + (f" ({r.model})" if r.model else "")
            # a bad case's message already starts with its file
            if r.message.startswith(r.file + ":"):
                click.echo(f"{r.status}{' (' + r.model + ')' if r.model else ''}: {r.message}")
            else:
                click.echo(f"{where}: {r.status}: {r.message}")
    if output is not None:
        click.echo(f"\nwrote {output}")
