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
