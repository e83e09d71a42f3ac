"""stationflow: advection and in-situ change from networks of fixed stations.

The stages, each a module of pure functions on documented data:
:mod:`~stationflow.ingest` -> :mod:`~stationflow.qc` -> :mod:`~stationflow.align`
-> :mod:`~stationflow.geometry` -> :mod:`~stationflow.gradient` ->
:mod:`~stationflow.budget` -> :mod:`~stationflow.report`.
:mod:`~stationflow.pipeline` wires them from a configuration.
"""

from __future__ import annotations

import logging

__version__ = "0.1.0"

logging.getLogger(__name__).addHandler(logging.NullHandler())

__all__ = ["__version__"]
