"""netCDF observations (a file or a folder of station files, CF discrete sampling geometry or a
plain time series per station).

Takes a path and the configuration; gives the raw frame and the 1-based record number of each row.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .. import variables as V
from ..config import Config
from ..errors import IngestError
from .canonical import RawTable
from .text import clip


def load_netcdf(p: Path, cfg: Config) -> RawTable:
    """The rows of one netCDF station file or of every one in a folder (one station per file)."""
    import xarray as xr

    files = sorted(p.glob("*.nc")) + sorted(p.glob("*.cdf")) + sorted(p.glob("*.nc4")) if p.is_dir() else [p]
    if not files:
        raise IngestError(f"{p}: no netCDF files (*.nc, *.cdf) in this folder")
    mapping = cfg["observations"]["columns"]
    frames = []
    units: dict[str, str] = {}
    for f in files:
        try:
            dset = xr.open_dataset(f, decode_times=True)
        except Exception as exc:  # noqa: BLE001 - any backend failure is a file problem
            raise IngestError(f"{f}: cannot read as netCDF ({clip(exc)})") from None
        with dset:
            if "time" not in dset.coords and "time" not in dset:
                raise IngestError(f"{f}: no 'time' coordinate; expected one station per file with a time axis")
            sid = None
            for attr in ("station_id", "facility_id", "site_id", "station_name", "platform_id"):
                if attr in dset.attrs and str(dset.attrs[attr]).strip():
                    sid = str(dset.attrs[attr]).strip()
                    break
            sid = sid or f.name.split(".")[0]
            data = {"time": pd.DatetimeIndex(dset["time"].values).tz_localize("UTC")}
            nt = len(data["time"])
            for name in ("lat", "latitude", "lon", "longitude", "alt", "altitude", "elevation"):
                if name in dset:
                    canon = {"lat": "latitude", "lon": "longitude", "alt": "elevation", "altitude": "elevation"}.get(name, name)
                    raw = np.asarray(dset[name].values, float).reshape(-1)
                    # a coordinate may be stored per record or once per file
                    data[canon] = raw if raw.size == nt else np.full(nt, raw[0])
            for src, canon in mapping.items():
                if src in dset and canon not in V.ID_COLUMNS:
                    data[canon] = np.asarray(dset[src].values, float).reshape(nt)
                    unit = dset[src].attrs.get("units")
                    if unit and canon in V.CANONICAL:
                        units.setdefault(canon, str(unit))
            for canon in V.CANONICAL:
                if canon in dset and canon not in data:
                    data[canon] = np.asarray(dset[canon].values, float).reshape(nt)
                    if "units" in dset[canon].attrs:
                        units.setdefault(canon, str(dset[canon].attrs["units"]))
            fr = pd.DataFrame(data)
            fr["station_id"] = sid
            fr["__file__"] = str(f)
            fr["__line__"] = np.arange(1, nt + 1)
            frames.append(fr)
    frame = pd.concat(frames, ignore_index=True)
    lines = frame.pop("__line__").to_numpy()
    return RawTable(frame, lines, np.asarray(frame.pop("__file__")), [], len(frame), [str(f) for f in files], units)
