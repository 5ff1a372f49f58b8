"""`allocator verify CASE`: check tolerances by Monte Carlo (and exact convolution for chains)."""

from __future__ import annotations

import json
import math
from contextlib import contextmanager
from pathlib import Path

import click

from ..errors import CaseError, InfeasibleError, UsageError, did_you_mean
from ..files import check_output_path
from ..ppm import format_ppm
from .common import (
    CASE_ARGUMENT,
    MAX_SAMPLES,
    MIN_SAMPLES,
    FilePath,
    SampleCount,
    check_xlsx,
    csv_option,
    echo_json,
    exit_failed,
    handle_errors,
    json_option,
    load_case_or_exit,
    model_option,
    seed_option,
    text_table,
    units_title,
    write_csv,
    xlsx_option,
)
from .verify_text import finish_notes, limits_cell, simulated_as

PLOT_FORMATS = (".png", ".svg")


def _check_value(value, file: str, field: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise CaseError(f"must be a number, got {json.dumps(value)}", file=file, field=field)
    if not (math.isfinite(value) and value > 0):
        raise CaseError(f"must be a positive finite tolerance, got {value}", file=file, field=field)
    return float(value)


def _check_tolerances(mapping, names, file: str, prefix: str) -> dict[str, float]:
    if not isinstance(mapping, dict):
        raise CaseError("must be an object {contributor: tolerance}", file=file, field=prefix or None)
    out = {}
    for name, value in mapping.items():
        field = f"{prefix}.{name}" if prefix else name
        if name not in names:
            raise CaseError(f"unknown contributor{did_you_mean(name, names)}", file=file, field=field)
        out[name] = _check_value(value, file, field)
    return out


def _read_processes(rows, names, file: str, prefix: str) -> dict[str, tuple[str, str]]:
    """The processes of an ``allocate --json`` result: name -> (process, field path).

    ``rows`` is the result's ``contributors`` list (each with ``contributor`` and
    ``process``); missing or empty processes are left out (verify then applies its rule).
    Whether a process is one of the contributor's and holds its tolerance is checked by
    the library (:meth:`allocator.model.Case.making_processes`).
    """
    if rows is None:
        return {}
    if not isinstance(rows, list):
        raise CaseError("must be a list of contributor rows", file=file, field=prefix)
    out = {}
    for j, row in enumerate(rows):
        field = f"{prefix}[{j}]"
        if not isinstance(row, dict):
            raise CaseError("must be an object", file=file, field=field)
        process = row.get("process")
        if process is None or process == "":
            continue
        name = row.get("contributor")
        if name not in names:
            raise CaseError(f"unknown contributor {json.dumps(name)}", file=file, field=f"{field}.contributor")
        if not isinstance(process, str):
            raise CaseError(f"must be a process name, got {json.dumps(process)}", file=file, field=f"{field}.process")
        out[name] = (process, f"{field}.process")
    return out


def read_tolerance_file(
    path, names, model: str | None = None
) -> tuple[dict[str, float], str | None, dict[str, tuple[str, str]]]:
    """Tolerances from ``allocate --json`` output or a plain ``{name: t}`` JSON object.

    Returns the tolerances, the model they belong to (None for a plain map) and the
    processes the allocation chose (name -> (process, field path in the file); empty for
    a plain map). Raises :class:`CaseError` naming the file and field for anything wrong.
    """
    file = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise CaseError(f"cannot read the file ({getattr(err, 'strerror', None) or err})", file=file) from None
    try:
        document = json.loads(text)
    except json.JSONDecodeError as err:
        raise CaseError(f"not valid JSON: {err.msg}", file=file, field=f"line {err.lineno}") from None
    if not isinstance(document, dict):
        raise CaseError("must be a JSON object", file=file)
    if "results" not in document:
        if model is not None:
            raise CaseError(
                "--model picks one of several allocation results, but this file is a plain tolerance map",
                file=file,
            )
        return _check_tolerances(document, names, file, ""), None, {}
    results = document["results"]
    if not isinstance(results, list) or not results:
        raise CaseError("must be a non-empty list of allocation results", file=file, field="results")
    models = [r.get("model") if isinstance(r, dict) else None for r in results]
    if model is not None:
        if model not in models:
            have = ", ".join(str(m) for m in models)
            raise CaseError(f"no result for model '{model}' (the file has: {have})", file=file, field="results")
        index = models.index(model)
    elif len(results) == 1:
        index = 0
    else:
        have = ", ".join(str(m) for m in models)
        raise CaseError(f"holds {len(results)} results ({have}): pick one with --model", file=file, field="results")
    result = results[index]
    if not isinstance(result, dict):
        raise CaseError("must be an object", file=file, field=f"results[{index}]")
    tolerances = result.get("tolerances")
    if tolerances is None:
        status = result.get("status")
        raise CaseError(
            "missing" + (f" (result status: {status})" if status else ""),
            file=file,
            field=f"results[{index}].tolerances",
        )
    checked = _check_tolerances(tolerances, names, file, f"results[{index}].tolerances")
    processes = _read_processes(result.get("contributors"), names, file, f"results[{index}].contributors")
    return checked, models[index], processes


def _allocated_tolerances(case, model: str) -> tuple[dict[str, float], dict[str, str]]:
    try:
        from ..solve import allocate
    except ImportError:
        raise UsageError(
            "--model without --tolerances needs the allocation solver (allocator.solve), "
            "which is not available in this installation yet"
        ) from None
    allocation = allocate(case, model=model)
    if not getattr(allocation, "success", True):
        raise InfeasibleError(f"allocation with model {model} failed: {getattr(allocation, 'message', '')}")
    tolerances = {str(k): float(v) for k, v in dict(allocation.tolerances).items()}
    return tolerances, dict(allocation.processes)


def _check_plot_path(plot, protect) -> None:
    target = Path(plot)
    if target.suffix.lower() not in PLOT_FORMATS:
        raise UsageError(f"{plot}: --plot writes .png or .svg, not '{target.suffix or 'no extension'}'")
    check_output_path(plot, protect=protect)


@contextmanager
def _block_runner(scheduler):
    """The cluster's runner with --scheduler (connected before the simulation), else None: here."""
    if scheduler is None:
        yield None
        return
    from ..parallel import cluster_runner

    with cluster_runner(scheduler) as run:
        yield run


def _verdict(check) -> str:
    return check.status + ("" if check.decided else "*")


@click.command()
@CASE_ARGUMENT
@click.option(
    "--tolerances",
    "tolerance_file",
    type=FilePath(),
    default=None,
    metavar="FILE.json",
    help="Tolerances to check: the output of `allocate --json` or a plain {name: t} object.",
)
@model_option
@click.option(
    "--samples",
    type=SampleCount(),
    default="1000000",
    show_default=True,
    help=f"Assemblies to simulate ({MIN_SAMPLES:.0e}..{MAX_SAMPLES:.0e}; 2e5 style accepted).",
)
@seed_option
@click.option("--plot", type=FilePath(), default=None, metavar="FILE", help="Write response histograms (.png or .svg).")
@click.option(
    "--centred",
    is_flag=True,
    help="Simulate centred processes (ignore the contributors' mean_shift).",
)
@click.option(
    "--scheduler",
    default=None,
    metavar="ADDRESS",
    help='Simulate the blocks of assemblies on a Dask distributed cluster (tcp://host:port); '
         'the same seed gives the same result, bit for bit. Needs pip install "allocator[cluster]".',
)
@click.option(
    "--method",
    type=click.Choice(["monte-carlo", "importance"]),
    default="monte-carlo",
    show_default=True,
    help="monte-carlo: plain simulation; importance: samples aimed at each limit (tiny fallouts), "
    "with FORM and SORM beside it.",
)
@json_option
@csv_option
@xlsx_option
@handle_errors
def verify(case_file, tolerance_file, models, samples, seed, plot, centred, scheduler, method, as_json, as_csv, xlsx):
    """Verify tolerances of CASE by Monte Carlo simulation of whole assemblies.

    Without --tolerances or --model the case's current tolerances are checked. With
    --model M (and no --tolerances) the case is first allocated with model M. Each
    contributor is drawn from its own distribution; a mean shift is placed on the side
    that hurts each requirement. For linear chains the exact fallout by numerical
    convolution is shown beside the simulation. --method importance draws the samples
    (--samples per requirement) around the most probable failure point of each limit and
    weights them, for fallouts far below 1 ppm.

    With --scheduler ADDRESS the blocks of assemblies are simulated on the workers of a
    Dask distributed cluster; each block has its own seed, so the result is the same,
    bit for bit, as a local run with the same --seed.

    Exit codes: 0 no requirement fails, 1 a fallout exceeds its target beyond the 95 %
    confidence interval, 2 bad input (or no cluster at ADDRESS).
    """
    from ..simulate import render_verification_plot
    from ..simulate import verify as run_verify
    from ..files import atomic_write

    if len(models) > 1:
        raise UsageError("verify checks one set of tolerances: give --model once")
    model = models[0] if models else None
    if seed is not None and seed < 0:
        raise UsageError(f"--seed must be a non-negative integer, got {seed}")
    if plot is not None:
        _check_plot_path(plot, (case_file, tolerance_file))
    check_xlsx(xlsx, case_file, tolerance_file, plot)
    case = load_case_or_exit(case_file)
    fields = {}  # contributor -> where its process came from in the tolerance file
    processes = None
    if tolerance_file is not None:
        tolerances, model, chosen = read_tolerance_file(tolerance_file, case.names, model)
        processes = {name: process for name, (process, _) in chosen.items()}
        fields = {name: field for name, (_, field) in chosen.items()}
        source = f"from {tolerance_file}" + (f" (model {model})" if model else "")
    elif model is not None:
        tolerances, processes = _allocated_tolerances(case, model)
        source = f"allocated with model {model}"
    else:
        tolerances = None
        source = "current tolerances of the case"

    options = dict(processes=processes, samples=samples, seed=seed, progress=True,
                   shift_means=not centred, allocated_with=model)
    try:
        if method == "importance":
            from ..importance import verify_importance

            if scheduler is not None:
                raise UsageError("--scheduler runs the blocks of a Monte Carlo simulation; "
                                 "--method importance runs here (leave out --scheduler)")
            result = verify_importance(case, tolerances, **options)
        else:
            with _block_runner(scheduler) as map_blocks:
                result = run_verify(case, tolerances, map_blocks=map_blocks, **options)
    except CaseError as err:
        name = (err.field or "").partition("processes.")[2]
        if err.file is None and name in fields:  # a process from the file: name it there
            raise CaseError(err.problem, file=str(tolerance_file), field=fields[name]) from None
        raise
    made_by = {
        c.name: p
        for c, p in zip(case.contributors, case.making_processes(list(result.tolerances.values()), processes))
        if c.processes
    }

    if plot is not None:
        data = render_verification_plot(result, Path(plot).suffix)
        atomic_write(plot, data, protect=(case_file, tolerance_file))
    if xlsx is not None:
        from ..sheets import verification_sheets, write_workbook

        write_workbook(xlsx, verification_sheets(result, case), protect=(case_file, tolerance_file, plot))
    if as_json:
        echo_json(
            {"title": case.title, "tolerance_source": source, "model": model, "processes": made_by,
             "method": method, **result.to_dict()}
        )
    elif as_csv:
        write_csv(result.to_frame(), index_label="name")  # the CSV column keeps its name
    elif method == "importance":
        from .importance_table import print_importance

        print_importance(case, result, source, plot, made_by)
    else:
        _print_human(case, result, source, plot, made_by)
    if xlsx is not None:
        click.echo(f"wrote {xlsx}", err=as_json or as_csv)
    if result.status == "fail":  # the reason is in the output; stderr gets one short line
        failing = ", ".join(c.name for c in result.requirements if c.status == "fail")
        exit_failed(f"verification: fallout above target for {failing}")


def _ppm(value) -> str:
    """A table cell under a [ppm] header (ppb values say so)."""
    return format_ppm(value, unit=False)


def _print_human(case, result, source: str, plot, made_by: dict) -> None:
    click.echo(f"{case.title}  [{units_title(case)}]")
    click.echo(
        f"Monte Carlo: {result.samples:,} assemblies, seed {result.seed} "
        f"(repeat with --seed {result.seed}); {source}"
    )
    level = f"{result.confidence:.0%}"
    rows = []
    for c in result.requirements:
        rows.append(
            [
                c.name,
                limits_cell(c),
                f"{c.samples:,}",
                f"{_ppm(c.fallout_ppm)} [{_ppm(c.ci_low_ppm)}, {_ppm(c.ci_high_ppm)}]",
                _ppm(c.rss_ppm),
                _ppm(c.mean_shift_ppm),
                _ppm(c.convolution_ppm),
                _ppm(c.target_ppm),
                _verdict(c),
            ]
        )
    click.echo("")
    click.echo(
        text_table(
            rows,
            [
                "requirement",
                "limits",
                "samples",
                f"fallout ppm [{level} CI]",
                "rss ppm",
                "mean-shift ppm",
                "convolution ppm",
                "target ppm",
                "verdict",
            ],
        )
    )
    notes = []
    if any(not c.decided for c in result.requirements):
        notes.append(f"* target inside the {level} interval: more samples would decide")
    for c in result.requirements:
        if c.model_disagrees:
            model = "mean-shift" if c.mean_shift_ppm is not None else "rss"
            why = "linearised, normal" if not c.linear else "normal"
            notes.append(
                f"{c.name}: the {model} prediction {format_ppm(c.predicted_ppm)} lies outside the interval "
                f"(the {why} model may not fit; ~5 % of runs by chance)"
            )
        if not c.linear:
            kind = "response through closure equations" if c.through_loop else "nonlinear expression"
            notes.append(f"{c.name}: no convolution ({kind})")
        if c.undefined:
            notes.append(f"{c.name}: {c.undefined:,} assemblies with an undefined response, counted as failures")
        if c.not_closed:
            notes.append(
                f"{c.name}: {c.not_closed:,} assemblies whose loop cannot close (the closure equations "
                "have no solution near the nominal one), counted as failures"
            )
    notes += simulated_as(result, made_by)
    notes.append(
        "statistical results assume stable, capable processes with the stated distributions; "
        "check safety-critical fits worst case"
    )
    finish_notes(notes, result, plot)
