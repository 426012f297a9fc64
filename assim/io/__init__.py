"""Every file format of assim: raw records, the prepared layer, products and restarts.

Nothing outside this package opens a data file. Submodules:

- :mod:`assim.io.common`   atomic writes, CF global attributes
- :mod:`assim.io.raw`      basins.yaml, weather.csv, gauge.csv
- :mod:`assim.io.prepared` forcing.nc, observations.nc, basins.nc
- :mod:`assim.io.products` run, hindcast and forecast NetCDF (streamed in time blocks)
- :mod:`assim.io.restart`  restart.nc
- :mod:`assim.io.skill`    skill.nc and skill.csv
"""

from assim.io.common import atomic_path, global_attributes

__all__ = ["atomic_path", "global_attributes"]
