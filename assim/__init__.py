"""assim: ensemble data assimilation and streamflow forecasting for conceptual
rainfall-runoff models.

Research guidance only, subordinate to official flood warnings and local authorities
(see :data:`assim.caution.CAUTION`).

Entry points (each returns the xarray Dataset it wrote)::

    cfg = assim.load_config("config/config.yaml")
    assim.prep(cfg); assim.run(cfg, mode="assimilate"); assim.hindcast(cfg)
    assim.forecast(cfg, "2024-03-01"); assim.verify(cfg)

The assimilation step alone: :mod:`assim.filters` (numpy only).
"""

from assim._version import __version__
from assim.caution import CAUTION
from assim.config import load_config

_PIPELINE = ("prep", "check", "run", "hindcast", "forecast", "verify", "plot", "report")

__all__ = ["CAUTION", "__version__", "load_config", *_PIPELINE]


def __getattr__(name):
    # The pipeline pulls in xarray and dask; import it only when it is used, so that
    # `import assim.filters` stays a numpy-only import.
    if name in _PIPELINE:
        from assim import pipeline

        return getattr(pipeline, name)
    raise AttributeError(f"module 'assim' has no attribute {name!r}")
