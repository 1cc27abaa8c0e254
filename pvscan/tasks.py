"""Where the independent pieces of one flight run: in this process, on local cores, or on a
Dask distributed cluster.

A stage that splits its work into independent tasks (the block statistics of
:mod:`pvscan.measure.zonal`) hands them to :func:`run_tasks` with a *scheduler*:

``None`` / ``"single"``
    the embedded default: this process (the stage may use its own threads);
``"synchronous"``
    one after the other in this process (debugging);
``"threads"`` / ``"processes"``
    a pool of threads / worker processes on this machine's cores;
a :class:`distributed.Client`
    tasks on an existing Dask distributed cluster (see :func:`cluster`, which connects to
    a scheduler address ``tcp://host:port``). Workers read the flight's files by the same
    paths, so the files must be where every worker sees them (a shared or copied folder).

Tasks are plain picklable functions of plain arguments; results come back in any order and
the stage merges them so that the result does not depend on the order (the same on every
scheduler). At most a few tasks per worker are in flight, so memory stays bounded.
"""
from __future__ import annotations

import contextlib
import logging
import multiprocessing
import os
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, Executor, ProcessPoolExecutor, ThreadPoolExecutor, wait
from typing import Any

from pvscan.errors import PvscanError

__all__ = ["LOCAL_SCHEDULERS", "parse_scheduler", "is_address", "cluster", "run_tasks"]

log = logging.getLogger(__name__)

#: Scheduler names that run on this machine.
LOCAL_SCHEDULERS = ("single", "synchronous", "threads", "processes")
_ADDRESS_PREFIXES = ("tcp://", "tls://", "inproc://", "ucx://")


def is_address(value: Any) -> bool:
    """True when ``value`` is a Dask scheduler address (``tcp://host:port`` ...)."""
    return isinstance(value, str) and value.startswith(_ADDRESS_PREFIXES)


def parse_scheduler(value: str | None) -> str | None:
    """Check a scheduler name or address; ``None`` / ``"single"`` give None (embedded).

    Raises
    ------
    PvscanError
        Neither a known name nor a scheduler address.
    """
    if value is None:
        return None
    text = str(value).strip()
    if text in ("", "single"):
        return None
    if text in LOCAL_SCHEDULERS or is_address(text):
        return text
    raise PvscanError(f"scheduler {value!r}: use single, synchronous, threads, processes or tcp://host:port")


@contextlib.contextmanager
def cluster(address: str, timeout_s: float = 10.0) -> Iterator[Any]:
    """A :class:`distributed.Client` connected to the Dask scheduler at ``address``.

    Raises
    ------
    PvscanError
        Without the ``distributed`` package, or when no scheduler answers within
        ``timeout_s`` [s].
    """
    try:
        from distributed import Client
    except ImportError:
        raise PvscanError(f"scheduler {address}: a Dask cluster needs the 'distributed' package "
                          "(pip install 'pvscan[distributed]')") from None
    try:
        client = Client(address, timeout=f"{float(timeout_s)}s", set_as_default=False)
    except (OSError, TimeoutError) as exc:
        msg = " ".join(str(exc).split())
        raise PvscanError(f"scheduler {address}: cannot connect ({msg})") from None
    try:
        yield client
    finally:
        client.close()


def _n_workers(client: Any) -> int:
    try:
        return max(1, sum(int(w.get("nthreads", 1)) for w in client.scheduler_info()["workers"].values()))
    except Exception:  # an unusual scheduler: assume a small cluster
        return 2


def run_tasks(fn: Callable, args: Sequence[tuple], scheduler: Any = None, *, workers: int | None = None,
              per_worker: int = 2) -> Iterator[tuple[int, Any]]:
    """Run ``fn(*args[k])`` for every k; yield ``(k, result)`` as the tasks finish.

    Parameters
    ----------
    fn : callable
        A module-level function (picklable for processes and clusters).
    args : sequence of tuple
        Arguments of each task.
    scheduler : None, str or distributed.Client
        See the module docstring. A ``tcp://`` address is connected for this call only.
    workers : int, optional
        Threads or processes of a local pool (default: the machine's cores).
    per_worker : int
        Tasks in flight per worker (bounds the memory of pending results).

    Yields
    ------
    (int, object)
        Task index and result, in completion order (in order for None / "synchronous").
        An exception of a task is raised here (the first one), the others are cancelled.
    """
    total = len(args)
    if total == 0:
        return
    if scheduler in (None, "single", "synchronous"):
        for k, a in enumerate(args):
            yield k, fn(*a)
        return
    if is_address(scheduler):
        with cluster(scheduler) as client:
            yield from run_tasks(fn, args, client, per_worker=per_worker)
        return
    if scheduler in ("threads", "processes"):
        n = int(workers or os.cpu_count() or 1)
        pool: Executor
        if scheduler == "threads":
            pool = ThreadPoolExecutor(n, thread_name_prefix="pvscan-task")
        else:  # spawned, not forked: GDAL's and numpy's threads do not survive a fork
            pool = ProcessPoolExecutor(n, mp_context=multiprocessing.get_context("spawn"))
        with pool:
            yield from _bounded(pool.submit, fn, args, n * per_worker)
        return
    # a distributed.Client (duck-typed: submit + the distributed futures)
    n = _n_workers(scheduler)
    log.debug("%d tasks on a Dask cluster of %d worker threads", total, n)
    yield from _bounded_cluster(scheduler, fn, args, n * per_worker)


def _bounded(submit: Callable[..., Any], fn: Callable[..., Any], args: Sequence[Sequence[Any]],
             limit: int) -> Iterator[tuple[int, Any]]:
    """Local pool: keep at most ``limit`` tasks in flight; yield results as they finish."""
    limit = max(1, int(limit))
    pending: dict[Any, int] = {}
    nxt = 0
    try:
        while nxt < len(args) or pending:
            while nxt < len(args) and len(pending) < limit:
                pending[submit(fn, *args[nxt])] = nxt
                nxt += 1
            done, _ = wait(set(pending), return_when=FIRST_COMPLETED)
            for fut in done:
                k = pending.pop(fut)
                yield k, fut.result()
    finally:
        for fut in pending:
            fut.cancel()


def _bounded_cluster(client: Any, fn: Callable[..., Any], args: Sequence[Sequence[Any]],
                     limit: int) -> Iterator[tuple[int, Any]]:
    """Dask cluster: the same with distributed futures (``as_completed``, topped up)."""
    from distributed import as_completed

    limit = max(1, int(limit))
    pending: dict[Any, int] = {}

    def submit(k: int) -> Any:
        fut = client.submit(fn, *args[k], pure=False)
        pending[fut] = k
        return fut

    first = [submit(k) for k in range(min(limit, len(args)))]
    nxt = len(first)
    done_iter = as_completed(first, loop=client.loop)
    try:
        for fut in done_iter:
            k = pending.pop(fut)
            res = fut.result()
            fut.release()
            if nxt < len(args):
                done_iter.add(submit(nxt))
                nxt += 1
            yield k, res
    finally:
        for fut in pending:
            fut.cancel()
