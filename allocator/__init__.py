"""allocator: least-cost tolerance allocation for assembly stacks.

Library entry points (each works in a notebook without the command line)::

    import allocator
    case = allocator.load_case("cases/gearbox_end_play.toml")
    allocator.analyze(case).to_frame()
    allocator.allocate(case, model="rss").to_frame()

Also exported: :func:`fallout_economics`, :func:`supplier_sheet`, :func:`build_report`,
:func:`write_report`, the result types (:class:`Allocation`, :class:`StackAnalysis`,
:class:`Frontier`, :class:`Verification` ...; see docs/results.md) and the errors
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
    "build_report": ("allocator.report", "build_report"),
    "write_report": ("allocator.report", "write_report"),
    # the case and the result types (see docs/results.md)
    "Case": ("allocator.model", "Case"),
    "StackAnalysis": ("allocator.analysis", "StackAnalysis"),
    "RequirementAnalysis": ("allocator.analysis", "RequirementAnalysis"),
    "Allocation": ("allocator.solve.result", "Allocation"),
    "RequirementResult": ("allocator.solve.result", "RequirementResult"),
    "Frontier": ("allocator.sweep", "Frontier"),
    "Verification": ("allocator.simulate", "Verification"),
    "RequirementCheck": ("allocator.simulate", "RequirementCheck"),
    "FalloutEconomics": ("allocator.economics", "FalloutEconomics"),
    "FalloutOptimum": ("allocator.economics", "FalloutOptimum"),
    "SupplierSheet": ("allocator.supplier", "SupplierSheet"),
    "Loosening": ("allocator.supplier", "Loosening"),
    "Report": ("allocator.report", "Report"),
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
