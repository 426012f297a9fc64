"""Time cycling of the ensemble: open loop, assimilation, hindcasts and forecasts.

The engine works on arrays only (numpy; dask through :mod:`assim.parallel`). It receives the
inputs of a run as an :class:`Inputs` record, its settings as a :class:`Settings` record and
a *sink* for its results; it never opens a file. :mod:`assim.pipeline` builds the inputs from
the prepared layer and passes an :mod:`assim.io.products` writer as the sink.

The package, one module per part:

- :mod:`~assim.engine.records`: the records (inputs, settings, ensemble state, plan, results);
- :mod:`~assim.engine.initial`: the ensemble before the first day, prepared parameters;
- :mod:`~assim.engine.block`: one chunk over one time block, the day loop;
- :mod:`~assim.engine.analysis`: glue to :mod:`assim.filters` (one day's analysis and the
  rules around it);
- :mod:`~assim.engine.outputs`: member means and quantiles of a block's outputs;
- :mod:`~assim.engine.forecast`: forecast leads, hindcast issues, one operational issue;
- :mod:`~assim.engine.cycling`: the plan of a run, its chunks and blocks, :func:`run`;
- :mod:`~assim.engine.window`: the fixed-lag smoother's window of the last W days (the
  days a reanalysis records when they leave it);
- :mod:`~assim.engine.diagnostics`: health warnings of a run.
"""

from assim.engine.analysis import analyse, augmented_bounds, collapse_counts, liu_west_shrink
from assim.engine.block import advance
from assim.engine.cycling import plan, run
from assim.engine.diagnostics import health_warnings, summarise_warnings
from assim.engine.forecast import (
    climatology_index,
    forecast_issue,
    forecast_leads,
    hindcast_forecasts,
    issue_indices,
    lead_forcing,
)
from assim.engine.initial import fixed_parameters, initial_ensemble, parameter_ranges
from assim.engine.outputs import quantile_arrays, reduce_members
from assim.engine.records import (
    FORCINGS,
    OBS_GATED,
    OBS_MISSING,
    OBS_REJECTED,
    OBS_USED,
    SECONDS_PER_DAY_OVER_1000,
    BlockResult,
    Climatology,
    EnsembleState,
    HealthWarning,
    Inputs,
    ObsError,
    Plan,
    RunSummary,
    Settings,
    forcing_names,
)
from assim.members import member_quantiles

__all__ = [
    "FORCINGS", "OBS_GATED", "OBS_MISSING", "OBS_REJECTED", "OBS_USED", "SECONDS_PER_DAY_OVER_1000",
    "BlockResult", "Climatology", "EnsembleState", "HealthWarning", "Inputs", "ObsError", "Plan", "RunSummary", "Settings",
    "advance", "analyse", "augmented_bounds", "climatology_index", "collapse_counts", "fixed_parameters",
    "forcing_names", "forecast_issue", "forecast_leads", "health_warnings", "hindcast_forecasts", "initial_ensemble",
    "issue_indices", "lead_forcing", "liu_west_shrink", "member_quantiles", "parameter_ranges", "plan",
    "quantile_arrays", "reduce_members", "run", "summarise_warnings",
]
