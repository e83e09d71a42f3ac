"""The checked data set: read the inputs and quality-control them.

Takes the observation and station paths and the configuration; gives a :class:`CheckResult` (the
canonical observations, QC flags and their summaries).  Also the sanity checks a whole data set
needs before any fit (units that slipped, latitude and longitude swapped).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import pandas as pd

from .. import qc, read
from ..config import Config
from ..errors import ConfigError, NoUsableRows

log = logging.getLogger(__name__)

Progress = Callable[[str], None]


def no_progress(_: str) -> None:
    pass


@dataclass
class CheckResult:
    """What ``check`` found: the ingest result, the QC flags and summaries."""

    data: read.IngestResult
    qc: qc.QCResult
    flags: pd.DataFrame
    periods: pd.DataFrame
    per_test: pd.DataFrame
    per_station: pd.DataFrame
    config: Config


def run_check(obs: str | Path, stations: str | Path | None, config: Config, *, progress: Progress = no_progress) -> CheckResult:
    """Ingest and quality-control the observations."""
    progress("reading observations")
    data = read.read(obs, stations, config)
    if data.observations.empty:
        raise NoUsableRows(f"{obs}: no usable rows ({data.accounting['rows_rejected']} rejected; "
                           "see rejected_rows.csv for the line and reason of each)", data)
    slips = qc.unit_slips(data.observations, config["observations"]["units"], qc.thresholds(config)["range"])
    if slips:
        raise ConfigError(f"{obs}: {slips[0]}" + (f" (and {len(slips) - 1} more variable(s))" if len(slips) > 1 else ""))
    swapped = coordinates_look_swapped(data.stations, config["observations"]["timezone"])
    if swapped:
        log.warning(swapped)
    progress("quality control")
    result = qc.run_qc(data.observations, data.stations, config)
    flags = qc.flag_table(data.observations, result)
    periods = qc.flagged_periods(data.observations, result, table=flags)
    s = qc.summary(data.observations, result)
    return CheckResult(data, result, flags, periods, s["per_test"], s["per_station"], config)


def _zone_location(name: str) -> tuple[float, float] | None:
    """(latitude, longitude) of an IANA zone's principal place, from the tz database's zone1970.tab, or None."""
    import re

    paths = [Path("/usr/share/zoneinfo/zone1970.tab")]
    try:
        import tzdata

        paths.insert(0, Path(tzdata.__file__).parent / "zoneinfo" / "zone1970.tab")
    except ImportError:
        pass
    for path in paths:
        try:
            lines = path.read_text(encoding="utf-8").splitlines()
        except OSError:
            continue
        for line in lines:
            parts = line.split("\t")
            if len(parts) >= 3 and parts[2] == name.strip():
                m = re.fullmatch(r"([+-])(\d{2})(\d{2})(\d{2})?([+-])(\d{3})(\d{2})(\d{2})?", parts[1])
                if not m:
                    return None
                lat = (int(m[2]) + int(m[3]) / 60 + int(m[4] or 0) / 3600) * (1 if m[1] == "+" else -1)
                lon = (int(m[6]) + int(m[7]) / 60 + int(m[8] or 0) / 3600) * (1 if m[5] == "+" else -1)
                return lat, lon
        return None
    return None


def coordinates_look_swapped(stations: pd.DataFrame, timezone: str) -> str:
    """A sentence when latitude and longitude look swapped given the data's time zone, else "".

    The time zone places the network: an IANA zone by its principal place in
    the tz database (zone1970.tab), distances by pyproj's WGS84 geodesic.
    When the stations lie more than 2,500 km from it while the swapped pair
    would lie less than half as far (and within 2,500 km), the columns were
    most likely swapped.  UTC and fixed offsets say too little to tell.
    """
    from pyproj import Geod

    from ..read import is_utc

    if stations.empty or is_utc(timezone):
        return ""
    place = _zone_location(timezone)
    if place is None:
        return ""
    lat, lon = float(stations["latitude"].median()), float(stations["longitude"].median())
    if abs(lon) > 90.0:
        return ""  # swapped, the longitude would not be a latitude
    geod = Geod(ellps="WGS84")
    _, _, given = geod.inv(place[1], place[0], lon, lat)
    _, _, swapped = geod.inv(place[1], place[0], lat, lon)
    if given > 2.5e6 and swapped < min(0.5 * given, 2.5e6):
        return (f"latitude and longitude look swapped: the stations are at about {lat:.2f} N, {lon:.2f} E, "
                f"{given / 1000:,.0f} km from where {timezone} keeps its clocks; swapped they would be "
                f"{swapped / 1000:,.0f} km from it. Check the latitude and longitude columns "
                "(stations.columns / observations.columns)")
    return ""
