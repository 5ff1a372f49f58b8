"""Computing a report: every library result the HTML shows, in one :class:`Report`.

:func:`build_report` runs the library once (:func:`allocator.analysis.analyze`,
:func:`allocator.solve.allocate` per model, :func:`allocator.sweep.frontier`,
:func:`allocator.simulate.verify`, :func:`allocator.supplier.supplier_sheet`) and keeps the
results (and, when the case or the caller names supplier offers,
:func:`allocator.offers.evaluate_offers`). Nothing here writes HTML: :meth:`Report.to_html` hands the results to
:mod:`.sections`, which only formats them.
"""

from __future__ import annotations

import os
import platform
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

from .. import status as _status
from ..errors import UsageError
from .figures import contributions_svg, frontier_svg, inline_svg, verification_svg
from .html import MODEL_LABELS
from .outline import SECTIONS, working_on
from .sections import document, has_shadow_prices

if TYPE_CHECKING:
    from ..model import Case

# order of preference for the allocation the report recommends (most conservative first)
_PREFERENCE = ("mean-shift", "rss", "convolution", "worst-case")

# libraries whose versions the report lists for reproducibility
VERSION_PACKAGES = ("numpy", "scipy", "cvxpy", "pandas", "matplotlib")


@dataclass(frozen=True)
class Report:
    """Everything the HTML report shows, as the library computed it.

    Attributes
    ----------
    case : Case
    models : tuple of str
    analysis : StackAnalysis
        The current design (the case's ``tolerance`` values).
    allocations : dict
        Model -> :class:`~allocator.solve.Allocation`.
    recommended : str or None
        The model whose allocation the report recommends (see :func:`recommended_model`).
    recommended_analysis : StackAnalysis or None
        Stack analysis at the recommended allocation.
    frontier : Frontier or None
    frontier_message : str
        Why there is no frontier, when there is none.
    verification : Verification
    verification_basis : str
        ``'allocation'`` (the recommended allocation) or ``'current'``.
    supplier : SupplierSheet or None
    samples, seed : int
    created : datetime
        UTC time the report was built.
    versions : dict
        Python and library versions used.
    frontier_points, include_frontier
        The frontier options the report was built with.
    unrounded : dict
        Model -> allocation of the case without its ``[allocation].rounding``, solved only
        for the shadow prices a rounded allocation cannot have (its cost moves in steps).
    offers : OfferEvaluation or None
        The supplier offers under discussion (the case's ``[[offer]]`` tables, or the
        ``offers`` given to :func:`build_report`); None when there are none.
    """

    case: object
    models: tuple
    analysis: object
    allocations: dict
    recommended: str | None
    recommended_analysis: object
    frontier: object
    frontier_message: str
    verification: object
    verification_basis: str
    supplier: object
    samples: int
    seed: int
    created: datetime
    versions: dict = field(default_factory=dict)
    frontier_points: int | None = None
    include_frontier: bool = True
    unrounded: dict = field(default_factory=dict)
    offers: object = None

    # ------------------------------------------------------------------ status

    @property
    def problems(self) -> list[str]:
        """One line per thing that went wrong (infeasible models, failed verification)."""
        out = [
            f"{MODEL_LABELS.get(m, m)}: {a.status}: {a.message}"
            for m, a in self.allocations.items()
            if not a.success
        ]
        if self.verification_basis == "allocation" and not self.verification.success:
            note = self.verification.assumption_note
            out.append(
                f"verification of the {MODEL_LABELS.get(self.recommended)} allocation: {self.verification.message}"
                + (f" ({note})" if note else "")
            )
        return out

    @property
    def status(self) -> str:
        """'ok', 'infeasible' (some model cannot meet a requirement), 'failed' or
        'verification failed' (:data:`allocator.status.REPORT`)."""
        statuses = {a.status for a in self.allocations.values()}
        if _status.INFEASIBLE in statuses:
            return _status.INFEASIBLE
        if _status.FAILED in statuses:
            return _status.FAILED
        if self.verification_basis == "allocation" and not self.verification.success:
            return _status.VERIFICATION_FAILED
        return _status.OK

    @property
    def success(self) -> bool:
        """True when ``status`` is 'ok' (:data:`allocator.status.REPORT`)."""
        return self.status == _status.OK

    @property
    def exit_code(self) -> int:
        """0 when every allocation is optimal and its verification passes, else 1."""
        return 0 if self.success else 1

    @property
    def section_ids(self) -> tuple[str, ...]:
        """HTML ids of the report's sections, in order."""
        return tuple(s for s, _ in SECTIONS)

    @property
    def headings(self) -> tuple[str, ...]:
        """Headings of the report's sections, in order."""
        return tuple(h for _, h in SECTIONS)

    def __repr__(self) -> str:
        return (
            f"Report({self.case.title!r}, status={self.status!r}, models={list(self.models)}, "
            f"recommended={self.recommended!r}, samples={self.samples}, seed={self.seed})"
        )

    # ------------------------------------------------------------------ figures

    def figures(self) -> dict[str, str]:
        """Section id -> inline SVG markup of its plot (only sections that have one)."""
        out = {}
        if self.frontier is not None:
            with working_on("frontier"):
                out["frontier"] = inline_svg(frontier_svg(self), "fr", "Cost frontier plot")
        with working_on("contributions"):
            out["contributions"] = inline_svg(contributions_svg(self), "co", "Contributions to variation, horizontal bars")
        with working_on("verification"):
            out["verification"] = inline_svg(verification_svg(self), "mc", "Monte Carlo histogram of each requirement")
        return out

    # ------------------------------------------------------------------ html

    def to_html(self) -> str:
        """The report as one self-contained HTML document (:func:`allocator.report.sections.document`).

        Raises
        ------
        InternalError
            Formatting a section failed unexpectedly (names the section).
        """
        return document(self, self.figures())


def recommended_model(allocations: dict) -> str | None:
    """The model whose allocation the report recommends.

    The most conservative optimal statistical allocation (mean shift before RSS, RSS
    before the exact convolution model, whose lighter tails usually allow more), else
    the worst-case allocation, else None. This is the report's default, stated in the
    report; it is not an engineering judgement about the product.
    """
    for model in _PREFERENCE:
        a = allocations.get(model)
        if a is not None and a.success:
            return model
    return None


def build_report(
    case: Case,
    models: Sequence[str] | None = None,
    *,
    samples: int = 200_000,
    seed: int = 0,
    frontier_points: int | None = None,
    include_frontier: bool = True,
    created: datetime | None = None,
    progress: bool = False,
    offers: Sequence | None = None,
) -> Report:
    """Run the library for a report on ``case``.

    Parameters
    ----------
    case : allocator.model.Case
    models : sequence of str, optional
        Stack models to allocate with; default the case's ``[allocation].models``.
    samples : int
        Monte Carlo assemblies for the verification [-].
    seed : int
        Seed of the verification (the report is reproducible with the same seed).
    frontier_points : int, optional
        Points of the cost frontier; default the case's ``[frontier].points``.
    include_frontier : bool
        False leaves the frontier out (section 4 says so): every point is a full
        allocation, which takes a while for cases with process choices.
    created : datetime, optional
        Time stamp to print (default: now, UTC).
    progress : bool
        Show progress bars on stderr for the frontier and the verification (the command
        line passes ``sys.stderr.isatty()``).
    offers : sequence of Offer or str, optional
        Supplier offers to discuss (``NAME=T@PRICE`` texts or
        :class:`~allocator.model.Offer`); default the case's ``[[offer]]`` tables. With
        offers the supplier section gains "Offers under discussion".

    Returns
    -------
    Report
        Holds every library result; :meth:`Report.to_html` formats them.

    Raises
    ------
    CaseError, UsageError
        Bad input (as the library functions raise them).
    InternalError
        A computation failed unexpectedly (names the section); never shown as text in
        the report.
    """
    from .. import __version__
    from ..analysis import analyze
    from ..simulate import verify
    from ..solve import allocate
    from ..supplier import supplier_sheet

    models = tuple(dict.fromkeys(models or case.allocation.models))
    if offers or case.offers:
        from ..offers import check_offers

        offers = check_offers(case, offers or None)  # bad input: before any long computation
    allocations = {}
    for m in models:
        with working_on("allocation", f"model {m}"):
            allocations[m] = allocate(case, m)
    recommended = recommended_model(allocations)
    with working_on("analysis"):
        analysis = analyze(case)
    rec_alloc = allocations.get(recommended)
    with working_on("allocation"):
        recommended_analysis = (
            analyze(case, dict(rec_alloc.tolerances), processes=rec_alloc.processes) if rec_alloc is not None else None
        )

    with working_on("shadow-prices"):
        unrounded = _unrounded_allocations(case, allocations)

    if include_frontier:
        with working_on("frontier"):
            frontier, frontier_message = _run_frontier(case, models, frontier_points, progress)
    else:
        frontier, frontier_message = None, "left out of this report on request"

    with working_on("verification"):
        if rec_alloc is not None:
            # the allocation carries its processes: each part simulated with its process's cp
            verification = verify(case, rec_alloc, samples=samples, seed=seed, allocated_with=recommended,
                                  progress=progress)
            basis = "allocation"
        else:
            verification = verify(case, None, samples=samples, seed=seed, progress=progress)
            basis = "current"

    with working_on("supplier"):
        supplier = supplier_sheet(case, recommended, allocation=rec_alloc) if rec_alloc is not None else None
    offered = None
    if offers or case.offers:
        from ..offers import evaluate_offers

        with working_on("supplier", "offers under discussion"):
            offered = evaluate_offers(case, offers or None, models)

    return Report(
        case=case,
        models=models,
        analysis=analysis,
        allocations=allocations,
        recommended=recommended,
        recommended_analysis=recommended_analysis,
        frontier=frontier,
        frontier_message=frontier_message,
        verification=verification,
        verification_basis=basis,
        supplier=supplier,
        samples=int(samples),
        seed=int(seed),
        created=created or datetime.now(timezone.utc).replace(microsecond=0),
        versions=_versions(__version__),
        frontier_points=frontier_points,
        include_frontier=include_frontier,
        unrounded=unrounded,
        offers=offered,
    )


def write_report(
    case: Case, path: str | os.PathLike, models: Sequence[str] | None = None, **kwargs: Any
) -> Report:
    """Build the report and write its HTML to ``path`` atomically.

    Refuses to overwrite the case file itself (:class:`~allocator.errors.UsageError`),
    checked before any work is done. Returns the :class:`Report`.
    """
    from ..files import atomic_write, check_output_path

    target = check_output_path(Path(path), protect=(case.path,), input_name="input case file")
    report = build_report(case, models, **kwargs)
    atomic_write(target, report.to_html(), protect=(case.path,))
    return report


def _unrounded_allocations(case, allocations) -> dict:
    """For rounded allocations without shadow prices: the same model's unrounded optimum.

    Rounding to a step makes the allocation a choice among listed values, whose cost has
    no derivative; the unrounded optimum of the same case (which the rounded allocation
    carries as ``unrounded``) does have one, and its shadow prices are what the limits
    are worth at the margin before rounding.
    """
    if case.allocation.rounding is None:
        return {}
    out = {}
    for model, result in allocations.items():
        unrounded = result.unrounded
        if result.success and not has_shadow_prices(result) and unrounded is not None:
            if unrounded.success and has_shadow_prices(unrounded):
                out[model] = unrounded
    return out


def _run_frontier(case, models, points, progress=False):
    """The cost frontier and its note ("" when there is none to make).

    A sweep the case's ``[frontier]`` settings cannot support (a range on the wrong side
    of the other limit, say) is bad input: the :class:`~allocator.errors.UsageError` names
    the report section and the report is not written.
    """
    from ..sweep import frontier

    kwargs = {"models": models, "progress": progress}
    if points is not None:
        kwargs["points"] = points
    try:
        return frontier(case, **kwargs), ""
    except UsageError as err:
        raise UsageError(f"report section '{dict(SECTIONS)['frontier']}': {err}") from err


def _versions(own: str) -> dict:
    from importlib import metadata

    out = {"allocator": own, "python": platform.python_version()}
    for name in VERSION_PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


