"""dask parallelism of the engine: basin chunks (and member chunks) on worker *lanes*.

:func:`executor` opens the scheduler named in ``ensemble.scheduler`` once per run and yields
an :class:`_Executor` with two ways of running work:

- ``submit_to(lane, key, fn, item)`` runs ``fn(item, store)`` on one of ``lanes`` workers;
  the tasks given to one lane run one after the other in the order they were submitted,
  and ``store`` is a dict of that run that stays in the worker between tasks. The engine
  pins each basin chunk to a lane, so a chunk's ensemble state stays in its worker from one
  time block to the next: only the block's inputs go out and its outputs come back, and a
  lane never waits for the other chunks of a block (no barrier at block ends);
- ``map(fn, items)`` runs ``fn`` on every item as one dask task each and returns the
  results in order.

Schedulers:

- ``synchronous``: one lane, in the calling thread (debugging, profiling);
- ``threads``: ``workers`` lanes, one thread each. numpy releases the GIL inside its loops
  only, and a day of a chunk is some hundreds of numpy calls, so the threads spend much of
  their time waiting for each other: on 2 cores, 2 threads ran a 1,000-basin run only about
  1.15x faster than one;
- ``processes``: ``workers`` lanes, one process each (spawned clean, no GIL shared): the
  faster choice on several cores for large runs (on 2 cores about 1.8x one thread for
  1,000 basins x 128 members x 3 years), at the price of about a second to start the
  workers;
- ``local-cluster``: a :class:`distributed.LocalCluster` started for the run and closed
  after, one lane per worker;
- ``tcp://host:port`` (or any ``scheme://`` address): an existing dask.distributed
  scheduler, one lane per worker.

Every task is a pure function of its arguments and of what earlier tasks of its chunk left
in the store, so the results are the same whatever the scheduler, the number of lanes or
the chunking. :class:`ProgressBar` is a small terminal progress bar, quiet when its stream
is not a terminal.
"""

from __future__ import annotations

import contextlib
import os
import sys
import time
import uuid
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor

import cloudpickle
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


# What the tasks of a run leave for the next tasks of the same chunk (its ensemble state and
# prepared parameters), in the process that runs them: one dict per run, under the run's
# token, removed when the run's executor closes. The only module-level state of the package:
# it exists so that a chunk's state need not travel to the main process and back every block.
_STORES: dict[str, dict] = {}


def _lane_call(token: str, payload, *after):
    """Run one lane task: ``payload`` is ``(fn, item)``, cloudpickled for another process.

    ``after`` (ignored) is the previous task of the same chunk, which a dask.distributed
    scheduler must finish first."""
    fn, item = cloudpickle.loads(payload) if isinstance(payload, bytes) else payload
    return fn(item, _STORES.setdefault(token, {}))


def _drop_store(token: str) -> None:
    _STORES.pop(token, None)


class _Executor:
    """Runs the tasks of one run with one scheduler (see the module docstring)."""

    def __init__(self, scheduler, pool=None, client=None, workers=1, lanes=()):
        self.scheduler = scheduler
        self.pool = pool
        self.client = client
        self.workers = workers
        self._lanes = list(lanes)  # one single-worker pool per lane, or worker addresses
        self.token = uuid.uuid4().hex
        self._last: dict = {}  # distributed: the previous future of each chunk

    @property
    def lanes(self) -> int:
        """Number of lanes (workers that keep chunk state between tasks)."""
        return max(1, len(self._lanes))

    def submit_to(self, lane: int, key, fn: Callable, item) -> Future:
        """Run ``fn(item, store)`` on lane ``lane % lanes``, after the lane's earlier tasks.

        ``key`` names the chunk (tasks of one key must go to one lane); ``store`` is the
        run's dict in the worker. Returns a future; a failure is raised by its ``result()``."""
        if self.scheduler == "synchronous":
            done: Future = Future()
            try:
                done.set_result(_lane_call(self.token, (fn, item)))
            except BaseException as exc:  # re-raised by result(), as by the other schedulers
                done.set_exception(exc)
            return done
        target = self._lanes[lane % len(self._lanes)]
        if self.scheduler == "threads":
            return target.submit(_lane_call, self.token, (fn, item))
        if self.scheduler == "processes":
            return target.submit(_lane_call, self.token, cloudpickle.dumps((fn, item)))
        prev = self._last.get(key)
        fut = self.client.submit(_lane_call, self.token, (fn, item), *(() if prev is None else (prev,)),
                                 workers=[target], allow_other_workers=False, pure=False)
        self._last[key] = fut
        return fut

    def close(self) -> None:
        self._last.clear()
        if self.scheduler in ("synchronous", "threads"):
            _drop_store(self.token)
        elif self.client is not None:
            with contextlib.suppress(Exception):  # the cluster may already be gone
                self.client.run(_drop_store, self.token)
        # process lanes take their stores with them when they are shut down

    def map(self, fn: Callable, items: Sequence) -> list:
        """``[fn(item) for item in items]``, one dask task per item, results in order."""
        if self.scheduler == "synchronous" or len(items) == 1 and self.client is None:
            return [fn(item) for item in items]
        # Each item enters its task as one opaque argument: dask would otherwise walk every
        # field, dict and tuple of the inputs and states looking for collections.
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
        with contextlib.ExitStack() as stack:
            lanes = [stack.enter_context(_shutting_down(ThreadPoolExecutor(1))) for _ in range(w)]
            pool = stack.enter_context(_shutting_down(ThreadPoolExecutor(w)))
            yield _Executor("threads", pool=pool, workers=w, lanes=lanes)
    elif scheduler == "processes":
        import multiprocessing

        # spawn: the workers start clean, with no copy of the parent's threads or locks
        ctx = multiprocessing.get_context("spawn")
        with contextlib.ExitStack() as stack:
            lanes = [stack.enter_context(_shutting_down(ProcessPoolExecutor(1, mp_context=ctx)))
                     for _ in range(w)]
            pool = stack.enter_context(_shutting_down(ProcessPoolExecutor(w, mp_context=ctx)))
            yield _Executor("processes", pool=pool, workers=w, lanes=lanes)
    elif scheduler == "local-cluster":
        from distributed import Client, LocalCluster

        with LocalCluster(n_workers=w, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
            with Client(cluster) as client:
                yield _Executor("distributed", client=client, workers=w, lanes=_addresses(client))
    elif "://" in scheduler:
        from distributed import Client

        try:
            client = Client(scheduler, timeout="10s")
        except (OSError, TimeoutError) as exc:
            raise RunError(f"cannot reach the dask scheduler ({exc})", variable="ensemble.scheduler",
                           place=scheduler) from None
        with client:
            yield _Executor("distributed", client=client, workers=w, lanes=_addresses(client))
    else:
        raise ConfigError(f"unknown scheduler {scheduler!r}; expected one of {', '.join(LOCAL)}, "
                          "local-cluster or a tcp:// address", variable="ensemble.scheduler")


def _addresses(client) -> list[str]:
    """Addresses of the workers of a dask.distributed scheduler (one lane each)."""
    workers = sorted(client.scheduler_info().get("workers", {}))
    if not workers:
        raise RunError("the dask scheduler has no workers", variable="ensemble.scheduler")
    return workers


@contextlib.contextmanager
def _shutting_down(pool):
    """A pool that drops its queued tasks when the run stops (an error ends it early)."""
    try:
        yield pool
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


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
