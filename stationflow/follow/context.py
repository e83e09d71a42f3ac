"""What every part of a follow call shares: the call's context, its result, and small helpers."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from .. import qc
from ..config import Config
from ..read.canonical import IngestResult
from ..run.check import CheckResult
from . import source as src
from .settings import refuse_unsupported


@dataclass
class Follow:
    """What stays the same from call to call: the inputs, the configuration and the output folder."""

    obs: Path
    stations_path: Path
    cfg: Config
    out: Path
    every: float = 60.0
    csv: bool = False  # budget.csv even above the row limit (--csv)
    stations: pd.DataFrame | None = None
    locked: bool = False

    def close(self) -> None:
        """Let the output folder go (the lock taken by the first call)."""
        from .state import Store

        if self.locked:
            Store(self.out).unlock()
            self.locked = False

    def __post_init__(self) -> None:
        from ..read.stations import read_stations

        from .alerts import critical_values

        src.check_source(self.obs)
        refuse_unsupported(self.cfg)
        critical_values(self.cfg, self.cfg["budget"]["variable"], pd.DataFrame({"cluster": [], "stations": []}))
        if self.stations is None:
            self.stations = read_stations(self.stations_path, self.cfg)


@dataclass
class StepResult:
    """What one call did (for the console line and the tests)."""

    new_rows: int
    newest: pd.Timestamp | None
    final_through: pd.Timestamp | None
    new_alerts: list
    waiting: str = ""
    latest: pd.DataFrame | None = None  # the newest row of every cluster (after the call)
    cpu_s: float = 0.0


def iso_utc(t: pd.Timestamp | None) -> str | None:
    return None if t is None else pd.Timestamp(t).tz_convert("UTC").strftime("%Y-%m-%dT%H:%M:%SZ")


def to_time(s: str | None) -> pd.Timestamp | None:
    return None if s is None else pd.Timestamp(s)


def checked(obs: pd.DataFrame, stations: pd.DataFrame, cfg: Config, units: dict) -> CheckResult:
    """The QC of the retained rows, as a :class:`~stationflow.run.check.CheckResult` the plan can use."""
    data = IngestResult(obs, stations.reset_index(drop=True), pd.DataFrame(columns=["file", "line", "reason"]),
                        {"rows_read": len(obs), "rows_accepted": len(obs), "rows_rejected": 0}, dict(units), [])
    result = qc.run_qc(obs, data.stations, cfg)
    empty = pd.DataFrame()
    return CheckResult(data, result, empty, empty, empty, empty, cfg)
