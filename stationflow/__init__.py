"""stationflow: advection and in-situ change from networks of fixed stations.

The packages follow the pipeline, in its order:

- :mod:`stationflow.read`: station tables and observations from any export, canonical and in UTC;
- :mod:`stationflow.qc`: quality-control tests that flag values (never delete them);
- :mod:`stationflow.network`: projection, clusters and their screening, the (time, station) grid;
- :mod:`stationflow.estimate`: plane fits, budget terms, the error model, kinematics;
- :mod:`stationflow.run`: the check, the plan, time partitions, the local and Dask engines, sinks,
  and (in :mod:`stationflow.run.workers` alone) threads, worker processes and allocator settings;
- :mod:`stationflow.report`: tables, NetCDF, figures and the HTML report.

:mod:`stationflow.api` wires them (the jobs the command line runs); :mod:`stationflow.schema`
describes every output column; :mod:`stationflow.scenarios` makes fields with known truth.
"""

from __future__ import annotations

import logging

__version__ = "0.1.0"

logging.getLogger(__name__).addHandler(logging.NullHandler())

__all__ = ["__version__"]
