"""dask parallelism of the engine: the basin chunks (and member chunks) of each time block.

:func:`executor` opens the scheduler named in ``ensemble.scheduler`` once per run and yields
an :class:`_Executor` with two ways of running work:

- ``submit_block(fn, items)`` runs ``fn(item, store)`` for every chunk of one time block,
  one task each, and returns one future of the results in order. A chunk's task of a block
  runs after its task of the block before, and ``store`` is a dict of the run that the tasks
  find again in their process: a chunk leaves its ensemble state there for its next block,
  so the state never travels between blocks (only a block's inputs and outputs do). The
  engine submits the next block before it writes the current one;
- ``map(fn, items)`` runs ``fn`` on every item as one dask task each and returns the
  results in order.

Schedulers:

- ``synchronous``: every task in the calling thread, in order (debugging, profiling);
- ``threads``: dask's threaded scheduler (``dask.threaded.get``) over a pool of ``workers``
  threads, one ``dask.compute`` per block, started from one driver thread so that the main
  thread writes a block while the next is computed. The threads share the process, so the
  store is one dict and any thread may take any chunk (dask balances them). The fused
  compiled kernel releases the GIL (``nogil=True``), so its chunks run side by side; on the
  numpy path the Python between numpy calls holds the GIL and threads gain little (on 2
  cores, 2 threads ran a 1,000-basin numpy run about 1.15x faster than one);
- ``processes``: ``workers`` worker processes (spawned clean), each chunk pinned to one of
  them (its *lane*) so that its state stays in that process. dask's own process scheduler
  would pickle every chunk's state to a worker and back at every block (on the numpy path,
  1,000 x 128 x 3 years: 66 s against 30 s with lanes), so these lanes are the project's
  own. The faster local choice for the numpy path on several cores;
- ``local-cluster``: a :class:`distributed.LocalCluster` started for the run and closed
  after, each chunk pinned to one worker;
- ``tcp://host:port`` (or any ``scheme://`` address): an existing dask.distributed
  scheduler, each chunk pinned to one worker.

Every task is a pure function of its arguments and of what the chunk's earlier tasks left
in the store, so the results are the same whatever the scheduler, the number of workers or
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
    if isinstance(payload, bytes):
        import cloudpickle

        payload = cloudpickle.loads(payload)
    fn, item = payload
    return fn(item, _STORES.setdefault(token, {}))


def _drop_store(token: str) -> None:
    _STORES.pop(token, None)


class _Gathered:
    """The results of several futures as one list, in order (``result()`` like a future)."""

    def __init__(self, futures: Sequence[Future]):
        self.futures = list(futures)

    def result(self) -> list:
        return [f.result() for f in self.futures]


class _Executor:
    """Runs the tasks of one run with one scheduler (see the module docstring)."""

    def __init__(self, scheduler, pool=None, client=None, workers=1, lanes=(), driver=None):
        self.scheduler = scheduler
        self.pool = pool
        self.client = client
        self.workers = workers
        self._lanes = list(lanes)  # processes: one single-worker pool per lane; distributed: addresses
        self._driver = driver  # threads: the one thread that starts each block's dask.compute
        self.token = uuid.uuid4().hex
        self._last: dict = {}  # distributed: the previous future of each chunk

    @property
    def lanes(self) -> int:
        """Number of lanes (processes or workers that keep chunk state between tasks); 1 for
        the schedulers whose tasks share the calling process."""
        return max(1, len(self._lanes))

    def submit_block(self, fn: Callable, items: Sequence):
        """Run ``fn(item, store)`` for every chunk ``i, item`` of one time block.

        Chunk ``i``'s task runs after chunk ``i``'s task of the block submitted before (see
        the module docstring). Returns an object whose ``result()`` is the list of results in
        order; a failure is raised by ``result()``."""
        if self.scheduler == "synchronous":
            done: Future = Future()
            try:
                done.set_result([_lane_call(self.token, (fn, item)) for item in items])
            except BaseException as exc:  # re-raised by result(), as by the other schedulers
                done.set_exception(exc)
            return done
        if self.scheduler == "threads":
            # one compute per block, one after the other in the driver thread: a block's
            # tasks find what the chunk's task of the block before left in the store
            return self._driver.submit(self._compute_threads, fn, list(items))
        return _Gathered([self._submit_to(i, fn, item) for i, item in enumerate(items)])

    def _compute_threads(self, fn: Callable, items: list) -> list:
        if len(items) == 1:  # nothing to run side by side (a day's forecast): no dask needed
            return [_lane_call(self.token, (fn, items[0]))]
        import dask  # imported when first needed: a short run does not pay its import

        tasks = [dask.delayed(_lane_call, pure=False)(self.token, dask.delayed((fn, item), traverse=False, pure=False))
                 for item in items]
        return list(dask.compute(*tasks, scheduler="threads", pool=self.pool, num_workers=self.workers))

    def _submit_to(self, chunk: int, fn: Callable, item) -> Future:
        """Run ``fn(item, store)`` on the lane of ``chunk``, after the chunk's earlier tasks."""
        target = self._lanes[chunk % len(self._lanes)]
        if self.scheduler == "processes":
            import cloudpickle

            return target.submit(_lane_call, self.token, cloudpickle.dumps((fn, item)))
        prev = self._last.get(chunk)
        fut = self.client.submit(_lane_call, self.token, (fn, item), *(() if prev is None else (prev,)),
                                 workers=[target], allow_other_workers=False, pure=False)
        self._last[chunk] = fut
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
        import dask

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
            pool = stack.enter_context(_shutting_down(ThreadPoolExecutor(w)))
            driver = stack.enter_context(_shutting_down(ThreadPoolExecutor(1)))
            yield _Executor("threads", pool=pool, workers=w, driver=driver)
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
