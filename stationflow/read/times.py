"""Time stamps: strings in any common layout and zone to UTC instants.

Takes a column of strings, the station of each row and the configured zone and format; gives UTC
timestamps, a reason for each row that cannot be read, and the layout used (:mod:`.layouts` finds it).
"""

from __future__ import annotations

import datetime as _dt
import re
from dataclasses import dataclass
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd

from ..errors import ConfigError, IngestError
from .text import as_text, clip

_TZ_SUFFIX = r"(?:[zZ]|[+-]\d{2}(?::?\d{2})?)$"


def is_utc(name: str) -> bool:
    """True when the time-zone setting ``name`` means UTC ('UTC', 'Z', 'GMT', '+00:00', ...)."""
    tz = tzinfo_for(name)
    return isinstance(tz, _dt.timezone) and tz.utcoffset(None) == _dt.timedelta(0)


def tzinfo_for(name: str) -> _dt.tzinfo:
    m = re.fullmatch(r"(?:UTC)?\s*([+-])(\d{1,2})(?::?(\d{2}))?", name.strip())
    if m:
        sign = 1 if m.group(1) == "+" else -1
        off = _dt.timedelta(hours=int(m.group(2)), minutes=int(m.group(3) or 0))
        return _dt.timezone(sign * off)
    if name.strip().upper() in ("UTC", "Z", "GMT"):
        return _dt.timezone.utc
    try:
        return ZoneInfo(name.strip())
    except (ZoneInfoNotFoundError, ValueError):
        raise ConfigError(
            f"observations.timezone = {name!r} is not an IANA time zone (like 'Europe/Vienna') "
            "or a fixed offset (like '+08:00')"
        ) from None


@dataclass(frozen=True)
class TimeSettings:
    """How a file states its times: one column (``column``) or one column per part (``columns``: year,
    month, day[, hour, minute, second]), a ``strftime`` layout or "" (found from the data), and the
    zone naive times are in (IANA name or fixed offset)."""

    column: str | None = "time"
    columns: tuple[str, ...] = ()
    format: str = ""
    zone: str = "UTC"

    @classmethod
    def of(cls, oc) -> "TimeSettings":
        """From the ``[observations]`` configuration table."""
        cols = tuple(oc["time_columns"])
        return cls(None if cols else "time", cols, oc["time_format"], oc["timezone"])


def parse_times(frame: pd.DataFrame, settings: TimeSettings, station: pd.Series, source: str = "observations"
                ) -> tuple[pd.Series, np.ndarray, list[str | None], str]:
    """Parse times to UTC. Returns (times, bad_mask, reasons per bad row, layout used).

    Without ``settings.format`` the layout is found from the data
    (:func:`stationflow.read.layouts.detect_layout`: ISO 8601 or a common
    spreadsheet/logger layout, day-first against month-first settled by the
    data).
    Naive times are local times in ``settings.zone``.  At a daylight-saving
    fall-back, an ambiguous local time is resolved from the station's order
    in the file (first occurrence summer time, second standard time); if
    that cannot be told the row is rejected, as are local times that do not
    exist (spring-forward gap).
    """
    n = len(frame)
    no_aware = (np.zeros(n, bool), pd.Series(pd.NaT, index=frame.index, dtype="datetime64[ns, UTC]"))
    if settings.columns:
        naive, layout = _from_parts(frame, settings.columns)
        aware_mask, aware = no_aware
    else:
        col = frame[settings.column]
        if isinstance(col.dtype, pd.DatetimeTZDtype):  # typed and zoned already (Parquet, netCDF)
            t = col.dt.tz_convert("UTC")
            missing_t = t.isna().to_numpy()
            return t, missing_t, [("time is missing" if m else None) for m in missing_t], "ISO8601"
        if pd.api.types.is_datetime64_dtype(col.dtype):
            naive, layout = col, settings.format or "ISO8601"
            aware_mask, aware = no_aware
        else:
            naive, aware_mask, aware, layout = _from_text(col, settings.format, station)
    reasons: list[str | None] = [None] * n
    naive, aware = _in_years(naive, aware, aware_mask, reasons)
    out = pd.Series(pd.NaT, index=frame.index, dtype="datetime64[ns, UTC]")
    nav = naive.notna().to_numpy() & ~aware_mask
    out[nav] = _local_to_utc(naive, nav, settings.zone, station, source, reasons)[nav]
    out[aware_mask] = aware[aware_mask]
    bad = out.isna().to_numpy()
    for i in np.flatnonzero(bad):
        if reasons[i] is None:
            if settings.columns:
                vals = "/".join(clip(frame[c].iloc[i]) for c in settings.columns)
                reasons[i] = f"cannot build a time from {'/'.join(settings.columns)} = {vals}"
            else:
                raw = frame[settings.column].iloc[i]
                reasons[i] = ("time is missing" if (pd.isna(raw) or str(raw).strip() == "")
                              else f"cannot parse time {clip(raw)!r}")
    return out, bad, reasons, layout


def _from_parts(frame: pd.DataFrame, columns: tuple[str, ...]) -> tuple[pd.Series, str]:
    """Naive times from one column per part (year, month, day, hour, minute, second); 24:00 is next midnight."""
    parts = {}
    for key, colname in zip(("year", "month", "day", "hour", "minute", "second"), columns):
        parts[key] = pd.to_numeric(as_text(frame[colname]), errors="coerce")
    for key in ("hour", "minute", "second"):
        parts.setdefault(key, pd.Series(0, index=frame.index))
    comp = pd.DataFrame(parts).astype(float)
    whole = comp.notna().all(axis=1) & (comp.fillna(0) % 1 == 0).all(axis=1)
    naive = pd.to_datetime(comp.where(whole), errors="coerce")
    hour24 = whole & (comp["hour"] == 24)  # 24:00 means midnight of the next day
    if hour24.any():
        c2 = comp.copy()
        c2.loc[hour24, "hour"] = 0
        naive = naive.where(~hour24, pd.to_datetime(c2.where(hour24), errors="coerce") + pd.Timedelta(days=1))
    return naive, "columns: " + ", ".join(columns)


def _from_text(col: pd.Series, time_format: str, station: pd.Series
               ) -> tuple[pd.Series, np.ndarray, pd.Series, str]:
    """(naive times, which rows carry their own offset, those rows in UTC, the layout used) of a text column."""
    text = as_text(col)
    aware_mask = text.str.contains(_TZ_SUFFIX, regex=True).fillna(False).to_numpy(bool)
    layout = time_format or "ISO8601"
    if not time_format and not aware_mask.all():
        from .layouts import detect_layout

        layout = detect_layout(text.where(~aware_mask), station)
    naive = pd.to_datetime(text.where(~aware_mask), errors="coerce", format=layout)
    if aware_mask.any():
        aware = pd.to_datetime(text.where(aware_mask), errors="coerce", utc=True, format=time_format or "ISO8601")
    else:
        aware = pd.Series(pd.NaT, index=col.index, dtype="datetime64[ns, UTC]")
    return naive, aware_mask, aware, layout


def _in_years(naive: pd.Series, aware: pd.Series, aware_mask: np.ndarray, reasons: list
              ) -> tuple[pd.Series, pd.Series]:
    """Times outside the years 1900-2200 made missing, with their reason."""
    if getattr(naive.dt, "tz", None) is not None:
        naive = naive.dt.tz_localize(None)
    out_of_range = (naive.notna() & ((naive.dt.year < 1900) | (naive.dt.year > 2200))).to_numpy(bool)
    if aware_mask.any():
        aw = aware.notna() & ((aware.dt.year < 1900) | (aware.dt.year > 2200))
        out_of_range = out_of_range | aw.to_numpy(bool)
        aware = aware.where(~aw)
    for i in np.flatnonzero(out_of_range):
        reasons[i] = "time is outside the years 1900-2200"
    return naive.where(~pd.Series(out_of_range, index=naive.index)).astype("datetime64[ns]"), aware


def _local_to_utc(naive: pd.Series, nav: np.ndarray, timezone: str, station: pd.Series, source: str,
                  reasons: list) -> pd.Series:
    """The naive local times (rows ``nav``) in UTC; at a fall-back hour resolved by each station's order,
    in a spring-forward gap missing, each with its reason."""
    tz = tzinfo_for(timezone)
    if isinstance(tz, _dt.timezone):
        out = pd.Series(pd.NaT, index=naive.index, dtype="datetime64[ns, UTC]")
        out[nav] = (naive[nav] - pd.Timedelta(tz.utcoffset(None))).dt.tz_localize("UTC")
        return out
    if not nav.any():
        return pd.Series(pd.NaT, index=naive.index, dtype="datetime64[ns, UTC]")
    n = len(naive)
    loc_nat = naive.dt.tz_localize(tz, ambiguous="NaT", nonexistent="NaT")
    loc_dst = naive.dt.tz_localize(tz, ambiguous=np.ones(n, bool), nonexistent="NaT")
    nonexistent = nav & loc_dst.isna().to_numpy()
    ambiguous = nav & loc_nat.isna().to_numpy() & ~nonexistent
    resolved = loc_nat.copy()
    if ambiguous.any():
        _check_order_at_fall_back(naive, station, ambiguous, source)
        is_dst, unresolved = _resolve_ambiguous(naive, station, ambiguous)
        ok = ambiguous & ~unresolved
        flags = np.where(ok, is_dst, True)
        fixed = naive.dt.tz_localize(tz, ambiguous=flags, nonexistent="NaT")
        resolved[ok] = fixed[ok]
        for i in np.flatnonzero(unresolved):
            reasons[i] = (f"local time {naive.iloc[i]} occurs twice at the daylight-saving change "
                          "and the station's time order does not tell which is meant")
    for i in np.flatnonzero(nonexistent):
        reasons[i] = f"local time {naive.iloc[i]} does not exist in {timezone} (daylight-saving gap)"
    return resolved.dt.tz_convert("UTC")


def _check_order_at_fall_back(naive: pd.Series, station: pd.Series, ambiguous: np.ndarray, source: str) -> None:
    """Stop when a station's local times are out of order around a fall-back hour (file order cannot resolve it).

    In time order a station's naive local times go back once per clock
    change, by at most the change, at the repeated hour.  Any other step back means the rows
    are not in time order, and reading the repeated hour from file order
    would give wrong times silently.
    """
    frame = pd.DataFrame({"s": station.to_numpy(), "t": naive.to_numpy()})
    amb = frame[ambiguous]
    changes = amb.assign(d=amb["t"].dt.date).groupby("s", sort=False)["d"].nunique()  # fall-backs per station
    frame = frame[frame["s"].isin(changes.index) & frame["t"].notna()]
    step = frame.groupby("s", sort=False)["t"].diff()
    back = step < pd.Timedelta(0)
    per_station = back.groupby(frame["s"], sort=False).sum()
    large = (back & (step < -pd.Timedelta(hours=2))).groupby(frame["s"], sort=False).sum()
    bad = per_station[(per_station > changes.reindex(per_station.index).fillna(0)) | (large > 0)]
    if len(bad):
        first = naive[ambiguous].min()
        raise IngestError(
            f"{source}: station {bad.index[0]!r} has local times out of time order around the daylight-saving change "
            f"({first:%Y-%m-%d %H:%M} and the hour after it occur twice), so the file order cannot tell which is which; "
            "give the times with their UTC offset (for example 2026-10-25T02:30+01:00) or sort each station's rows by time"
        )


def _resolve_ambiguous(naive: pd.Series, station: pd.Series, ambiguous: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Decide summer (True) or standard time for ambiguous local times.

    Within one station, in file order: the first occurrence of an ambiguous
    local time is summer time and the second standard time.  A single
    occurrence is summer time when the station's next report goes back in
    local time, standard time when its previous report was later; else
    unresolved.
    """
    n = len(naive)
    frame = pd.DataFrame({"s": station.to_numpy(), "t": naive.to_numpy(), "pos": np.arange(n)})
    occ = frame[ambiguous].groupby(["s", "t"], sort=False).cumcount().to_numpy()
    cnt = frame[ambiguous].groupby(["s", "t"], sort=False)["pos"].transform("size").to_numpy()
    is_dst = np.ones(n, bool)
    unresolved = np.zeros(n, bool)
    idx = np.flatnonzero(ambiguous)
    is_dst[idx] = occ == 0
    unresolved[idx[occ >= 2]] = True
    single = idx[cnt == 1]
    if single.size:
        g = frame.groupby("s", sort=False)["t"]
        nxt = g.shift(-1).to_numpy()
        prv = g.shift(1).to_numpy()
        t = frame["t"].to_numpy()
        back_after = pd.notna(nxt[single]) & (nxt[single] < t[single])
        back_before = pd.notna(prv[single]) & (prv[single] > t[single])
        is_dst[single] = back_after
        unresolved[single] = ~(back_after ^ back_before)
    return is_dst, unresolved
