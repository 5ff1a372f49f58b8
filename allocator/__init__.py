"""allocator: least-cost tolerance allocation for assembly stacks.

Library entry points (each works in a notebook without the command line)::

    import allocator
    case = allocator.load_case("cases/gearbox_end_play.toml")
    allocator.analyze(case).to_frame()
    allocator.allocate(case, model="rss").to_frame()

Also exported: :func:`fallout_economics`, :func:`supplier_sheet`, :func:`evaluate_offers`,
:func:`build_report`, :func:`write_report`, :func:`study` (many cases at once),
:func:`convert_case`, :func:`load_workbook_case` and :func:`write_workbook` (.xlsx workbooks,
docs/spreadsheets.md), the result types (:class:`Allocation`, :class:`StackAnalysis`,
:class:`Frontier`, :class:`Verification`, :class:`OfferEvaluation`, :class:`Study` ...; see
docs/results.md) and the errors
:class:`CaseError`, :class:`UsageError` (both ValueError) and :class:`InfeasibleError`.

Heavy libraries (cvxpy, matplotlib, pandas) are imported lazily, on first use.
"""

from __future__ import annotations

__version__ = "0.1.0"

_LAZY = {
    # entry points
    "load_case": ("allocator.case", "load_case"),
    "loads_case": ("allocator.case", "loads_case"),
    "analyze": ("allocator.analysis", "analyze"),
    "allocate": ("allocator.solve", "allocate"),
    "frontier": ("allocator.sweep", "frontier"),
    "verify": ("allocator.simulate", "verify"),
    "verify_importance": ("allocator.importance", "verify_importance"),
    "fallout_economics": ("allocator.economics", "fallout_economics"),
    "supplier_sheet": ("allocator.supplier", "supplier_sheet"),
    "evaluate_offers": ("allocator.offers", "evaluate_offers"),
    "fit_costs": ("allocator.quotes", "fit_costs"),
    "capability": ("allocator.measured", "capability"),
    "build_report": ("allocator.report", "build_report"),
    "write_report": ("allocator.report", "write_report"),
    "study": ("allocator.studies", "study"),
    "convert_case": ("allocator.workbook", "convert_case"),
    "load_workbook_case": ("allocator.workbook", "load_workbook_case"),
    "write_workbook": ("allocator.sheets", "write_workbook"),
    # the case and the result types (see docs/results.md)
    "Case": ("allocator.model", "Case"),
    "StackAnalysis": ("allocator.analysis", "StackAnalysis"),
    "RequirementAnalysis": ("allocator.analysis", "RequirementAnalysis"),
    "Allocation": ("allocator.solve.result", "Allocation"),
    "RequirementResult": ("allocator.solve.result", "RequirementResult"),
    "Frontier": ("allocator.sweep", "Frontier"),
    "Verification": ("allocator.simulate", "Verification"),
    "RequirementCheck": ("allocator.simulate", "RequirementCheck"),
    "ImportanceVerification": ("allocator.importance", "ImportanceVerification"),
    "ImportanceCheck": ("allocator.importance", "ImportanceCheck"),
    "FalloutEconomics": ("allocator.economics", "FalloutEconomics"),
    "FalloutOptimum": ("allocator.economics", "FalloutOptimum"),
    "SupplierSheet": ("allocator.supplier", "SupplierSheet"),
    "Loosening": ("allocator.supplier", "Loosening"),
    "OfferEvaluation": ("allocator.offers", "OfferEvaluation"),
    "OfferResult": ("allocator.offers", "OfferResult"),
    "Offer": ("allocator.model", "Offer"),
    "CostFits": ("allocator.quotes", "CostFits"),
    "CapabilityStudy": ("allocator.measured", "CapabilityStudy"),
    "Report": ("allocator.report", "Report"),
    "Study": ("allocator.studies", "Study"),
    "StudyRow": ("allocator.studies", "StudyRow"),
    "ResponseEvaluator": ("allocator.closure", "ResponseEvaluator"),
    # errors (CaseError and UsageError are ValueError subclasses)
    "CaseError": ("allocator.errors", "CaseError"),
    "UsageError": ("allocator.errors", "UsageError"),
    "InfeasibleError": ("allocator.errors", "InfeasibleError"),
}

__all__ = ["__version__", *_LAZY]


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        module, attr = _LAZY[name]
        return getattr(importlib.import_module(module), attr)
    raise AttributeError(f"module 'allocator' has no attribute {name!r}")
