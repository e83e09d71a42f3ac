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
from .canonical import IngestResult, canonicalise, melt_wide
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
        frame, lines, rejected, source_units, n_rows, sources = load_netcdf(p, cfg)
        files = np.asarray(frame.pop("__file__"))
    else:
        if fmt == "parquet":
            frame, lines, rejected, n_rows, sources = load_parquet(p, cfg)
            source_units = {}
        else:
            sources = [str(p)]
            source_units = {}
            typed = read_typed_csv(p, cfg, stations)
            if typed is not None:  # a clean file: typed columns straight from pyarrow
                frame, lines, rejected = typed, np.arange(2, len(typed) + 2), []
                n_rows = len(frame)
            else:
                table = read_text_table(p, delimiter=oc["delimiter"], skip_lines=oc["skip_lines"],
                                        encoding=oc["encoding"], section="observations")
                frame, lines, rejected = table.cells, table.lines, list(table.rejected)
                n_rows = len(lines) + len(rejected)
                if oc["layout"] == "long":
                    _check_mapped(table.header, oc["columns"], str(p))
                if oc["layout"] == "wide":
                    frame, lines = melt_wide(frame, lines, cfg, str(p))
        files = str(sources[0]) if sources else str(p)  # one file: one name for every row
    return canonicalise(frame, lines, files, rejected, n_rows, sources, source_units, cfg, stations)


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
