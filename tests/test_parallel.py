"""Identity of the results whatever the scheduler and the chunking (assim.parallel)."""

from __future__ import annotations

import dataclasses
import io
import threading

import numpy as np
import pytest

from assim import engine, models, parallel
from assim import perturb as pt
from assim.errors import ConfigError

GR4J = models.get("gr4j")


class Collect:
    def __init__(self):
        self.blocks = {}
        self.issues = []

    def write_block(self, start, arrays):
        for k, v in arrays.items():
            self.blocks.setdefault(k, []).append(np.array(v))

    def write_issues(self, start, discharge):
        self.issues.append(np.array(discharge))

    def result(self):
        out = {k: np.concatenate(v, axis=1) for k, v in self.blocks.items()}
        if self.issues:
            out["hindcast"] = np.concatenate(self.issues, axis=1)
        return out


def _inputs(nb=5, nt=90, seed=0):
    rng = np.random.default_rng(seed)
    p = np.where(rng.random((nb, nt)) < 0.4, rng.gamma(0.8, 10.0, (nb, nt)), 0.0)
    e = np.full((nb, nt), 2.0)
    ids = tuple(f"river-{i}" for i in range(nb))
    obs = np.where(rng.random((nb, nt)) < 0.7, rng.gamma(4.0, 1.0, (nb, nt)), np.nan)
    params = {"x1": np.linspace(200, 500, nb), "x2": np.zeros(nb), "x3": np.linspace(60, 120, nb),
              "x4": np.linspace(1.2, 2.5, nb)}
    return engine.Inputs(ids, pt.basin_keys(ids), np.linspace(50, 150, nb), np.arange(nt) + 16000, p, e, obs,
                         np.zeros((nb, nt), bool), params)


BASE = engine.Settings(mode="assimilate", members=12, seed=4, spinup_days=10, time_block_days=30,
                       parameter_sd={"x1": 0.1}, state_noise={"routing_store": 0.5},
                       update_states=("production_store", "routing_store"),
                       write_states=("production_store", "routing_store"), basin_chunk=64,
                       scheduler="synchronous")


def _run(settings, inputs=None, **kw):
    sink = Collect()
    summary = engine.run(GR4J, inputs or _inputs(), settings, sink, **kw)
    return sink.result(), summary


def _assert_same(a, b):
    assert a.keys() == b.keys()
    for k in a:
        np.testing.assert_array_equal(a[k], b[k], err_msg=k)


@pytest.mark.parametrize("quantiles", [None, (0.1, 0.5, 0.9)])
@pytest.mark.parametrize("mode", ["openloop", "assimilate"])
def test_chunking_does_not_change_the_results(mode, quantiles):
    """Basin chunks, member chunks (open loop) and time blocks of any size give arrays equal
    bit for bit (np.array_equal): every number depends only on (seed, basin, member, day).
    Quantile outputs too, whether the lanes reduce the members (a chunk holds them all) or
    the main thread does after joining member chunks."""
    base = dataclasses.replace(BASE, mode=mode, quantiles=quantiles)
    ref, ref_sum = _run(base)
    assert ("discharge_quantile" in ref) == (quantiles is not None)
    for change in ({"basin_chunk": 1}, {"basin_chunk": 2, "time_block_days": 7},
                   {"basin_chunk": 3, "member_chunk": 5, "time_block_days": 1000},
                   {"member_chunk": 1, "time_block_days": 13}):
        got, got_sum = _run(dataclasses.replace(base, **change))
        _assert_same(ref, got)
        np.testing.assert_array_equal(ref_sum.state.states, got_sum.state.states)


def test_hindcast_chunking_does_not_change_the_results():
    s = dataclasses.replace(BASE, mode="openloop", time_block_days=20)
    ref, _ = _run(s, hindcast=(7, 5, "observed"))
    got, _ = _run(dataclasses.replace(s, basin_chunk=2, member_chunk=5, time_block_days=9),
                  hindcast=(7, 5, "observed"))
    assert ref["hindcast"].shape == (5, len(range(10, 85, 7)), 5, 12)
    _assert_same(ref, got)


def test_adding_a_basin_does_not_change_the_others():
    """Outputs of a basin are the same when it runs alone or beside others."""
    full = _inputs(5)
    alone = full.subset(slice(2, 3))
    ref, _ = _run(BASE, full)
    got, _ = _run(BASE, alone)
    for k in ref:
        np.testing.assert_array_equal(ref[k][2:3], got[k], err_msg=k)


@pytest.mark.parametrize("scheduler", ["threads", "processes", "local-cluster"])
def test_schedulers_give_the_synchronous_result(scheduler):
    """threads, processes and a dask.distributed LocalCluster equal the synchronous run
    bit for bit."""
    s = dataclasses.replace(BASE, basin_chunk=2, workers=2, time_block_days=45)
    ref, _ = _run(s)
    got, _ = _run(dataclasses.replace(s, scheduler=scheduler))
    _assert_same(ref, got)


COMPILED = dataclasses.replace(BASE, parameter_sd={}, state_noise={}, kernel="compiled", basin_chunk=2,
                               time_block_days=25)


@pytest.mark.parametrize("mode", ["openloop", "assimilate"])
@pytest.mark.parametrize("scheduler, workers", [("threads", 1), ("threads", 2), ("threads", 3),
                                                ("processes", 2), ("local-cluster", 2)])
def test_compiled_kernel_gives_the_same_bits_on_every_scheduler(mode, scheduler, workers):
    """The fused compiled kernel's chunks run side by side (threads share the chunk states
    in one process, processes and dask.distributed workers keep them in lanes): every output
    and the end state equal the synchronous run bit for bit (np.array_equal), whatever the
    scheduler, the number of workers and the basin chunking."""
    s = dataclasses.replace(COMPILED, mode=mode)
    ref, ref_sum = _run(s)
    got, got_sum = _run(dataclasses.replace(s, scheduler=scheduler, workers=workers,
                                            basin_chunk=1 + workers % 2))
    _assert_same(ref, got)
    np.testing.assert_array_equal(ref_sum.state.states, got_sum.state.states)
    np.testing.assert_array_equal(ref_sum.n_used, got_sum.n_used)


def test_threads_run_through_the_dask_threaded_scheduler():
    """The threads scheduler runs the chunks as dask tasks (one per chunk and block, seen by
    a dask local-scheduler callback), on as many threads as workers, and the compiled
    kernels release the GIL (numba ``nogil``) so those threads can run together."""
    from dask.callbacks import Callback

    from assim.kernels import block

    seen = []

    class Count(Callback):
        def _pretask(self, key, dsk, state):
            seen.append(threading.get_ident())

    s = dataclasses.replace(COMPILED, scheduler="threads", workers=2)  # 5 basins: 3 chunks
    with Count():
        _run(s)
    assert len(seen) == 3 * len(range(0, 90, 25)) * 2  # a task and its argument per chunk-block
    assert threading.get_ident() not in seen
    assert len(set(seen)) <= 2
    for fn in (block._block, block.analyse_basin, block._step_member):
        assert fn.targetoptions["nogil"] is True


def test_unknown_scheduler_is_a_config_error():
    with pytest.raises(ConfigError, match="ensemble.scheduler|unknown scheduler"):
        with parallel.executor("carrier-pigeon"):
            pass


def test_executor_keeps_the_order():
    with parallel.executor("threads", 2) as ex:
        assert ex.map(abs, [-3, 2, -1, 0]) == [3, 2, 1, 0]


def test_progress_bar_quiet_unless_terminal():
    quiet = io.StringIO()
    bar = parallel.ProgressBar("run", stream=quiet)
    bar(5, 10)
    bar.close()
    assert quiet.getvalue() == ""

    class Tty(io.StringIO):
        def isatty(self):
            return True

    short = Tty()
    bar = parallel.ProgressBar("run", stream=short)  # a run shorter than the 2 s delay
    bar(10, 10)
    bar.close()
    assert short.getvalue() == ""
    loud = Tty()
    bar = parallel.ProgressBar("run", stream=loud, min_interval=0.0, delay=0.0)
    bar(5, 10)
    bar(10, 10)
    bar.close()
    text = loud.getvalue()
    assert "50%" in text and "100%" in text and text.endswith("\n")
