"""Time cycling of a run: its plan, the chunks and blocks, and the joining of their results.

Time is cut into blocks (``ensemble.time_block_days``); within a block, each basin chunk
(and, where members are independent, each member chunk) is one task that advances its part
of the ensemble over the block (:func:`assim.engine.block.advance`) and returns the block's
outputs. A chunk's state stays in the process that computes it from one block to the next
(:mod:`assim.parallel`: dask's threaded scheduler, or a lane per chunk for worker
processes); the last block returns the end state. The main thread joins the chunks of each
block and hands it to the sink while the next block is computed (at most two blocks in
flight), so memory stays flat and the results do not depend on the chunking or the
scheduler.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace

import numpy as np

from assim import parallel
from assim.conventions import iso
from assim.engine.block import advance
from assim.engine.diagnostics import health_warnings
from assim.engine.forecast import issue_indices
from assim.engine.initial import fixed_parameters, initial_ensemble
from assim.engine.outputs import reduce_members
from assim.engine.records import (
    BlockResult,
    EnsembleState,
    Inputs,
    Plan,
    RunSummary,
    Settings,
    forcing_names,
)
from assim.engine.window import held_arrays, window_columns
from assim.errors import RunError
from assim.models.base import Model


def plan(inputs: Inputs, settings: Settings, state: EnsembleState | None, until_day: int | None = None) -> Plan:
    """Days of a run from ``state`` (None: from the first day) to ``until_day``.

    Raises
    ------
    RunError
        if the state is not valid on a day of the inputs (or the day before the first), or
        ``until_day`` is outside the inputs.
    """
    days = inputs.days
    start = 0 if state is None else int(state.day - days[0] + 1)
    if not 0 <= start <= len(days):
        raise RunError(f"the restart is not valid on a day of the run period ({iso(days[0])} to "
                       f"{iso(days[-1])})", variable="valid_time", place=iso(state.day))
    stop = len(days) - 1 if until_day is None else int(until_day - days[0])
    if not start - 1 <= stop < len(days):
        raise RunError(f"--until is outside the run period ({iso(days[0])} to {iso(days[-1])}) or before "
                       "the restart", variable="until", place=iso(until_day))
    first = min(settings.spinup_days, len(days))
    return Plan(start, stop, first, first)


def _merge(results: list[list[BlockResult]]) -> BlockResult:
    """Concatenate the tasks of one block (rows: basin chunks, columns: member chunks)."""
    rows = []
    for row in results:
        if len(row) == 1:
            rows.append(row[0])
            continue
        arrays = {k: np.concatenate([r.arrays[k] for r in row], axis=2) if v.ndim == 3 else v
                  for k, v in row[0].arrays.items()}
        st = None if row[0].state is None else EnsembleState.concatenate([r.state for r in row], axis=1)
        hind = None if row[0].hindcast is None else np.concatenate([r.hindcast for r in row], axis=3)
        rows.append(BlockResult(arrays, st, hind, row[0].n_used, row[0].n_gated, row[0].collapse_first))
    r0 = rows[0]
    if len(rows) == 1:
        return r0
    arrays = {k: np.concatenate([r.arrays[k] for r in rows], axis=0) for k in r0.arrays}
    st = None if r0.state is None else EnsembleState.concatenate([r.state for r in rows], axis=0)
    hind = None if r0.hindcast is None else np.concatenate([r.hindcast for r in rows], axis=0)
    cat = np.concatenate
    return BlockResult(arrays, st, hind, cat([r.n_used for r in rows]), cat([r.n_gated for r in rows]),
                       cat([r.collapse_first for r in rows]))


def _chunk_task(args, store) -> BlockResult:
    """One chunk over one time block (see :mod:`assim.parallel`).

    The first block of a chunk brings its model and state; later blocks take the model and
    the end state the previous block left in the ``store``, with the prepared
    parameters (fixed when no parameter is estimated). The result carries the end state only after the last block (or
    a failure); otherwise the state stays in the store (one per process: for the threads
    scheduler, any thread may take the chunk's next block)."""
    key, model, inputs, state, settings, t1, kwargs, last, whole_members = args
    if state is None:
        state = store.pop(key)
    # the model travels with the first block only (pickling its functions by value is slow)
    model = store.setdefault((key, "model"), model) if model is not None else store[(key, "model")]
    fixed = None
    if not settings.estimate:
        fixed = store.get((key, "fixed"))
        if fixed is None:
            fixed = store[(key, "fixed")] = fixed_parameters(model, state.parameters)
    r = advance(model, inputs, state, settings, 0, t1, fixed=fixed, **kwargs)
    if whole_members and r.arrays and r.first_bad is None:
        # reduced here, in parallel, rather than in the main thread that writes the file
        r = replace(r, arrays=reduce_members(r.arrays, settings))
    if last or r.first_bad is not None:
        store.pop((key, "fixed"), None)
        store.pop((key, "model"), None)
        return r
    store[key] = r.state
    return replace(r, state=None)


def run(
    model: Model,
    inputs: Inputs,
    settings: Settings,
    sink=None,
    *,
    state: EnsembleState | None = None,
    until_day: int | None = None,
    hindcast: tuple[int, int, str] | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> RunSummary:
    """Run the ensemble over the inputs' days, block by block, handing outputs to ``sink``.

    Parameters
    ----------
    model : the model of every basin
    inputs : :class:`Inputs`
    settings : :class:`Settings` (``mode`` "openloop", "assimilate" or "reanalysis")
    sink : object with ``write_block(start, arrays)`` (run outputs; ``start`` counts the
        output days of :attr:`Plan.output_slice`; a reanalysis writes each day when it
        leaves the smoother's window, W days later, and the last W days after the last
        block, so its ``start`` may be negative when a run is continued) and, for hindcasts,
        ``write_issues(start, discharge)`` with discharge (basin, issue, lead, member) m3 s-1;
        None keeps nothing (the end state is still returned)
    state : the ensemble to continue from (a restart); None starts a new run
    until_day : last day to run (day number); None = the last day of the inputs
    hindcast : (every_days, leads, forcing kind) to issue hindcast forecasts instead of
        collecting run outputs
    progress : called with (days done, days total) after each block

    Returns
    -------
    RunSummary

    Raises
    ------
    RunError
        when a state becomes NaN or infinite (naming the basin, the day and the state), the
        days asked for are outside the inputs, or ``state`` lacks the AR(1) error of a
        forcing the model takes.
    ValueError
        when ``inputs`` lack a forcing the model takes (:func:`forcing_names`).
    """
    names = forcing_names(model)
    lacking = [n for n in names if getattr(inputs, n) is None]
    if lacking:
        raise ValueError(f"model {model.name!r} takes the forcing {lacking[0]!r}, which the inputs lack")
    if state is not None and set(state.ar1) != set(names):
        raise RunError(f"the ensemble carries forcing errors of {sorted(state.ar1)}, model {model.name} takes "
                       f"{sorted(names)}", variable="ar1")
    if state is None:
        state = initial_ensemble(model, inputs, settings)
    p = plan(inputs, settings, state, until_day)
    nb, nmem = inputs.n_basin, settings.members
    bc = max(1, min(settings.basin_chunk, nb))
    b_chunks = [slice(i, min(i + bc, nb)) for i in range(0, nb, bc)]
    member_chunking = settings.member_chunk > 0 and not settings.assimilate
    mc = settings.member_chunk if member_chunking else nmem
    m_chunks = [slice(i, min(i + mc, nmem)) for i in range(0, nmem, mc)]
    members = np.arange(nmem)
    issues = None
    if hindcast is not None:
        every, leads, kind = hindcast
        issues = issue_indices(p, every, leads, len(inputs.days))
    sub_inputs = [inputs.subset(b) for b in b_chunks]
    chunks = [(bi, b, mi, m) for bi, b in enumerate(b_chunks) for mi, m in enumerate(m_chunks)]
    blocks = [(t, min(t + settings.time_block_days, p.stop + 1))
              for t in range(p.start, p.stop + 1, settings.time_block_days)]

    n_used = np.zeros(nb, dtype=np.int64)
    n_gated = np.zeros(nb, dtype=np.int64)
    first_collapse = np.full(nb, -1, dtype=np.int64)
    total = p.stop + 1 - p.start
    out0 = max(p.start, p.first_output)
    issue_done = 0

    def submit_block(ex, j):
        """Submit the tasks of block ``j``, one per chunk (:meth:`assim.parallel._Executor.submit_block`)."""
        t, t1 = blocks[j]
        # each task gets the days of its block only (and the leads after it), indices shifted
        end = min(len(inputs.days), t1 + (hindcast[1] if hindcast is not None else 0))
        kwargs = dict(first_output=p.first_output - t, first_analysis=p.first_analysis - t,
                      collect=hindcast is None and sink is not None)
        if issues is not None:
            blk = issues[(issues >= t) & (issues < t1)]
            kwargs.update(issue_index=blk - t, leads=hindcast[1], forecast_forcing=hindcast[2])
        last = j == len(blocks) - 1
        first = j == 0  # the model and the state go out once per chunk
        return ex.submit_block(_chunk_task, [
            (ci, model if first else None, sub_inputs[bi].days_slice(t, end), state.subset(b, m) if first else None,
             settings, t1 - t, dict(kwargs, members=members[m]), last, len(m_chunks) == 1)
            for ci, (bi, b, mi, m) in enumerate(chunks)])

    with parallel.executor(settings.scheduler, settings.workers) as ex:
        # The next block is submitted before the current one is joined and written by the main
        # thread; two blocks in flight bound memory.
        ahead = 2
        pending = [submit_block(ex, j) for j in range(min(ahead, len(blocks)))]
        for j, (t, t1) in enumerate(blocks):
            flat_results = pending.pop(0).result()
            bad = [r.first_bad for r in flat_results if r.first_bad is not None]
            if bad:
                basin, day, var = min(bad, key=lambda x: x[1])
                raise RunError("the ensemble state became NaN or infinite; check the forcing, the "
                               "parameters and the filter settings", variable=var,
                               place=f"basin {basin}, {iso(day)}")
            if j + ahead < len(blocks):
                pending.append(submit_block(ex, j + ahead))
            grid = [flat_results[i * len(m_chunks):(i + 1) * len(m_chunks)] for i in range(len(b_chunks))]
            merged = _merge(grid)
            if merged.state is not None:  # the last block brings the end state back
                state = merged.state
            if len(m_chunks) > 1 and merged.arrays:  # else reduced in the chunk tasks
                merged.arrays = reduce_members(merged.arrays, settings)
            if sink is not None and merged.arrays:
                # a reanalysis records the days that left the smoother's window in the block
                first = max(t - settings.smoother_window, p.first_output) if settings.reanalysis else max(t, out0)
                sink.write_block(first - out0, merged.arrays)
            if merged.hindcast is not None and sink is not None:
                sink.write_issues(issue_done, merged.hindcast)
                issue_done += merged.hindcast.shape[1]
            n_used += merged.n_used
            n_gated += merged.n_gated
            first_collapse = np.where((first_collapse < 0) & (merged.collapse_first >= 0),
                                      merged.collapse_first, first_collapse)
            if progress is not None:
                progress(t1 - p.start, total)
    if settings.reanalysis and sink is not None and hindcast is None:
        # the last days never leave the window: recorded as the window holds them
        held = held_arrays(state.window, state.window_days, window_columns(settings.write_states),
                           int(inputs.days[p.first_output]) if p.first_output < len(inputs.days) else 2**62,
                           np.float32 if settings.float32 else np.float64)
        if held is not None:
            sink.write_block(held[0] - int(inputs.days[0]) - out0, held[1])
    warns = health_warnings(inputs.basin_ids, n_used, n_gated, first_collapse, settings)
    return RunSummary(state, warns, n_used, n_gated, first_collapse, p)
