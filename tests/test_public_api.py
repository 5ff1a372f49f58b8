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
    from allocator import (
        closure, economics, errors, importance, measured, offers, quotes, report, sheets, studies, supplier, workbook,
    )
    from allocator.analysis import StackAnalysis
    from allocator.simulate import Verification
    from allocator.solve.result import Allocation
    from allocator.sweep import Frontier

    for module, name in ((economics, "fallout_economics"), (supplier, "supplier_sheet"), (offers, "evaluate_offers"),
                         (report, "build_report"), (report, "write_report"), (importance, "verify_importance"),
                         (quotes, "fit_costs"), (measured, "capability"), (studies, "study"),
                         (workbook, "convert_case"), (workbook, "load_workbook_case"), (sheets, "write_workbook")):
        assert getattr(allocator, name) is getattr(module, name), name
    for cls in (Allocation, StackAnalysis, Frontier, Verification, economics.FalloutEconomics,
                supplier.SupplierSheet, offers.OfferEvaluation, offers.OfferResult, offers.Offer,
                importance.ImportanceVerification, importance.ImportanceCheck, quotes.CostFits,
                measured.CapabilityStudy, studies.Study, studies.StudyRow, closure.ResponseEvaluator):
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


# ----------------------------------------------------------------------------- documented and typed
# The modules users import directly (docs/results.md, the README's library examples); a module
# with ``__all__`` is walked through it, one without through the functions and classes it defines.
USER_MODULES = [
    "allocator.model", "allocator.case", "allocator.analysis", "allocator.stack", "allocator.chain",
    "allocator.costs", "allocator.grades", "allocator.convolve", "allocator.ppm", "allocator.errors",
    "allocator.files", "allocator.status", "allocator.display", "allocator.sweep", "allocator.simulate",
    "allocator.economics", "allocator.supplier", "allocator.offers", "allocator.solve", "allocator.solve.result",
    "allocator.report", "allocator.closure", "allocator.quotes", "allocator.measured", "allocator.workbook",
    "allocator.sheets", "allocator.caseout", "allocator.tomlout", "allocator.studies", "allocator.parallel",
    "allocator.form", "allocator.importance",
]


def _public_objects():
    """``{qualified name: function or class}`` of allocator.__all__ and USER_MODULES."""
    import inspect

    found = {f"allocator.{n}": getattr(allocator, n) for n in allocator.__all__ if n != "__version__"}
    for name in USER_MODULES:
        module = importlib.import_module(name)
        names = getattr(module, "__all__", None)
        if names is None:
            names = [n for n, obj in vars(module).items()
                     if not n.startswith("_") and (inspect.isfunction(obj) or inspect.isclass(obj))
                     and obj.__module__ == name]
        for n in names:
            obj = getattr(module, n)
            if inspect.isfunction(obj) or inspect.isclass(obj):
                found[f"{name}.{n}"] = obj
    return found


def _members(cls):
    """``(name, raw attribute)`` of the public methods and properties allocator defines on ``cls``."""
    import functools
    import inspect

    for name in dir(cls):
        if name.startswith("_"):
            continue
        owner = next(k for k in cls.__mro__ if name in k.__dict__)
        if not owner.__module__.startswith("allocator"):
            continue  # inherited from Exception, tuple, ...
        raw = owner.__dict__[name]
        if isinstance(raw, (property, functools.cached_property, staticmethod, classmethod)) or inspect.isfunction(raw):
            yield name, raw


def test_the_walk_covers_the_entry_points_and_the_result_types():
    # a walk that found nothing would pass every check below
    objects = _public_objects()
    assert len(objects) > 100
    for name in ("allocator.allocate", "allocator.Allocation", "allocator.stack.rss_sigma",
                 "allocator.costs.CurveFamily", "allocator.report.Report"):
        assert name in objects, name
    for module in USER_MODULES:  # each user module with functions or classes is walked
        if module != "allocator.status":  # status words only
            assert any(q.rsplit(".", 1)[0] == module for q in objects), module
    assert {"to_frame", "success", "to_dict"} <= {n for n, _ in _members(objects["allocator.Allocation"])}


def test_every_public_function_class_method_and_property_has_a_docstring():
    import inspect

    missing = []
    for qualified, obj in _public_objects().items():
        if inspect.isclass(obj):
            own = obj.__dict__.get("__doc__")
            # a dataclass without a docstring gets its signature as __doc__: not documentation
            if not own or own.startswith(obj.__name__ + "("):
                missing.append(qualified)
            for name, raw in _members(obj):
                if isinstance(raw, (staticmethod, classmethod)) or inspect.isfunction(raw):
                    raw = getattr(obj, name)  # getdoc follows the MRO for methods
                if inspect.getdoc(raw) is None:
                    missing.append(f"{qualified}.{name}")
        elif inspect.getdoc(obj) is None:
            missing.append(qualified)
    assert not missing, f"{len(missing)} without a docstring: {missing}"


def _untyped(qualified, function, skip_first):
    import inspect

    signature = inspect.signature(function)
    params = list(signature.parameters.values())[1 if skip_first else 0:]
    bare = [p.name for p in params if p.annotation is inspect.Parameter.empty]
    if signature.return_annotation is inspect.Signature.empty:
        bare.append("return")
    return [f"{qualified}({', '.join(bare)})"] if bare else []


def test_every_public_function_and_method_has_type_hints():
    import inspect

    missing = []
    for qualified, obj in _public_objects().items():
        if inspect.isfunction(obj):
            missing += _untyped(qualified, obj, skip_first=False)
        elif inspect.isclass(obj):
            for name, raw in _members(obj):
                if isinstance(raw, (staticmethod, classmethod)):
                    missing += _untyped(f"{qualified}.{name}", raw.__func__, isinstance(raw, classmethod))
                elif inspect.isfunction(raw):
                    missing += _untyped(f"{qualified}.{name}", raw, skip_first=True)
    assert not missing, f"{len(missing)} without full type hints: {missing}"


def test_every_exported_name_is_documented_in_the_results_page():
    # docs/results.md lists what `import allocator` exports; a name added to _LAZY without
    # its line there is missing from the page users read
    text = (ROOT / "docs/results.md").read_text(encoding="utf-8")
    missing = [name for name in allocator.__all__ if name != "__version__" and f"`{name}`" not in text]
    assert not missing, f"not in docs/results.md: {missing}"
