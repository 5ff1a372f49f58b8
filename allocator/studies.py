"""Cost-reduction studies over many designs: every case allocated, one row per case and model.

:func:`study` allocates each case file with :func:`allocator.solve.allocate` (the same call,
the same numbers as allocating that case alone) and keeps, per case and stack model, what a
cost-reduction review asks first: the current and the least cost per assembly, the saving
per assembly and per year (where the case gives a volume), the requirements that bind and
the three contributors whose tolerances the requirements price highest.

The cases run in parallel, each loaded and allocated by a worker from its file
(:mod:`allocator.parallel`: local processes, or a Dask cluster); workers send back plain
rows, never solver objects. A case that cannot be read, or that a model cannot take, gives
its one-line message in its row (status ``bad input``); an infeasible case gives its reason;
the study goes on either way.

Cautions: the costs are those of the cases' cost curves; statistical models assume stable,
capable processes; safety-critical fits are checked worst case and against the applicable
codes and a licensed engineering review.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from . import status as _status
from .errors import AllocatorError, CaseError, InternalError, UsageError, unknown_names
from .model import MODELS

if TYPE_CHECKING:
    import pandas as pd

    from .model import Case
    from .solve.result import Allocation

__all__ = ["STATUSES", "TOP_CONTRIBUTORS", "Study", "StudyRow", "case_files", "contributor_prices", "study"]

STATUSES = _status.STUDY
"""A study row's and a whole study's status words (see :mod:`allocator.status`)."""
TOP_CONTRIBUTORS = 3
CASE_SUFFIX = ".toml"
# the table and frame columns, in order (binding and prices as text in the frame)
COLUMNS = (
    "file", "title", "model", "status", "current_cost", "total_cost", "saving", "saving_percent",
    "volume", "saving_per_year", "currency", "binding", "largest_prices", "message",
)


@dataclass(frozen=True)
class StudyRow:
    """One case under one stack model.

    Attributes
    ----------
    file : str
        The case file as given (inside a folder: folder/name.toml).
    title : str
        The case's title ('' when it could not be read).
    model : str or None
        The stack model; None for a case that could not be read.
    status : str
        'optimal', 'infeasible', 'failed' (as the allocation's) or 'bad input'.
    message : str
        The allocation's message, or the one-line error of a bad case.
    current_cost : float or None
        Assembly cost at the case's current tolerances [currency].
    total_cost : float or None
        Least assembly cost (None unless solved) [currency].
    saving : float or None
        ``current_cost − total_cost`` per assembly [currency].
    saving_percent : float or None
        The saving as % of the current cost [%].
    volume : float or None
        Assemblies per year (the case's ``[economics] volume``).
    saving_per_year : float or None
        ``saving × volume`` [currency/year]; None without a volume.
    currency : str
        The case's currency label.
    binding : tuple of str
        The requirements whose limits the optimum presses against, each with the limit:
        ``'end_play (upper)'``. For a rounded allocation, those of its unrounded optimum
        (as its prices).
    largest_prices : tuple of (str, float)
        Up to three contributors with the largest shadow price of their tolerance
        (:func:`contributor_prices`), largest first [currency/length].
    """

    file: str
    title: str
    model: str | None
    status: str
    message: str
    current_cost: float | None = None
    total_cost: float | None = None
    saving: float | None = None
    saving_percent: float | None = None
    volume: float | None = None
    saving_per_year: float | None = None
    currency: str = ""
    binding: tuple[str, ...] = ()
    largest_prices: tuple[tuple[str, float], ...] = ()

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal'."""
        return self.status == _status.OPTIMAL

    def to_dict(self) -> dict:
        """JSON-ready dict; the contract keys are file, model, status, total_cost, current_cost."""
        return {
            "file": self.file,
            "title": self.title,
            "model": self.model,
            "status": self.status,
            "message": self.message,
            "total_cost": self.total_cost,
            "current_cost": self.current_cost,
            "saving": self.saving,
            "saving_percent": self.saving_percent,
            "volume": self.volume,
            "saving_per_year": self.saving_per_year,
            "currency": self.currency,
            "binding": list(self.binding),
            "largest_prices": [{"contributor": n, "shadow_price": p} for n, p in self.largest_prices],
        }

    def flat(self) -> dict:
        """One flat dict per row (binding and prices as text): the frame's and CSV's columns."""
        out = self.to_dict()
        out["binding"] = "; ".join(self.binding)
        out["largest_prices"] = "; ".join(f"{n} {p:.6g}" for n, p in self.largest_prices)
        return {c: out[c] for c in COLUMNS}


@dataclass(frozen=True)
class StudyTotal:
    """The sums over the solved rows of one stack model and currency.

    Attributes
    ----------
    model : str
    currency : str
    cases : int
        Rows of this model and currency.
    solved : int
        Of which optimal (the sums are over these).
    current_cost, total_cost, saving : float
        Sums per assembly over the solved rows [currency] (one assembly of each design).
    saving_per_year : float or None
        Sum over the solved rows with a volume [currency/year]; None when none has one.
    with_volume : int
        Solved rows with a volume.
    """

    model: str
    currency: str
    cases: int
    solved: int
    current_cost: float
    total_cost: float
    saving: float
    saving_per_year: float | None
    with_volume: int

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass(frozen=True)
class Study:
    """The allocation of many cases: one :class:`StudyRow` per case and model, and totals.

    Attributes
    ----------
    status : str
        'bad input' when some case could not be read or allocated as asked, else
        'infeasible' when some row is infeasible, else 'failed' when some solver gave no
        verified optimum, else 'optimal'.
    success : bool
        ``status == 'optimal'``.
    message : str
    rows : tuple of StudyRow
        In the order of the case files, then of the models.
    totals : tuple of StudyTotal
        Per model and currency, in order of first appearance.
    files : tuple of str
        The case files, as given.
    """

    status: str
    message: str
    rows: tuple[StudyRow, ...]
    totals: tuple[StudyTotal, ...]
    files: tuple[str, ...]

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal'."""
        return self.status == _status.OPTIMAL

    @property
    def exit_code(self) -> int:
        """2 if some case was bad input, else 1 if some row is infeasible or failed, else 0."""
        if self.status == _status.BAD_INPUT:
            return 2
        return 0 if self.success else 1

    def to_frame(self) -> pd.DataFrame:
        """One row per case and model (columns :data:`COLUMNS`; binding and prices as text)."""
        import pandas as pd

        return pd.DataFrame([r.flat() for r in self.rows], columns=list(COLUMNS))

    def totals_frame(self) -> pd.DataFrame:
        """One row per model and currency: the sums of :attr:`totals`."""
        import pandas as pd

        columns = ["model", "currency", "cases", "solved", "current_cost", "total_cost", "saving",
                   "saving_per_year", "with_volume"]
        return pd.DataFrame([t.to_dict() for t in self.totals], columns=columns)

    def frames(self) -> dict[str, pd.DataFrame]:
        """The study's tables by name (``cases``, ``totals``): what a spreadsheet of it holds."""
        return {"cases": self.to_frame(), "totals": self.totals_frame()}

    def to_dict(self) -> dict:
        """JSON-ready dict: ``{"status", "message", "cases": [...], "totals": [...]}``."""
        return {
            "status": self.status,
            "success": self.success,
            "message": self.message,
            "cases": [r.to_dict() for r in self.rows],
            "totals": [t.to_dict() for t in self.totals],
        }

    def _repr_html_(self) -> str:
        from .display import result_html

        return result_html(f"Study of {len(self.files)} cases: {self.status}", self.to_frame(), self.message)

    def __repr__(self) -> str:
        return f"Study(status={self.status!r}, cases={len(self.files)}, rows={len(self.rows)}, message={self.message!r})"


# --------------------------------------------------------------------------- shadow prices


def contributor_prices(case: Case, allocation: Allocation) -> dict[str, float]:
    """The shadow price of each contributor's tolerance at an optimal allocation.

    Parameters
    ----------
    case : allocator.model.Case
    allocation : Allocation
        An optimal allocation of ``case``; with rounding, its unrounded optimum is used
        (a rounded cost moves in steps and has no derivative).

    Returns
    -------
    dict
        Contributor name -> ``−count · C'(t)`` at the allocated ± tolerance
        [currency/length], for the contributors the requirements hold tighter than their
        loosest limit; fixed and held contributors, those at their loosest limit and
        those costed by a ``choose`` table (no derivative) are left out. Empty when the
        allocation is not optimal.

    Notes
    -----
    At the optimum, every free contributor strictly inside its limits satisfies
    ``count_i · C_i'(t_i) + Σ_j λ_j ∂g_j/∂t_i = 0`` (Karush-Kuhn-Tucker stationarity), so
    ``−count_i · C_i'(t_i)`` is the price the binding requirements put on one unit more
    tolerance for that part: the cost per assembly it would save per unit of tolerance,
    if the requirements let it loosen. At the tightest limit it is a lower bound of that
    price (the limit takes the rest). The largest of these are the parts whose
    tolerances drive the assembly's cost.
    """
    allocation = _priced(allocation)
    if not allocation.success or allocation.total_cost is None:
        return {}
    prices = {}
    for row in allocation.rows():
        name = row["contributor"]
        if row["bound"] in ("fixed", "loosest") or name in allocation.held:
            continue
        contributor = case.contributor(name)
        options = {p.name: p for p in contributor.options()}
        process = options.get(row["process"] or "", contributor.options()[0])
        curve = process.cost
        if curve is None or curve.is_discrete:
            continue
        prices[name] = -row["count"] * float(curve.derivative(row["allocated"]))
    return prices


def _largest(prices: dict[str, float], k: int = TOP_CONTRIBUTORS) -> tuple[tuple[str, float], ...]:
    """The ``k`` largest prices, largest first (ties in case order)."""
    ranked = sorted(prices.items(), key=lambda item: -item[1])
    return tuple((name, price) for name, price in ranked[:k])


# --------------------------------------------------------------------------- one case (on a worker)


def _bad_row(file: str, err: AllocatorError, model: str | None = None, title: str = "") -> StudyRow:
    message = str(err)
    if isinstance(err, CaseError):  # name the file as the user gave it, not as the worker read it
        message = str(CaseError(err.problem, file=file, field=err.field))
    elif not message.startswith(file):
        message = f"{file}: {message}"
    return StudyRow(file=file, title=title, model=model, status=_status.BAD_INPUT, message=message)


def _priced(allocation: Allocation) -> Allocation:
    """The allocation whose margins are priced: a rounded one's unrounded optimum (the
    rounded cost moves in steps and has no derivative), else itself."""
    unrounded = allocation.unrounded
    if allocation.success and unrounded is not None and unrounded.success:
        return unrounded
    return allocation


def _row(file: str, case: Case, allocation: Allocation) -> StudyRow:
    volume = case.economics.volume
    priced = _priced(allocation)
    saving = allocation.savings
    if saving is not None and not math.isfinite(saving):
        saving = None
    return StudyRow(
        file=file,
        title=case.title,
        model=allocation.model,
        status=allocation.status,
        message=allocation.message,
        current_cost=allocation.current_cost if math.isfinite(allocation.current_cost) else None,
        total_cost=allocation.total_cost,
        saving=saving,
        saving_percent=allocation.savings_percent if saving is not None else None,
        volume=None if volume is None else float(volume),
        saving_per_year=None if saving is None or volume is None else saving * float(volume),
        currency=case.currency,
        binding=tuple(f"{r.name} ({r.binding})" for r in priced.requirements if r.binding) if priced.success else (),
        largest_prices=_largest(contributor_prices(case, priced)),
    )


def study_case(job: tuple[str, str, tuple[str, ...]]) -> list[StudyRow]:
    """Load one case file and allocate it with each model: the rows of that case.

    Runs on a worker (module level, so that it pickles). ``job`` is ``(file as given,
    path to read, models)``; empty models: the case's ``[allocation].models``. Bad input
    becomes a 'bad input' row; anything else unexpected propagates (a bug).
    """
    from .case import load_case
    from .solve import allocate

    file, path, models = job
    try:
        case = load_case(path)
    except AllocatorError as err:
        return [_bad_row(file, err)]
    rows = []
    for model in models or tuple(case.allocation.models):
        try:
            allocation = allocate(case, model)
        except AllocatorError as err:  # e.g. a model the case cannot take
            rows.append(_bad_row(file, err, model, case.title))
            continue
        rows.append(_row(file, case, allocation))
    return rows


# --------------------------------------------------------------------------- the study


def case_files(paths: Iterable[str | os.PathLike]) -> tuple[str, ...]:
    """The case files named by ``paths``: files as given, folders as their ``*.toml`` files.

    A folder gives the ``.toml`` files directly inside it, sorted by name; a file named
    twice (or once directly and once through its folder) is studied once.

    Raises
    ------
    UsageError
        No paths, or a folder without a ``.toml`` file.
    """
    out, seen = [], set()
    for given in paths:
        text = os.fspath(given)
        path = Path(text)
        if path.is_dir():
            found = sorted(p for p in path.iterdir() if p.suffix == CASE_SUFFIX and p.is_file())
            if not found:
                raise UsageError(f"{text}: no case files (*{CASE_SUFFIX}) in this folder")
            names = [str(p) for p in found]
        else:
            names = [text]
        for name in names:
            key = os.path.realpath(name)
            if key not in seen:
                seen.add(key)
                out.append(name)
    if not out:
        raise UsageError("no case files given")
    return tuple(out)


def _checked_models(models) -> tuple[str, ...]:
    if isinstance(models, str):
        models = (models,)
    models = tuple(dict.fromkeys(models or ()))
    problem = unknown_names("model", models, MODELS)
    if problem:
        raise UsageError(problem)
    return models


def _totals(rows: Sequence[StudyRow]) -> tuple[StudyTotal, ...]:
    groups: dict[tuple[str, str], list[StudyRow]] = {}
    for r in rows:
        if r.model is not None:
            groups.setdefault((r.model, r.currency), []).append(r)
    totals = []
    for (model, currency), members in groups.items():
        solved = [r for r in members if r.success and r.total_cost is not None and r.current_cost is not None]
        yearly = [r.saving_per_year for r in solved if r.saving_per_year is not None]
        totals.append(
            StudyTotal(
                model=model,
                currency=currency,
                cases=len(members),
                solved=len(solved),
                current_cost=math.fsum(r.current_cost for r in solved),
                total_cost=math.fsum(r.total_cost for r in solved),
                saving=math.fsum(r.saving for r in solved),
                saving_per_year=math.fsum(yearly) if yearly else None,
                with_volume=len(yearly),
            )
        )
    return tuple(totals)


def _verdict(rows: Sequence[StudyRow], files: Sequence[str]) -> tuple[str, str]:
    def listed(word):
        return sorted({r.file for r in rows if r.status == word})

    for word in (_status.BAD_INPUT, _status.INFEASIBLE, _status.FAILED):
        named = listed(word)
        if named:
            shown = ", ".join(named[:3]) + (f" and {len(named) - 3} more" if len(named) > 3 else "")
            return word, f"{len(named)} of {len(files)} cases {word}: {shown}"
    return _status.OPTIMAL, f"every case solved under every model ({len(files)} cases, {len(rows)} rows)"


def study(
    cases: Iterable[str | os.PathLike] | str | os.PathLike,
    models: Sequence[str] | str = (),
    workers: int | None = None,
    scheduler: str | None = None,
    progress: bool = False,
) -> Study:
    """Allocate every case and tabulate the savings: a cost-reduction study of many designs.

    Parameters
    ----------
    cases : path or iterable of paths
        Case files and folders (a folder: its ``*.toml`` files, sorted by name).
    models : sequence of str or str
        Stack models to allocate each case with ('worst-case', 'rss', 'mean-shift');
        empty: each case's own ``[allocation].models``.
    workers : int or None
        Local processes (default: the number of processors; 1 runs in this process).
    scheduler : str or None
        Address of a Dask distributed scheduler (``tcp://host:port``) to run the cases on
        instead; needs the ``cluster`` extra. Its workers must read the case files at the
        same (absolute) paths.
    progress : bool
        A progress bar on stderr (the command line passes ``sys.stderr.isatty()``).

    Returns
    -------
    Study
        Rows in the order of the files, then of the models; a case that is bad input or
        infeasible has its message in its row.

    Raises
    ------
    UsageError
        An unknown model, no case files, an empty folder, ``workers`` < 1 or with a
        scheduler, dask missing or a scheduler that does not answer.
    InternalError
        A case failed unexpectedly (a bug); names the case file.

    Notes
    -----
    Each worker loads its case from the file and calls :func:`allocator.solve.allocate`,
    exactly as allocating the case alone, so every number equals that of a lone run
    whatever the number of workers or where they run.

    Examples
    --------
    >>> result = study(["cases/gearbox_end_play.toml"], models=["rss"], workers=1)
    >>> result.status, [(r.model, r.status) for r in result.rows]
    ('optimal', [('rss', 'optimal')])
    >>> bool(result.rows[0].saving_per_year == result.rows[0].saving * result.rows[0].volume)
    True
    """
    from .parallel import default_workers, runner
    from .progress import progress_bar

    if isinstance(cases, (str, os.PathLike)):
        cases = [cases]
    models = _checked_models(models)
    files = case_files(cases)
    jobs = [(f, os.path.abspath(f), models) for f in files]
    if scheduler is None:  # no more processes than cases
        workers = min(default_workers() if workers is None else workers, len(jobs))
    rows: list[StudyRow] = []
    bar = None
    try:
        with runner(workers, scheduler) as run:
            results = run(study_case, jobs)
            # the bar (and its redraw thread) only once the local workers have started
            bar = progress_bar(len(jobs), desc="study", unit="case", enabled=progress, slow=True)
            for file in files:
                try:
                    case_rows = next(results)
                except (AllocatorError, KeyboardInterrupt):
                    raise
                except Exception as err:  # a bug while solving this case: exit 3, named
                    raise InternalError(f"case {file}", err) from err
                rows.extend(case_rows)
                bar.describe(Path(file).name)
                bar.update(1)
    finally:
        if bar is not None:
            bar.close()
    status, message = _verdict(rows, files)
    return Study(status=status, message=message, rows=tuple(rows), totals=_totals(rows), files=files)
