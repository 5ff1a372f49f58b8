"""allocator: least-cost tolerance allocation for assembly stacks.

Library entry points (each works in a notebook without the command line)::

    import allocator
    case = allocator.load_case("cases/gearbox_end_play.toml")
    allocator.analyze(case).to_frame()
    allocator.allocate(case, model="rss").to_frame()

Heavy libraries (cvxpy, matplotlib, pandas) are imported lazily, on first use.
"""

from __future__ import annotations

__version__ = "0.1.0"

_LAZY = {
    "load_case": ("allocator.case", "load_case"),
    "loads_case": ("allocator.case", "loads_case"),
    "analyze": ("allocator.analysis", "analyze"),
    "allocate": ("allocator.solve", "allocate"),
    "frontier": ("allocator.sweep", "frontier"),
    "verify": ("allocator.simulate", "verify"),
    "CaseError": ("allocator.errors", "CaseError"),
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        module, attr = _LAZY[name]
        return getattr(importlib.import_module(module), attr)
    raise AttributeError(f"module 'allocator' has no attribute {name!r}")
