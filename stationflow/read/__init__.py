"""Reading: station tables and observations from any supported export into one canonical form.

Takes file paths and the configuration; gives an :class:`IngestResult` (canonical observations in SI
units and UTC, the station table, every rejected row with its file, line and reason, and the row
accounting).  One module per input format (:mod:`.text` and :mod:`.fastcsv` for CSV,
:mod:`.parquet`, :mod:`.netcdf`), :mod:`.times` and :mod:`.layouts` for time stamps,
:mod:`.stations` for the station table, :mod:`.canonical` for names, units and duplicates, and
:mod:`.observations` for the whole read.  Add an input format: a module here that returns the raw
frame and its line numbers, and one branch in :func:`~.observations.read_observations`.
"""

from __future__ import annotations

from .canonical import IngestResult
from .layouts import detect_layout
from .observations import read, read_observations
from .stations import read_stations
from .times import is_utc, parse_times, tzinfo_for

__all__ = ["IngestResult", "detect_layout", "is_utc", "parse_times", "read", "read_observations", "read_stations",
           "tzinfo_for"]
