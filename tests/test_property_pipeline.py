"""Whole-pipeline property test: any generated network in any common export style, through the CLI.

The exit code is 0 or 2, never 1 (an unexpected fault); on 2 there is exactly
one ``error:`` line; on 0 the accounting adds up.  ``make test`` runs a few
examples; ``make fuzz`` many (STATIONFLOW_FUZZ_EXAMPLES).
"""

import json
import os
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stationflow.cli import app

from .netgen import linear_night

EXAMPLES = int(os.environ.get("STATIONFLOW_FUZZ_EXAMPLES", "8"))

LAYOUTS = ["%Y-%m-%dT%H:%M:%S%z", "%Y-%m-%d %H:%M", "%m/%d/%Y %H:%M", "%d/%m/%Y %H:%M:%S", "%d.%m.%Y %H:%M",
           "%Y/%m/%d %H:%M", "%m/%d/%y %I:%M %p"]
ZONES = ["UTC", "America/New_York", "Europe/Berlin", "+05:30", "Australia/Sydney"]


@st.composite
def exports(draw):
    n = draw(st.sampled_from([3, 4, 7, 15, 40, 90, 250]))
    interval = draw(st.sampled_from(["1min", "5min", "10min", "1h"]))
    n_t = draw(st.integers(3, 30))
    seed = draw(st.integers(0, 10_000))
    # a start just before a clock change in some zones (late October / late March)
    start = draw(st.sampled_from(["2026-04-10 20:00", "2026-10-24 22:00", "2026-03-28 23:00", "2026-07-01 00:00"]))
    stations, obs = linear_night(n, n_t, seed=seed, elevation=draw(st.booleans()),
                                 missing=draw(st.sampled_from([0.0, 0.1, 0.5])), interval=interval, start=start)
    rng = np.random.default_rng(seed)
    stations = stations.drop(columns=["x", "y"])
    if draw(st.booleans()) and n >= 4:  # collinear stations
        stations.loc[:2, "latitude"] = stations["latitude"].iloc[0]
    if draw(st.booleans()) and n >= 4:  # two stations at one place
        stations.loc[3, ["latitude", "longitude"]] = stations.loc[2, ["latitude", "longitude"]].to_numpy()
    if draw(st.booleans()) and n >= 4:  # a station id listed twice in the stations file
        stations = pd.concat([stations, stations.iloc[[1]]], ignore_index=True)
    if draw(st.booleans()):  # a station that never reports
        stations = pd.concat([stations, stations.iloc[[0]].assign(station_id="SILENT")], ignore_index=True)
    if draw(st.booleans()):  # irregular report times
        obs["time"] = obs["time"] + pd.to_timedelta(rng.integers(-20, 20, len(obs)), unit="s")
    if draw(st.booleans()):  # no wind at all
        obs = obs.drop(columns=["wind_speed", "wind_from_direction"])
    if draw(st.booleans()) and len(obs) > 2:  # a duplicated row
        obs = pd.concat([obs, obs.iloc[[1]]], ignore_index=True)
    tz = draw(st.sampled_from(ZONES))
    layout = draw(st.sampled_from(LAYOUTS))
    delimiter = draw(st.sampled_from([",", ";", "\t"]))
    units_row = draw(st.booleans())
    return stations, obs, tz, layout, delimiter, units_row


def _write(folder: Path, stations, obs, tz, layout, delimiter, units_row) -> dict[str, Path]:
    o = obs.copy()
    o["air_temperature"] = np.round(o["air_temperature"] - 273.15, 2)
    o["time"] = o["time"].dt.tz_convert(tz if tz[0] not in "+-" else "UTC").dt.strftime(layout)
    if tz[0] in "+-":  # a fixed offset: write the local clock
        o["time"] = (obs["time"].dt.tz_localize(None) + pd.Timedelta(hours=5, minutes=30)).dt.strftime(layout)
    text = o.to_csv(index=False, sep=delimiter, float_format="%.3f")
    skip = ""
    if units_row:
        head, rest = text.split("\n", 1)
        text = f"{head}\n{delimiter.join('-' for _ in o.columns)}\n{rest}"
        skip = "skip_lines = [2]\n"
    (folder / "obs.csv").write_text(text, encoding="utf-8")
    stations.to_csv(folder / "stations.csv", index=False)
    sep = "\\t" if delimiter == "\t" else delimiter
    (folder / "c.toml").write_text(
        f'[observations]\ndelimiter = "{sep}"\ntimezone = "{tz}"\n{skip}[observations.units]\nair_temperature = "degC"\n',
        encoding="utf-8")
    return {"stations": folder / "stations.csv", "obs": folder / "obs.csv", "config": folder / "c.toml"}


@settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=EXAMPLES <= 8)
@given(case=exports())
def test_any_network_any_export_exits_0_or_2_with_one_line(case):
    from typer.testing import CliRunner

    runner = CliRunner()
    with tempfile.TemporaryDirectory() as d:
        folder = Path(d)
        paths = _write(folder, *case)
        for command in ("check", "network", "budget"):
            out = folder / command
            args = [command, "--stations", str(paths["stations"]), "--config", str(paths["config"]), "--out", str(out),
                    "--quiet"]
            if command != "network":
                args += ["--obs", str(paths["obs"])]
            res = runner.invoke(app, args)
            assert res.exit_code in (0, 2), (command, res.exit_code, res.stderr)
            if res.exit_code == 2:
                lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
                assert len(lines) == 1 and lines[0].startswith("error: "), res.stderr
                continue
            if command != "network":
                acc = json.loads((out / "run.json").read_text())["accounting"]
                assert acc["rows_accepted"] + acc["rows_rejected"] == acc["rows_read"]
