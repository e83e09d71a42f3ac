"""Reports, the last stage: tables (CSV, Parquet, JSON), CF-style NetCDF, PNG figures and a self-contained HTML page.

Takes a finished :class:`~stationflow.api.BudgetRun` (or check / network result) and the partitions
handed to its sinks; gives the output files.  :mod:`.tables` and :mod:`.netcdf` are the budget file
sinks, :mod:`.summary` the report's summary sink, :mod:`.dataset` the in-memory result; :mod:`.plots`
draws, :mod:`.painter` draws in a worker process, :mod:`.html` writes the page, :mod:`.outputs` writes
every file of a command, :mod:`.text` words times and periods, :mod:`.staging` publishes a whole
output folder.

Every file is written atomically: to a temporary file in the target folder,
then renamed, so an interrupted run never leaves a half-written file under
the final name.
"""

from __future__ import annotations

import importlib
from typing import Any

__all__ = ["budget_files", "atomic_write", "write_csv", "write_json", "write_qc_flags", "write_rejected"]
_HOME = {"budget_files": "tables", "atomic_write": "atomic", "write_csv": "files", "write_json": "files",
         "write_qc_flags": "files", "write_rejected": "files"}


def __getattr__(name: str) -> Any:
    # the names above are imported on first use: the figure worker imports this package without pandas
    if name in _HOME:
        return getattr(importlib.import_module(f".{_HOME[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
