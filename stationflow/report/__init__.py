"""Reports: tables (CSV, Parquet, JSON), CF-style NetCDF, PNG figures and a self-contained HTML page.

Every file is written atomically: to a temporary file in the target folder,
then renamed, so an interrupted run never leaves a half-written file under
the final name.
"""

from __future__ import annotations

import importlib
from typing import Any

__all__ = ["BudgetFiles", "atomic_write", "write_csv", "write_json", "write_qc_flags", "write_rejected"]
_HOME = {"BudgetFiles": "stream", "atomic_write": "atomic", "write_csv": "files", "write_json": "files",
         "write_qc_flags": "files", "write_rejected": "files"}


def __getattr__(name: str) -> Any:
    # the names above are imported on first use: the figure worker imports this package without pandas
    if name in _HOME:
        return getattr(importlib.import_module(f".{_HOME[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
