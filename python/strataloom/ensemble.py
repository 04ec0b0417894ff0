"""Ensembles: N realizations from one master seed, on local processes or a Dask cluster.

Seeds come from :class:`numpy.random.SeedSequence`: realization ``i`` uses child ``i`` of the master
seed, so its seed does not depend on the ensemble size or on where it runs. Workers only simulate;
the calling process writes every realization to the store and then sets its ``done`` flag, so a
store never holds a half-written realization marked done, and a resumed run computes only the
realizations still missing.
"""

from __future__ import annotations

import inspect
import multiprocessing as mp
import os
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from typing import Any

import numpy as np

from . import _validate as v
from .errors import StudyError
from .store import RealizationStore

__all__ = ["EnsembleResult", "realization_seeds", "run_ensemble"]


def realization_seeds(master: int, n: int) -> list[int]:
    """Seeds in ``[0, 2**63)`` of realizations ``0..n-1``, from ``SeedSequence(master)``.

    Realization ``i``'s seed is drawn from ``SeedSequence(master).spawn(n)[i]``, whose state depends
    on ``(master, i)`` only.
    """
    m = v.seed(master, "seed", owner="realization_seeds")
    k = v.integer(n, "n", low=0, owner="realization_seeds")
    children = np.random.SeedSequence(m).spawn(k)
    return [int(c.generate_state(1, dtype=np.uint64)[0] >> np.uint64(1)) for c in children]


@dataclass
class EnsembleResult:
    """What a run did."""

    computed: list[int]
    already_done: int
    total: int
    seconds: float
    workers: int
    where: str


# one engine per worker process, keyed by the factory's token
_ADAPTERS: dict[str, Any] = {}
_PROGRESS_QUEUE: Any = None


def _adapter(factory: Any) -> Any:
    token = getattr(factory, "token", None) or str(id(factory))
    if token not in _ADAPTERS:
        _ADAPTERS.clear()  # one study at a time per worker
        _ADAPTERS[token] = factory()
    return _ADAPTERS[token]


def _simulate(adapter: Any, index: int, seed: int, queue: Any) -> dict[str, np.ndarray]:
    kwargs = {}
    if queue is not None:
        try:
            accepts = "progress" in inspect.signature(adapter.simulate).parameters
        except (TypeError, ValueError):
            accepts = False
        if accepts:
            last = [0.0]

            def progress(done: int, total: int) -> None:
                now = time.monotonic()
                if now - last[0] > 0.2 or done >= total:
                    last[0] = now
                    queue.put((index, int(done), int(total)))

            kwargs["progress"] = progress
    if queue is not None:
        queue.put((index, 0, 0))
    out = adapter.simulate(seed, **kwargs)
    return {k: np.ascontiguousarray(a) for k, a in out.items()}


_INIT_ERROR: list[BaseException] = []


def _worker_init(factory: Any, queue: Any) -> None:
    global _PROGRESS_QUEUE
    _PROGRESS_QUEUE = queue
    try:
        _adapter(factory)  # build the engine once, before the first task
    except Exception as e:  # kept for the first task: a failing initializer breaks the whole pool
        _INIT_ERROR.append(e)


def _worker_task(index: int, seed: int) -> tuple[int, dict[str, np.ndarray]]:
    # the engine was built by _worker_init; tasks carry only (index, seed), not the inputs
    if _INIT_ERROR:
        raise _INIT_ERROR[0]
    (adapter,) = _ADAPTERS.values()
    return index, _simulate(adapter, index, seed, _PROGRESS_QUEUE)


def _dask_task(factory: Any, index: int, seed: int) -> tuple[int, dict[str, np.ndarray]]:
    return index, _simulate(_adapter(factory), index, seed, None)


class _Progress:
    """Rich progress: one bar for the ensemble, one per running realization."""

    def __init__(self, enabled: bool, total: int, done: int, where: str) -> None:
        self.enabled = enabled
        self._tasks: dict[int, Any] = {}
        if not enabled:
            return
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
            TimeRemainingColumn,
        )

        self._p = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TimeElapsedColumn(),
            TimeRemainingColumn(),
            transient=False,
        )
        self._p.start()
        self._main = self._p.add_task(f"ensemble ({where})", total=total, completed=done)

    def started(self, index: int) -> None:
        if self.enabled and index not in self._tasks:
            self._tasks[index] = self._p.add_task(f"  realization {index}", total=None)

    def step(self, index: int, done: int, total: int) -> None:
        if not self.enabled:
            return
        self.started(index)
        if total > 0:
            self._p.update(self._tasks[index], completed=done, total=total)

    def finished(self, index: int) -> None:
        if not self.enabled:
            return
        task = self._tasks.pop(index, None)
        if task is not None:
            self._p.remove_task(task)
        self._p.advance(self._main)

    def close(self) -> None:
        if self.enabled:
            for t in self._tasks.values():
                self._p.remove_task(t)
            self._p.stop()


def _drain(queue: Any, bars: _Progress) -> None:
    import queue as q

    while True:
        try:
            index, done, total = queue.get_nowait()
        except (q.Empty, EOFError, OSError):
            return
        bars.step(index, done, total)


def run_ensemble(
    factory: Callable[[], Any],
    store: RealizationStore,
    seeds: Sequence[int],
    *,
    processes: int | None = None,
    client: Any = None,
    scheduler: str | None = None,
    threads: int | None = None,
    progress: bool = True,
    on_written: Callable[[int], None] | None = None,
) -> EnsembleResult:
    """Simulate the realizations the store still misses and write them.

    Parameters
    ----------
    factory : picklable callable
        ``factory()`` builds an engine adapter whose ``simulate(seed)`` returns a dict of
        ``(nz, ny, nx)`` arrays, one per store variable. A ``token`` attribute (str) lets each
        worker build the engine once.
    store : RealizationStore
    seeds : sequence of int
        One seed per realization of the store.
    processes : int, optional
        Local worker processes (default: all cores; 1 runs in this process). Ignored with a
        Dask client.
    client : distributed.Client, optional
        Run on this Dask cluster.
    scheduler : str, optional
        Address of a Dask scheduler to connect to (``tcp://host:8786``).
    threads : int, optional
        Unused by the scheduling itself; the factory decides the engine's threads.
    progress : bool, default True
        Show rich progress bars.
    on_written : callable, optional
        Called with each index after it has been written (for tests and callers' logs).

    Returns
    -------
    EnsembleResult
    """
    del threads
    if len(seeds) != store.size:
        raise v.fail(
            "seeds", f"{store.size} seeds, one per realization", len(seeds), "run_ensemble"
        )
    todo = store.missing()
    already = store.size - len(todo)
    t0 = time.perf_counter()
    if client is None and scheduler is not None:
        try:
            from distributed import Client
        except ImportError as e:
            raise v.fail(
                "scheduler",
                "usable: install the 'cluster' extra (pip install strataloom[cluster])",
                scheduler,
                "run_ensemble",
            ) from e
        with Client(scheduler) as c:
            return run_ensemble(
                factory, store, seeds, client=c, progress=progress, on_written=on_written
            )
    if client is not None:
        where = f"Dask cluster {getattr(client.scheduler, 'address', '')}".strip()
        workers = len(client.scheduler_info().get("workers", {}))
        bars = _Progress(progress, store.size, already, "Dask")
        try:
            for index, arrays in _run_dask(client, factory, todo, seeds, bars):
                _record(store, bars, on_written, index, arrays)
        finally:
            bars.close()
        return EnsembleResult(todo, already, store.size, time.perf_counter() - t0, workers, where)

    if processes is None or processes == 0:
        p = os.cpu_count() or 1
    else:
        p = v.integer(processes, "processes", low=1, high=1024, owner="run_ensemble")
    p = max(1, min(p, len(todo))) if todo else 1
    where = "this process" if p == 1 else f"{p} local processes"
    bars = _Progress(progress, store.size, already, where)
    try:
        if p == 1:
            adapter = _adapter(factory)
            for index in todo:
                bars.started(index)
                _record(store, bars, on_written, index, _simulate(adapter, index, int(seeds[index]), None))
        else:
            for index, arrays in _run_local(factory, todo, seeds, p, bars):
                _record(store, bars, on_written, index, arrays)
    finally:
        bars.close()
    return EnsembleResult(todo, already, store.size, time.perf_counter() - t0, p, where)


def _record(store: Any, bars: Any, on_written: Any, index: int, arrays: dict[str, np.ndarray]) -> None:
    """Write one finished realization (its `done` flag last), then report it."""
    store.write(index, arrays)
    bars.finished(index)
    if on_written:
        on_written(index)


def _run_local(
    factory: Any, todo: list[int], seeds: Sequence[int], p: int, bars: _Progress
) -> Iterator[tuple[int, dict[str, np.ndarray]]]:
    ctx = mp.get_context("spawn")
    manager = ctx.Manager() if bars.enabled else None
    queue = manager.Queue() if manager is not None else None
    try:
        with ProcessPoolExecutor(
            max_workers=p, mp_context=ctx, initializer=_worker_init, initargs=(factory, queue)
        ) as pool:
            pending: set = set()
            it = iter(todo)
            # keep at most two tasks per worker in flight so results do not pile up in memory
            for index in it:
                pending.add(pool.submit(_worker_task, index, int(seeds[index])))
                if len(pending) >= 2 * p:
                    break
            try:
                while pending:
                    finished, pending = wait(pending, timeout=0.25, return_when=FIRST_COMPLETED)
                    if queue is not None:
                        _drain(queue, bars)
                    for fut in sorted(finished, key=lambda f: f.result()[0]):
                        yield fut.result()
                        nxt = next(it, None)
                        if nxt is not None:
                            pending.add(pool.submit(_worker_task, nxt, int(seeds[nxt])))
            except BrokenProcessPool as e:
                _stop(pool)
                raise StudyError(
                    "A worker process died while simulating (killed by the system, often for lack "
                    "of memory); finished realizations are kept. Run the same command again to "
                    "resume, with fewer --processes if memory is short."
                ) from e
            except BaseException:
                # Ctrl-C, a failed write or a failed realization: stop the workers now instead of
                # letting the pool finish the realizations in flight (they are not marked done)
                _stop(pool)
                raise
    finally:
        if manager is not None:
            manager.shutdown()


def _stop(pool: ProcessPoolExecutor) -> None:
    """Stop the workers now instead of letting the pool finish the realizations in flight."""
    procs = list((getattr(pool, "_processes", None) or {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for proc in procs:
        proc.terminate()


def _run_dask(
    client: Any, factory: Any, todo: list[int], seeds: Sequence[int], bars: _Progress
) -> Iterator[tuple[int, dict[str, np.ndarray]]]:
    from distributed import as_completed

    if not todo:
        return
    remote = client.scatter(factory, broadcast=True, hash=False)
    token = getattr(factory, "token", "run")
    futures = [
        client.submit(
            _dask_task, remote, i, int(seeds[i]), key=f"strataloom-{token}-{i}", pure=False
        )
        for i in todo
    ]
    for fut in as_completed(futures):
        index, arrays = fut.result()
        fut.release()
        yield index, arrays
