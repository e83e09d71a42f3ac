"""Reports: tables (CSV, Parquet, JSON), CF-style NetCDF, PNG figures and a self-contained HTML page.

Every file is written atomically: to a temporary file in the target folder,
then renamed, so an interrupted run never leaves a half-written file under
the final name.
"""

from .files import atomic_write, write_csv, write_json, write_qc_flags, write_rejected
from .stream import BudgetFiles

__all__ = ["BudgetFiles", "atomic_write", "write_csv", "write_json", "write_qc_flags", "write_rejected"]
