"""Work run elsewhere (allocator.parallel) and Monte Carlo blocks tallied elsewhere.

The reference for every check is the same work done in a plain loop in this process:
results must come back in the order of the items, and a verification whose chunks of stream
blocks are simulated by a runner must equal, bit for bit, the run without one (each block
draws from its own SeedSequence child, and the float sums are added in block order).
The case is an invented demo case. The Dask cluster checks are in tests/test_study.py.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

import allocator
from allocator.cli.main import cli
from allocator.errors import UsageError
from allocator.parallel import local_runner, runner

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "cases" / "gearbox_end_play.toml"


def square(x):
    return x * x


def same(a, b) -> bool:
    """Two verifications equal in every number (histograms included), chunk size aside."""
    left, right = a.to_dict(), b.to_dict()
    left.pop("chunk_size"), right.pop("chunk_size")
    return json.dumps(left, default=list, sort_keys=True) == json.dumps(right, default=list, sort_keys=True)


@pytest.mark.parametrize("workers", [1, 2])
def test_runners_return_results_in_the_order_of_the_items(workers):
    with local_runner(workers) as run:
        assert list(run(square, range(7, -1, -1))) == [x * x for x in range(7, -1, -1)]


def test_runner_refuses_workers_below_one_and_workers_with_a_scheduler():
    with pytest.raises(UsageError, match="at least 1"):
        with local_runner(0):
            pass
    with pytest.raises(UsageError, match="not both"):
        with runner(2, "tcp://127.0.0.1:8786"):
            pass


@pytest.fixture(scope="module")
def case():
    return allocator.load_case(DEMO)


def test_blocks_tallied_by_a_runner_are_bit_identical_to_a_plain_run(case):
    plain = allocator.verify(case, samples=300_000, seed=3)
    in_loop = allocator.verify(case, samples=300_000, seed=3, chunk_size=2**16,
                               map_blocks=lambda f, items: map(f, items))
    assert same(plain, in_loop)
    with local_runner(2) as run:
        pooled = allocator.verify(case, samples=300_000, seed=3, chunk_size=2**17, map_blocks=run)
    assert same(plain, pooled)
    assert plain.requirements[0].mean == pooled.requirements[0].mean  # float sums, same bits
    # and a different seed does give different numbers (the check can fail)
    other = allocator.verify(case, samples=300_000, seed=4, map_blocks=lambda f, items: map(f, items))
    assert not same(plain, other)


def test_blocks_of_an_allocation_with_processes_travel_to_workers(case):
    alloc = allocator.allocate(case, "rss")  # its processes are a read-only mapping
    plain = allocator.verify(case, alloc, samples=100_000, seed=9)
    with local_runner(2) as run:
        pooled = allocator.verify(case, alloc, samples=100_000, seed=9, chunk_size=2**16, map_blocks=run)
    assert same(plain, pooled)


def test_verify_scheduler_without_the_extra_is_one_line_exit_2(monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed -> ImportError
    done = CliRunner().invoke(cli, ["verify", str(DEMO), "--samples", "1000", "--scheduler", "tcp://127.0.0.1:8786"])
    assert done.exit_code == 2
    assert done.stderr.count("\n") == 1 and 'pip install "allocator[cluster]"' in done.stderr


def test_an_address_where_no_scheduler_answers_is_one_line_exit_2(monkeypatch):
    pytest.importorskip("distributed", reason="needs the cluster extra: pip install '.[cluster]'")
    import allocator.parallel

    monkeypatch.setattr(allocator.parallel, "CONNECT_TIMEOUT", 1)
    done = CliRunner().invoke(cli, ["verify", str(DEMO), "--samples", "1000", "--scheduler", "tcp://127.0.0.1:9"])
    assert done.exit_code == 2, done.output
    assert done.stderr.count("\n") == 1 and "tcp://127.0.0.1:9: cannot reach a Dask scheduler" in done.stderr
