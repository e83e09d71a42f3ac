"""The station table: ids, WGS84 positions, elevations and sensor heights.

Takes a stations CSV (or the positions carried in the observation rows); gives one validated row
per station.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd

from ..config import Config
from ..errors import IngestError
from .text import as_text, clip, parse_numbers, read_text_table

# --------------------------------------------------------------------------
# stations
# --------------------------------------------------------------------------


def rename_columns(columns: list[str], mapping: dict[str, str]) -> dict[str, str]:
    return {c: mapping.get(c, c) for c in columns}


def read_stations(path: str | Path, config: Config | None = None) -> pd.DataFrame:
    """Read the stations CSV into ``station_id, latitude, longitude, elevation, sensor_height``.

    Coordinates are degrees (WGS84), elevation metres above sea level,
    sensor height metres above ground.  Any problem in this small file is
    a file-level :class:`IngestError` naming the line.
    """
    cfg = config or Config()
    sc = cfg["stations"]
    table = read_text_table(path, delimiter=sc["delimiter"], skip_lines=sc["skip_lines"],
                            encoding=sc["encoding"], section="stations")
    if table.rejected:
        f, line, reason = table.rejected[0]
        raise IngestError(f"{f}: line {line}: {reason}")
    cells = table.cells.rename(columns=rename_columns(table.header, sc["columns"]))
    for req in ("station_id", "latitude", "longitude"):
        if req not in cells:
            raise IngestError(
                f"{table.path}: no column {req!r} (columns are: {', '.join(table.header)}); "
                f"map yours in [stations.columns], for example MyName = \"{req}\""
            )
    if len(cells) == 0:
        raise IngestError(f"{table.path}: no station rows after the header")
    out = pd.DataFrame({"station_id": as_text(cells["station_id"]).astype(str)})
    for name in ("latitude", "longitude", "elevation", "sensor_height"):
        if name not in cells:
            out[name] = np.nan
            continue
        x, bad = parse_numbers(cells[name], set())
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise IngestError(f"{table.path}: line {table.lines[i]}: {name} {clip(cells[name].iloc[i])!r} is not a number")
        out[name] = x
    return _validate_stations(out, table.path, table.lines)


def _validate_stations(out: pd.DataFrame, path: str, lines: np.ndarray) -> pd.DataFrame:
    empty = out["station_id"].isin(["", "nan", "<NA>"]).to_numpy()
    if empty.any():
        raise IngestError(f"{path}: line {lines[np.flatnonzero(empty)[0]]}: station_id is empty")
    for name, lo, hi in (("latitude", -90, 90), ("longitude", -180, 360)):
        x = out[name].to_numpy()
        bad = ~np.isfinite(x) | (x < lo) | (x > hi)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise IngestError(
                f"{path}: line {lines[i]}: {name} {x[i]:g} of station {out['station_id'].iloc[i]!r} "
                f"is outside [{lo}, {hi}] degrees (give decimal degrees, WGS84)"
            )
    out["longitude"] = ((out["longitude"] + 180.0) % 360.0) - 180.0
    el = out["elevation"].to_numpy()
    if np.any(np.isfinite(el) & ((el < -500) | (el > 9000))):
        i = int(np.flatnonzero(np.isfinite(el) & ((el < -500) | (el > 9000)))[0])
        raise IngestError(f"{path}: line {lines[i]}: elevation {el[i]} m is not plausible (expected metres above sea level)")
    dup = out.duplicated("station_id", keep=False)
    if dup.any():
        same = out[dup].drop_duplicates()
        if same["station_id"].duplicated().any():
            sid = same["station_id"][same["station_id"].duplicated()].iloc[0]
            raise IngestError(f"{path}: station {sid!r} is listed twice with different coordinates")
        out = out.drop_duplicates("station_id")
    return out.reset_index(drop=True)


def station_labels(col: pd.Series) -> pd.Series:
    """Station ids, stripped, as a categorical with sorted categories ("" for a missing id).

    Works on the distinct labels only, so it costs little for millions of rows.
    """
    coded = col.cat.codes.to_numpy() if isinstance(col.dtype, pd.CategoricalDtype) else None
    if coded is not None and np.bincount(coded[coded >= 0], minlength=len(col.cat.categories)).all():
        codes, uniques = coded, col.cat.categories  # every label used (the typed reader's): no factorising
    else:
        codes, uniques = pd.factorize(col)
    labels = pd.Series(uniques).astype("string").str.strip().fillna("").astype(str).to_numpy(object)
    labels = np.append(labels, "")  # code -1 (missing) -> ""
    cats = np.array(sorted(set(labels)), dtype=object)
    remap = np.searchsorted(cats, labels)
    return pd.Series(pd.Categorical.from_codes(remap[codes], categories=pd.Index(cats, dtype=object)), index=col.index)


def looks_infinite(raw: object) -> bool:
    s = str(raw).strip().lower().lstrip("+-")
    return s in ("inf", "infinity", "nan") or bool(re.fullmatch(r"[0-9.]+e[+]?[0-9]{3,}", s))


def stations_from_rows(frame, out, lines, files, reasons) -> pd.DataFrame:
    cols = {}
    for name in ("latitude", "longitude", "elevation", "sensor_height"):
        if name in frame:
            x, bad = parse_numbers(frame[name], set())
            for i in np.flatnonzero(bad):
                reasons.add(i, f"{name}: cannot read {clip(frame[name].iloc[i])!r} as a number")
            cols[name] = x
        else:
            cols[name] = np.full(len(frame), np.nan)
    st = pd.DataFrame({"station_id": out["station_id"].to_numpy(), **cols})
    st["__line__"] = np.asarray(lines)
    st["__file__"] = files if isinstance(files, str) else np.asarray(files)
    ok = ~reasons.mask(len(st)) & (st["station_id"] != "").to_numpy()
    st = st[ok]
    uniq = st.drop_duplicates(["station_id", "latitude", "longitude", "elevation", "sensor_height"])
    moved = uniq["station_id"].duplicated(keep=False)
    if moved.any():
        sid = uniq.loc[moved, "station_id"].iloc[0]
        rows = uniq[uniq["station_id"] == sid]
        raise IngestError(
            f"{rows['__file__'].iloc[0]}: station {sid!r} changes coordinates between lines "
            f"{rows['__line__'].iloc[0]} and {rows['__line__'].iloc[1]}; give a stations file with --stations"
        )
    res = uniq.drop(columns=["__line__", "__file__"]).reset_index(drop=True)
    first = files if isinstance(files, str) else (str(files[0]) if len(files) else "observations")
    return _validate_stations(res, first, uniq["__line__"].to_numpy())
