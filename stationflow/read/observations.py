"""Observations from any supported source, end to end: find the format, read it, make it canonical.

Takes a path (CSV long or wide, Parquet, netCDF) and the configuration; gives an :class:`IngestResult`.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pandas as pd

from ..config import Config
from ..errors import IngestError
from .canonical import IngestResult, RawTable, canonicalise, melt_wide
from .fastcsv import read_typed_csv
from .netcdf import load_netcdf
from .parquet import load_parquet
from .stations import read_stations
from .text import read_text_table

log = logging.getLogger(__name__)

_NEEDS_OBS = ("station_id",)


# --------------------------------------------------------------------------
# observations
# --------------------------------------------------------------------------

def _detect_format(path: Path, configured: str) -> str:
    if configured != "auto":
        return configured
    if path.is_dir():
        if any(path.glob("*.parquet")) or any(path.glob("**/*.parquet")):
            return "parquet"
        return "netcdf"
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        return "parquet"
    if suffix in (".nc", ".cdf", ".nc4", ".netcdf"):
        return "netcdf"
    return "csv"


def read_observations(
    path: str | Path,
    config: Config | None = None,
    *,
    stations: pd.DataFrame | None = None,
) -> IngestResult:
    """Read observations (CSV long or wide, Parquet, or netCDF station files).

    ``stations`` is the station table from :func:`read_stations`; when it is
    ``None`` the table is derived from ``latitude``/``longitude`` (and
    ``elevation``) columns of the observations, or from netCDF coordinates.
    """
    cfg = config or Config()
    oc = cfg["observations"]
    p = Path(path)
    if not p.exists():
        raise IngestError(f"{p}: file not found; check the path")
    fmt = _detect_format(p, oc["format"])
    if fmt == "netcdf":
        raw = load_netcdf(p, cfg)
    elif fmt == "parquet":
        raw = load_parquet(p, cfg)
    else:
        raw = _read_csv(p, cfg, stations)
    return canonicalise(raw, cfg, stations)


def _read_csv(p: Path, cfg: Config, stations: pd.DataFrame | None) -> RawTable:
    """A CSV file: the typed fast path when the file is clean, else the general text reader."""
    oc = cfg["observations"]
    typed = read_typed_csv(p, cfg, stations)
    if typed is not None:  # a clean file: typed columns straight from pyarrow
        return RawTable(typed, np.arange(2, len(typed) + 2), str(p), [], len(typed), [str(p)])
    table = read_text_table(p, delimiter=oc["delimiter"], skip_lines=oc["skip_lines"], encoding=oc["encoding"],
                            section="observations")
    raw = RawTable(table.cells, table.lines, str(p), list(table.rejected), len(table.lines) + len(table.rejected),
                   [str(p)])
    if oc["layout"] == "long":
        _check_mapped(table.header, oc["columns"], str(p))
    if oc["layout"] == "wide":
        raw.frame, raw.lines, raw.wide_rows = melt_wide(raw.frame, raw.lines, cfg, str(p))
    return raw


def _check_mapped(header: list[str], mapping: dict[str, str], source: str) -> None:
    """Stop when a column named in ``observations.columns`` is not in the file (a misspelling would lose it silently)."""
    missing = [c for c in mapping if c not in header]
    if missing:
        c = missing[0]
        raise IngestError(
            f"{source}: column {c!r} named in observations.columns ({c} = \"{mapping[c]}\") is not in the file; "
            f"its columns are: {', '.join(map(str, header))}"
        )


def read(
    obs_path: str | Path,
    stations_path: str | Path | None = None,
    config: Config | None = None,
) -> IngestResult:
    """Read the station table (optional) and the observations: the ingest stage."""
    cfg = config or Config()
    stations = read_stations(stations_path, cfg) if stations_path is not None else None
    return read_observations(obs_path, cfg, stations=stations)
