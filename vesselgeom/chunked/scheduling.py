"""Where chunked mode's tasks run: a local Dask scheduler, a local cluster, or an existing Dask cluster.

:func:`executor` yields two ways of running tasks:

- ``compute(tasks)``: a list of ``dask.delayed`` calls, all results at once, in order (survey, thinning,
  junction radii: the client needs every result together);
- ``stream(func, vol, calls, **kwargs)``: ``func(vol, *args, **kwargs)`` for every ``args`` of ``calls``,
  yielding ``(index, result)`` as tasks finish, with at most :data:`IN_FLIGHT_PER_WORKER` tasks per
  worker submitted and not yet collected, so the client holds only a few tasks' results at a time
  (tracing: each result is measured and dropped as it arrives).

Dask and distributed are imported only here, when a run starts.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait
from contextlib import ExitStack, contextmanager
from typing import Any

from vesselgeom.chunked.sources import LazyVolume
from vesselgeom.errors import InputError

__all__ = ["PROCESS_OVERHEAD_MB", "IN_FLIGHT_PER_WORKER", "LOCAL_SCHEDULERS", "executor", "delayed", "shared"]

#: Resident memory of one idle Dask worker process (interpreter, numpy, scipy, scikit-image, dask),
#: measured on the development machine; a local cluster's budget is for data beyond this.
PROCESS_OVERHEAD_MB = 200

#: Streamed tasks submitted per worker and not yet collected (keeps workers busy while one result is
#: being collected, and bounds the results waiting in the client).
IN_FLIGHT_PER_WORKER = 2

#: Scheduler names run in this process by Dask's local schedulers.
LOCAL_SCHEDULERS = ("synchronous", "sync", "single-threaded", "threads", "processes")

_INLINE = ("synchronous", "sync", "single-threaded")


def delayed(func: Callable) -> Callable:
    """``dask.delayed(func, pure=True)``."""
    import dask

    return dask.delayed(func, pure=True)


def shared(vol: LazyVolume) -> Any:
    """The volume as one Dask node, so it is shipped to each worker once (not inside every task)."""
    import dask

    return dask.delayed(vol, name=f"lazy-volume-{vol.sha256[:16] or id(vol)}", traverse=False)


@contextmanager
def executor(scheduler: Any, budget_mb: float | None) -> Iterator[tuple[Callable, Callable, dict]]:
    """Yield ``compute``, ``stream`` (see the module docstring) and a description of where tasks run.

    Parameters
    ----------
    scheduler : None, str or distributed.Client
        None: a local ``distributed`` cluster of worker processes (one thread each); a name of
        :data:`LOCAL_SCHEDULERS`; the address of a running scheduler; or a Client (used as is).
    budget_mb : float, optional
        Memory for the workers together, MB (sets the local cluster's workers and their limits).
    """
    try:
        import dask
    except ImportError:  # pragma: no cover - depends on the environment
        raise InputError(
            "<chunked>: dask is not installed; install the optional extra: pip install 'vesselgeom[chunked]'"
        ) from None
    info: dict[str, Any] = {"overhead_mb": 0}
    if scheduler is None and budget_mb is not None and budget_mb < 2 * PROCESS_OVERHEAD_MB:
        # a worker process alone would exceed the budget, and distributed would pause it for good:
        # run the tasks in this process instead (their memory is bounded by the chunk size)
        scheduler = "synchronous"
        info["note"] = "budget below one worker process; tasks ran in this process"
    if isinstance(scheduler, str) and scheduler in LOCAL_SCHEDULERS:
        workers = 1 if scheduler in _INLINE else os.cpu_count() or 1
        info.update(name=scheduler, workers=workers, limit_mb=budget_mb / workers if budget_mb else None)

        def stream_local(func: Callable, vol: LazyVolume, calls: Iterable[tuple], **kwargs: Any):
            if scheduler in _INLINE:
                return ((i, func(vol, *args, **kwargs)) for i, args in enumerate(calls))
            if scheduler == "threads":
                return _stream_threads(func, vol, calls, kwargs, workers)
            return _stream_windows(func, vol, calls, kwargs, scheduler, workers)

        yield (lambda tasks: list(dask.compute(*tasks, scheduler=scheduler))), stream_local, info
        return
    from distributed import Client, LocalCluster

    with ExitStack() as stack:  # whatever is opened here is closed, also when a later step raises
        if scheduler is None:
            workers = os.cpu_count() or 1
            limit: Any = "auto"
            if budget_mb is not None:
                workers = max(1, min(workers, int(budget_mb // (2 * PROCESS_OVERHEAD_MB))))
                limit = f"{budget_mb / workers:.0f}MiB"
            cluster = stack.enter_context(
                LocalCluster(
                    n_workers=workers,
                    threads_per_worker=1,
                    processes=True,
                    memory_limit=limit,
                    dashboard_address=None,
                    silence_logs=logging.ERROR,
                )
            )
            client = stack.enter_context(Client(cluster))
            info.update(
                name="local-distributed",
                workers=workers,
                limit_mb=budget_mb / workers if budget_mb else None,
                overhead_mb=PROCESS_OVERHEAD_MB,
            )
        elif isinstance(scheduler, str):
            client = stack.enter_context(Client(scheduler))
            n = len(client.scheduler_info().get("workers", {}))
            info.update(name=scheduler, workers=n, limit_mb=budget_mb / n if budget_mb and n else None)
        elif hasattr(scheduler, "compute") and hasattr(scheduler, "gather"):
            client = scheduler  # the caller's: not closed here
            n = len(client.scheduler_info().get("workers", {}))
            info.update(name="client", workers=n, limit_mb=budget_mb / n if budget_mb and n else None)
        else:
            raise InputError(f"<chunked>: scheduler {scheduler!r} is not a scheduler name, address or Client")

        def stream_client(func: Callable, vol: LazyVolume, calls: Iterable[tuple], **kwargs: Any):
            return _stream_client(client, func, vol, calls, kwargs, max(1, info["workers"]))

        yield (lambda tasks: list(client.gather(client.compute(tasks)))), stream_client, info


def _stream_threads(
    func: Callable, vol: LazyVolume, calls: Iterable[tuple], kwargs: dict, workers: int
) -> Iterator[tuple[int, Any]]:
    """Tasks on a pool of ``workers`` threads in this process, as Dask's threaded scheduler runs them."""
    todo = enumerate(calls)
    with ThreadPoolExecutor(max_workers=workers) as pool:
        pending: dict[Any, int] = {}

        def top_up() -> None:
            while len(pending) < IN_FLIGHT_PER_WORKER * workers:
                nxt = next(todo, None)
                if nxt is None:
                    return
                pending[pool.submit(func, vol, *nxt[1], **kwargs)] = nxt[0]

        top_up()
        while pending:
            done, _ = wait(pending, return_when=FIRST_COMPLETED)
            for fut in sorted(done, key=pending.__getitem__):
                i = pending.pop(fut)
                yield i, fut.result()
            top_up()


def _stream_windows(
    func: Callable, vol: LazyVolume, calls: Iterable[tuple], kwargs: dict, scheduler: str, workers: int
) -> Iterator[tuple[int, Any]]:
    """Tasks on a local Dask scheduler, a window of a few per worker at a time."""
    import dask

    vol_d = shared(vol)
    calls = list(calls)
    size = IN_FLIGHT_PER_WORKER * workers
    for start in range(0, len(calls), size):
        tasks = [delayed(func)(vol_d, *args, **kwargs) for args in calls[start : start + size]]
        yield from enumerate(dask.compute(*tasks, scheduler=scheduler), start)


def _stream_client(
    client: Any, func: Callable, vol: LazyVolume, calls: Iterable[tuple], kwargs: dict, workers: int
) -> Iterator[tuple[int, Any]]:
    """Tasks on a distributed cluster; each result is gathered and released as soon as it is done."""
    from distributed import as_completed

    [vol_f] = client.scatter([vol], hash=False)
    todo = enumerate(calls)
    index: dict[str, int] = {}
    running = as_completed()

    def submit() -> None:
        nxt = next(todo, None)
        if nxt is not None:
            fut = client.submit(func, vol_f, *nxt[1], pure=False, **kwargs)
            index[fut.key] = nxt[0]
            running.add(fut)

    for _ in range(IN_FLIGHT_PER_WORKER * workers):
        submit()
    try:
        for fut in running:
            result = fut.result()
            i = index.pop(fut.key)
            fut.release()
            submit()
            yield i, result
    finally:
        vol_f.release()
