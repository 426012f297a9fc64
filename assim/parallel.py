"""dask parallelism of the engine: one task per (basin chunk[, member chunk]) and time block.

:func:`executor` opens the scheduler named in ``ensemble.scheduler`` once per run and yields
an object whose ``map(fn, items)`` runs ``fn`` on every item as one dask task each and
returns the results in order:

- ``synchronous``: in the calling thread (debugging, profiling);
- ``threads``: a thread pool of ``workers`` threads (numpy releases the GIL in its loops);
- ``processes``: a process pool of ``workers`` processes;
- ``local-cluster``: a :class:`distributed.LocalCluster` started for the run and closed after;
- ``tcp://host:port`` (or any ``scheme://`` address): an existing dask.distributed scheduler.

Every task is a pure function of its arguments, so the results are the same whatever the
scheduler or chunking. :class:`ProgressBar` is a small terminal progress bar, quiet when
its stream is not a terminal.
"""

from __future__ import annotations

import contextlib
import os
import sys
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor

import dask

from assim.errors import ConfigError, RunError

LOCAL = ("synchronous", "threads", "processes")


def n_workers(workers: int) -> int:
    """``workers``, or the number of usable cores when 0."""
    if workers > 0:
        return workers
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not on Linux
        return os.cpu_count() or 1


class _Executor:
    """Runs lists of tasks through dask with one scheduler."""

    def __init__(self, scheduler, pool=None, client=None, workers=1):
        self.scheduler = scheduler
        self.pool = pool
        self.client = client
        self.workers = workers
        self._background: ThreadPoolExecutor | None = None

    def submit(self, fn: Callable, items: Sequence) -> Future:
        """Start :meth:`map` in the background; the Future's result is its list.

        The caller can meanwhile write the previous block, so that writing overlaps the
        computation (fully with the process and distributed schedulers)."""
        if self.scheduler == "synchronous":
            done: Future = Future()
            done.set_result(self.map(fn, items))
            return done
        if self._background is None:
            self._background = ThreadPoolExecutor(1)
        return self._background.submit(self.map, fn, items)

    def close(self) -> None:
        if self._background is not None:
            self._background.shutdown(wait=True)
            self._background = None

    def map(self, fn: Callable, items: Sequence) -> list:
        """``[fn(item) for item in items]``, one dask task per item, results in order."""
        if self.scheduler == "synchronous" or len(items) == 1 and self.client is None:
            return [fn(item) for item in items]
        # Each item enters its task as one opaque argument: dask would otherwise walk every
        # field, dict and tuple of the inputs and states looking for collections, at every block.
        tasks = [dask.delayed(fn, pure=False)(dask.delayed(item, traverse=False, pure=False))
                 for item in items]
        if self.client is not None:
            return list(dask.compute(*tasks, scheduler=self.client))
        return list(dask.compute(*tasks, scheduler=self.scheduler, pool=self.pool,
                                 num_workers=self.workers))


@contextlib.contextmanager
def executor(scheduler: str = "threads", workers: int = 0) -> Iterator[_Executor]:
    """Open the scheduler for a run (see the module docstring); close it afterwards.

    Raises
    ------
    ConfigError
        for an unknown scheduler name.
    RunError
        when a dask.distributed scheduler cannot be reached.
    """
    w = n_workers(workers)
    with contextlib.ExitStack() as stack:
        ex = stack.enter_context(_open(scheduler, w))
        stack.callback(ex.close)
        yield ex


@contextlib.contextmanager
def _open(scheduler: str, w: int) -> Iterator[_Executor]:
    if scheduler == "synchronous":
        yield _Executor("synchronous")
    elif scheduler == "threads":
        with ThreadPoolExecutor(w) as pool:
            yield _Executor("threads", pool=pool, workers=w)
    elif scheduler == "processes":
        import multiprocessing

        # spawn: the workers start clean, with no copy of the parent's threads or locks
        with ProcessPoolExecutor(w, mp_context=multiprocessing.get_context("spawn")) as pool:
            yield _Executor("processes", pool=pool, workers=w)
    elif scheduler == "local-cluster":
        from distributed import Client, LocalCluster

        with LocalCluster(n_workers=w, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
            with Client(cluster) as client:
                yield _Executor("distributed", client=client, workers=w)
    elif "://" in scheduler:
        from distributed import Client

        try:
            client = Client(scheduler, timeout="10s")
        except (OSError, TimeoutError) as exc:
            raise RunError(f"cannot reach the dask scheduler ({exc})", variable="ensemble.scheduler",
                           place=scheduler) from None
        with client:
            yield _Executor("distributed", client=client, workers=w)
    else:
        raise ConfigError(f"unknown scheduler {scheduler!r}; expected one of {', '.join(LOCAL)}, "
                          "local-cluster or a tcp:// address", variable="ensemble.scheduler")


class ProgressBar:
    """A one-line progress bar on ``stream``, drawn only when it is a terminal and the run
    has lasted ``delay`` seconds (short runs stay quiet).

    Call the instance with (done, total); :meth:`close` ends the line.
    """

    def __init__(self, label: str, stream=None, width: int = 30, min_interval: float = 0.2,
                 delay: float = 2.0):
        self.label = label
        self.stream = sys.stderr if stream is None else stream
        self.width = width
        self.min_interval = min_interval
        self.enabled = bool(getattr(self.stream, "isatty", lambda: False)())
        self._t0 = time.monotonic()
        self._last = 0.0
        self._drawn = False
        self.delay = delay

    def __call__(self, done: int, total: int) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if now - self._t0 < self.delay and not self._drawn:
            return
        if done < total and now - self._last < self.min_interval:
            return
        self._last = now
        frac = done / total if total else 1.0
        filled = int(round(frac * self.width))
        elapsed = now - self._t0
        eta = elapsed / frac - elapsed if frac > 0 else float("nan")
        bar = "#" * filled + "-" * (self.width - filled)
        self.stream.write(f"\r{self.label} [{bar}] {frac:4.0%} {elapsed:5.1f}s elapsed, ~{eta:5.1f}s left")
        self.stream.flush()
        self._drawn = True

    def close(self) -> None:
        if self.enabled and self._drawn:
            self.stream.write("\n")
            self.stream.flush()
