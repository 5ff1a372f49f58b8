"""The public names of the package stay what they are, whatever was imported before.

A submodule imported by the package sets an attribute of that name on the package, so a
public function must not share its name with a submodule (``allocator.frontier`` once
turned into the module after an allocation had imported it).
"""

import importlib
import pkgutil
import subprocess
import sys
from pathlib import Path

import allocator

ROOT = Path(__file__).resolve().parents[1]


def test_no_public_function_shares_a_name_with_a_submodule():
    submodules = {m.name for m in pkgutil.iter_modules(allocator.__path__)}
    assert not (set(allocator.__all__) & submodules)


def test_public_functions_stay_functions_after_every_module_is_imported():
    for m in pkgutil.walk_packages(allocator.__path__, "allocator."):
        if not m.name.endswith("__main__"):  # that one runs the command line
            importlib.import_module(m.name)
    for name in allocator.__all__:
        if name != "__version__":
            assert callable(getattr(allocator, name)), name
            assert not isinstance(getattr(allocator, name), type(allocator)), name


def test_frontier_after_allocate_in_a_fresh_interpreter():
    # the sequence a notebook user ran: allocate, then frontier
    code = (
        "import allocator\n"
        "case = allocator.load_case('cases/gearbox_end_play.toml')\n"
        "allocator.allocate(case, model='rss')\n"
        "f = allocator.frontier(case, models=['rss'], points=3)\n"
        "print(type(f).__name__)\n"
    )
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "Frontier"


def test_the_package_carries_its_typing_marker():
    """pyproject.toml ships allocator/py.typed (PEP 561); the file must be there to ship."""
    assert (Path(allocator.__file__).parent / "py.typed").is_file()


def test_entry_points_result_types_and_errors_are_exported_from_the_package():
    from allocator import economics, errors, report, supplier
    from allocator.analysis import StackAnalysis
    from allocator.simulate import Verification
    from allocator.solve.result import Allocation
    from allocator.sweep import Frontier

    assert allocator.fallout_economics is economics.fallout_economics
    assert allocator.supplier_sheet is supplier.supplier_sheet
    assert allocator.build_report is report.build_report
    assert allocator.write_report is report.write_report
    for cls in (Allocation, StackAnalysis, Frontier, Verification, economics.FalloutEconomics,
                supplier.SupplierSheet):
        assert getattr(allocator, cls.__name__) is cls
    for err in ("CaseError", "UsageError", "InfeasibleError"):
        assert getattr(allocator, err) is getattr(errors, err)
    assert issubclass(allocator.CaseError, ValueError) and issubclass(allocator.UsageError, ValueError)
    assert set(allocator.__all__) <= set(dir(allocator))


def test_importing_the_package_imports_no_heavy_library():
    code = "import sys, allocator; print(sorted(m for m in ('pandas', 'cvxpy', 'matplotlib', 'scipy') if m in sys.modules))"
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"
