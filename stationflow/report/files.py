"""Atomic writers for the output files (the tables here; the atomic rename in :mod:`.atomic`)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from .atomic import atomic_write, write_with

__all__ = ["atomic_write", "write_with", "write_csv", "csv_bytes", "write_json", "write_rejected", "write_qc_flags"]


def _iso_utc(series: pd.Series) -> pd.Series:
    import pyarrow as pa
    import pyarrow.compute as pc

    t = pd.DatetimeIndex(series)
    if t.tz is None:
        t = t.tz_localize("UTC")
    arr = pa.array(t.tz_convert("UTC").tz_localize(None).as_unit("s"))
    return pd.Series(pc.strftime(arr, "%Y-%m-%dT%H:%M:%SZ").to_numpy(zero_copy_only=False), index=series.index)


def write_csv(frame: pd.DataFrame, path: str | Path, *, time_columns: tuple[str, ...] = ("time",), float_format: str = "%.6g") -> Path:
    """Write a CSV with ISO 8601 UTC times (``Z``), fast (pyarrow's writer, shortest float repr)."""
    import pyarrow.csv as pacsv

    table = _csv_table(frame, time_columns)
    with atomic_write(path) as tmp:
        pacsv.write_csv(table, tmp, pacsv.WriteOptions(quoting_style="needed"))
    return Path(path)


def csv_bytes(frame: pd.DataFrame, *, time_columns: tuple[str, ...] = ("time",), header: bool = True) -> bytes:
    """The text :func:`write_csv` writes for ``frame`` (without the header line unless ``header``): a file
    can be written in pieces."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    sink = pa.BufferOutputStream()
    pacsv.write_csv(_csv_table(frame, time_columns), sink,
                    pacsv.WriteOptions(quoting_style="needed", include_header=header))
    return sink.getvalue().to_pybytes()


def _csv_table(frame: pd.DataFrame, time_columns: tuple[str, ...]):
    import pyarrow as pa

    out = frame.copy()
    for c in time_columns:
        if c in out and len(out):
            out[c] = _iso_utc(out[c])
    for c in out.columns:
        if out[c].dtype == object or isinstance(out[c].dtype, pd.CategoricalDtype):
            out[c] = out[c].astype(str)
    return pa.Table.from_pandas(out, preserve_index=False)


def _jsonable(obj):
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return float(obj)
    if isinstance(obj, (pd.Timestamp,)):
        return obj.isoformat()
    if isinstance(obj, (pd.Timedelta,)):
        return str(obj)
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def write_json(data: dict, path: str | Path) -> Path:
    """Write pretty JSON."""
    with atomic_write(path) as tmp:
        tmp.write_text(json.dumps(data, indent=2, default=_jsonable) + "\n", encoding="utf-8")
    return Path(path)


def write_rejected(rejected: pd.DataFrame, path: str | Path) -> Path:
    """``rejected_rows.csv``: file, line, reason."""
    cols = ["file", "line", "reason"]
    return write_csv(rejected[cols] if len(rejected) else pd.DataFrame(columns=cols), path, time_columns=())


#: the columns of qc_flags.csv
QC_FLAG_COLUMNS = ["station_id", "time", "variable", "flag", "tests"]


def write_qc_flags(flags: pd.DataFrame, path: str | Path) -> Path:
    """``qc_flags.csv``: station_id, time, variable, flag, tests."""
    return write_csv(flags[QC_FLAG_COLUMNS], path)
