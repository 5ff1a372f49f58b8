"""Where independent pieces of work run: in this process, in local processes, or on a Dask cluster.

A *runner* is a callable ``run(function, items)`` that returns an iterator over
``function(item)`` for every item, **in the order of the items**, whichever order the
pieces finished in. Callers that add floating-point numbers (the Monte Carlo blocks of
:func:`allocator.simulate.verify`) therefore add them in the same order as a plain loop
would, and get the same bits.

- :func:`local_runner` -- ``workers`` processes of this machine
  (:class:`concurrent.futures.ProcessPoolExecutor`); one worker runs in this process;
- :func:`cluster_runner` -- the workers of a Dask distributed scheduler at ``address``
  (``tcp://host:port``). dask and distributed are an optional extra
  (``pip install "allocator[cluster]"``), imported only here, only when asked for;
- :func:`runner` -- the one of the two a caller's ``workers`` / ``scheduler`` options name.

``function`` must be a module-level function and ``items`` and the results picklable
(plain data), since they travel to other processes. The cluster's workers must be able to
import allocator (the same version) and, for a study, read the case files at the paths
given.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager

from .errors import UsageError

__all__ = ["Runner", "CLUSTER_HINT", "cluster_runner", "local_runner", "runner", "default_workers"]

Runner = Callable[[Callable, Iterable], Iterator]

# the one line a user without the extra reads
CLUSTER_HINT = 'a scheduler address needs dask and distributed: pip install "allocator[cluster]"'
# how long to wait for a scheduler to answer before calling the address wrong [s]
CONNECT_TIMEOUT = 20


def default_workers() -> int:
    """The number of processors of this machine (``os.cpu_count()``, at least 1)."""
    return max(1, os.cpu_count() or 1)


def _in_process(function: Callable, items: Iterable) -> Iterator:
    return map(function, items)


@contextmanager
def local_runner(workers: int | None = None) -> Iterator[Runner]:
    """A runner over ``workers`` local processes (default: :func:`default_workers`).

    One worker (or a machine with one processor) runs every item in this process, with no
    pool to start.

    Yields
    ------
    Runner
    """
    workers = default_workers() if workers is None else int(workers)
    if workers < 1:
        raise UsageError(f"workers must be at least 1, got {workers}")
    if workers == 1:
        yield _in_process
        return
    from concurrent.futures import ProcessPoolExecutor

    pool = ProcessPoolExecutor(max_workers=workers)

    def run(function: Callable, items: Iterable) -> Iterator:
        # chunksize 1: items are few and each may take seconds; map keeps their order
        return pool.map(function, items, chunksize=1)

    try:
        yield run
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def connect(address: str):
    """A :class:`distributed.Client` of the scheduler at ``address``.

    Raises
    ------
    UsageError
        dask or distributed is not installed (:data:`CLUSTER_HINT`), or nothing answers at
        ``address`` within :data:`CONNECT_TIMEOUT` seconds.
    """
    try:
        from distributed import Client
    except ImportError:
        raise UsageError(CLUSTER_HINT) from None
    try:
        # set_as_default=False: the client is ours, not the process-wide dask default
        return Client(address, timeout=CONNECT_TIMEOUT, set_as_default=False)
    except (OSError, ValueError, TypeError) as err:  # TimeoutError is an OSError
        detail = " ".join(str(err).split()) or type(err).__name__
        raise UsageError(f"{address}: cannot reach a Dask scheduler there ({detail})") from None


@contextmanager
def cluster_runner(address: str) -> Iterator[Runner]:
    """A runner over the workers of the Dask scheduler at ``address`` (``tcp://host:port``).

    Yields
    ------
    Runner

    Raises
    ------
    UsageError
        See :func:`connect`.
    """
    client = connect(address)

    def run(function: Callable, items: Iterable) -> Iterator:
        # pure=False: every item is run, even two equal ones (no result sharing by hash);
        # closing the client drops whatever is left when the caller stops early
        futures = client.map(function, list(items), pure=False)
        return (future.result() for future in futures)

    try:
        yield run
    finally:
        client.close()


@contextmanager
def runner(workers: int | None = None, scheduler: str | None = None) -> Iterator[Runner]:
    """The runner a command's options ask for: the cluster at ``scheduler`` when given, else
    ``workers`` local processes.

    Raises
    ------
    UsageError
        ``workers`` given with ``scheduler`` (the cluster decides its own workers), or see
        :func:`connect`.
    """
    if scheduler is not None:
        if workers is not None:
            raise UsageError("give either workers (local processes) or a scheduler address, not both")
        with cluster_runner(scheduler) as run:
            yield run
    else:
        with local_runner(workers) as run:
            yield run
