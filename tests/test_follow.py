"""The follow mode (``budget --follow`` / ``--once``): a night appended piece by piece.

The bundled frost night (an invented valley with a known truth,
:func:`stationflow.scenarios.synthetic.frost_valley`) is appended to a
growing file in chunks of one to four time steps, with a chunk that ends in
the middle of a line, a row that arrives late, a row written twice and a
rotation of the file; one follow call runs after each chunk.  Then:

- the final rows equal the batch budget of the whole file run with the
  settings.toml the follow run wrote (to 1e-9);
- the newest (one-sided) estimates and their errors cover the scenario's
  truth;
- the alerts fire when the scenario says, and the projected time to the
  critical temperature is within its stated error of the true crossing;
- a run killed (SIGKILL) at random moments resumes with nothing lost and
  nothing counted twice.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from stationflow import api
from stationflow.config import load
from stationflow.follow import Follow, follow_step
from stationflow.scenarios import synthetic
from stationflow.scenarios.replay import split_export

ROOT = Path(__file__).resolve().parent.parent
FROST = ROOT / "sample_data" / "frost"
STEP = pd.Timedelta("5min")


def _append(path: Path, data: bytes) -> None:
    with open(path, "ab") as fh:
        fh.write(data)


@pytest.fixture(scope="module")
def night(tmp_path_factory):
    """The frost night through the follow mode, appended in uneven chunks with the awkward cases."""
    cfg = load(FROST / "config.toml")
    head, groups = split_export(FROST / "observations.csv", cfg)
    base = tmp_path_factory.mktemp("night")
    live, out = base / "live.csv", base / "out"
    live.write_bytes(head)
    ctx = Follow(live, FROST / "stations.csv", cfg, out, every=60.0)
    rng = np.random.default_rng(3)
    results, pending, late, i, call = [], b"", b"", 0, 0
    from stationflow.follow import update

    parts, update.FINAL_STEPS_PER_PART = update.FINAL_STEPS_PER_PART, 40  # the final rows read back in pieces
    events: dict = {}
    while i < len(groups) or pending:
        k = int(rng.integers(1, 5))
        data = pending + b"".join(groups[i:i + k])
        i += k
        pending = b""
        if call == 10:  # the chunk ends in the middle of a line: the rest arrives with the next one
            data, pending = data[:-17], data[-17:]
            events["mid_line"] = True
        if call == 20:  # one row held back by its logger ...
            lines = data.splitlines(keepends=True)
            late = lines.pop(3)
            data = b"".join(lines)
        if call == 22:  # ... arrives two calls later
            data += late
        if call == 30:  # a row written twice
            data += groups[i - k - 2].splitlines(keepends=True)[0]
            events["repeat"] = 1
        if call == 40:  # the logger rotates its file: the old one is moved away, the new one repeats a time step
            live.rename(base / "live.csv.1")
            live.write_bytes(head + groups[i - k - 1])
            events["rotation_repeats"] = groups[i - k - 1].count(b"\n")
        _append(live, data)
        results.append(follow_step(ctx))
        call += 1
    update.FINAL_STEPS_PER_PART = parts
    batch = api.run_budget(FROST / "observations.csv", FROST / "stations.csv", load(out / "settings.toml"))
    return SimpleNamespace(out=out, results=results, batch=batch.table, batch_flags=batch.check.flags, events=events, cfg=cfg,
                           n_lines=sum(g.count(b"\n") for g in groups), scenario=synthetic.frost_valley())


def _final(out: Path) -> pd.DataFrame:
    table = pd.read_parquet(out / "budget.parquet")
    return table[~table["provisional"]]


def assert_rows_equal(follow: pd.DataFrame, batch: pd.DataFrame) -> int:
    """Every final follow row equals the batch row of the same time and cluster (numbers to 1e-9, labels
    exactly); returns the rows compared."""
    key = ["time", "cluster"]
    f = follow.assign(cluster=follow["cluster"].astype(str))
    b = batch.assign(cluster=batch["cluster"].astype(str))
    m = f.merge(b, on=key, suffixes=("_f", "_b"), validate="one_to_one")
    assert len(m) == len(f), "a final row has no batch row"
    for c in b.columns:
        if c in key or f"{c}_f" not in m:
            continue
        x, y = m[f"{c}_f"], m[f"{c}_b"]
        if x.dtype.kind == "f":
            x, y = x.to_numpy(), y.to_numpy()
            with np.errstate(invalid="ignore"):
                same = (x == y) | (np.isnan(x) & np.isnan(y)) | (np.abs(x - y) <= 1e-9)
            assert same.all(), f"{c}: {int((~same).sum())} rows differ, by up to {np.nanmax(np.abs(x - y)):.3g}"
        else:
            assert (x.astype(str).to_numpy() == y.astype(str).to_numpy()).all(), c
    return len(m)


def test_final_rows_equal_the_batch_run_with_the_pinned_settings(night):
    final = _final(night.out)
    n = assert_rows_equal(final, night.batch)
    n_clusters = night.batch["cluster"].nunique()
    assert n >= 100 * n_clusters  # most of the 15 h night is final (the last 4 h wait for the QC windows)
    assert night.events.get("mid_line")


def test_final_qc_flags_equal_the_batch_flags(night):
    state = json.loads((night.out / ".follow" / "state.json").read_text())
    through = pd.Timestamp(state["qc_through"])
    follow = pd.read_csv(night.out / "qc_flags.csv", dtype=str)
    follow = follow[pd.to_datetime(follow["time"]) <= through]
    batch = night.batch_flags[night.batch_flags["time"] <= through]
    key = lambda t: sorted(zip(t["station_id"].astype(str), pd.to_datetime(t["time"], utc=True), t["variable"],  # noqa: E731
                               t["flag"], t["tests"]))
    assert len(follow) > 50  # HV11 stuck and HV04 warm through the night
    assert key(follow) == key(batch)


def test_every_line_counted_once_repeats_dropped_and_the_rotation_seen(night):
    rec = json.loads((night.out / "run.json").read_text())
    acc = rec["accounting"]
    repeats = night.events["repeat"] + night.events["rotation_repeats"]
    assert acc["restarts"] == 1
    assert acc["rows_read"] == night.n_lines + repeats
    assert acc["duplicates"] == repeats
    assert acc["late_after_final"] == 0 and acc["conflicts"] == 0
    assert rec["status"] == "following" and rec["settings_file"] == "settings.toml"


def test_the_newest_rows_are_one_sided_and_provisional_until_final(night):
    table = pd.read_parquet(night.out / "budget.parquet")
    newest = table["time"].max()
    assert table.loc[table["time"] == newest, "one_sided"].all()
    assert table.loc[table["one_sided"], "provisional"].all()
    # final rows are centred and contiguous from the first time on
    final_times = table.loc[~table["provisional"], "time"].unique()
    assert (table.loc[table["time"].isin(final_times), "provisional"] == False).all()  # noqa: E712
    assert not table.loc[~table["provisional"], "one_sided"].any()
    revisions = pd.read_parquet(night.out / "revisions.parquet")
    assert len(revisions) > 0 and (revisions["issued"] >= revisions["time"]).all()


def _truth(night) -> pd.DataFrame:
    """Each call's newest row of every local cluster beside the scenario's truth at that time."""
    sc = night.scenario
    st = sc.stations.set_index("station_id")
    latest = pd.concat([r.latest for r in night.results if r.latest is not None], ignore_index=True)
    clusters = pd.read_csv(night.out / "clusters.csv")
    h = 3  # the window of the pinned settings (30 min of 5-min steps)
    assert json.loads((night.out / "run.json").read_text())["pinned"]["window"] == "30min"
    span = pd.date_range(latest["time"].min() - pd.Timedelta("1h"), latest["time"].max() + pd.Timedelta("1h"), freq=STEP)
    parts = []
    for cluster, grp in latest[latest["cluster"] != "network"].groupby("cluster"):
        ids = clusters.loc[clusters["cluster"] == cluster, "stations"].iloc[0].split("+")
        x, y, z = (st.loc[ids, k].to_numpy(float) for k in ("x", "y", "elevation"))
        value = pd.Series(sc.truth_at(x, y, z, span)["value"].mean(axis=1), index=span)
        t = pd.DatetimeIndex(grp["time"])
        centred = (value.reindex(t + h * STEP).to_numpy() - value.reindex(t - h * STEP).to_numpy()) / (2 * h * STEP / pd.Timedelta("1h"))
        below = value < 273.15
        crossing = value.index[int(np.argmax(below.to_numpy()))] if below.any() else pd.NaT
        parts.append(grp.assign(tendency_true=centred, value_true=value.reindex(t).to_numpy(), crossing=crossing))
    return pd.concat(parts, ignore_index=True)


def test_one_sided_estimates_and_their_errors_cover_the_truth(night):
    d = _truth(night)
    ok = np.isfinite(d["tendency"]) & np.isfinite(d["tendency_true"])
    z = np.abs(d["tendency"] - d["tendency_true"]) / d["tendency_se"]
    assert ok.sum() > 500
    # the truth: the centred tendency of the member stations' true values (Scenario.cluster_truth's definition)
    assert (z[ok] <= 2).mean() >= 0.9
    zv = np.abs(d["value"] - d["value_true"]) / d["value_se"]
    assert (zv[np.isfinite(zv)] <= 2).mean() >= 0.9


def test_projected_crossing_is_within_its_stated_error(night):
    d = _truth(night)
    p = d[np.isfinite(d["hours"]) & (d["hours"] > 0) & d["crossing"].notna()].copy()
    lead = (p["crossing"] - p["time"]) / pd.Timedelta("1h")
    error = (p["time"] + pd.to_timedelta(p["hours"], unit="h") - p["crossing"]) / pd.Timedelta("1h")
    near = (lead > 0) & (lead <= 1.0)  # the hour before the crossing, when the decision is made
    assert near.sum() >= 20
    assert (error[near].abs() <= 2 * p.loc[near, "hours_se"]).mean() >= 0.9
    # and the stated error is useful there: a median under 30 minutes
    assert p.loc[near, "hours_se"].median() * 60 < 30


def _alerts(night) -> list[dict]:
    return [json.loads(line) for line in (night.out / "alerts.jsonl").read_text().splitlines()]


def test_critical_temperature_alerts_fire_once_when_the_truth_crosses(night):
    d = _truth(night)
    alerts = [a for a in _alerts(night) if a["rule"] == "below_critical" and a.get("cluster") != "network"]
    by_cluster = pd.Series([a["cluster"] for a in alerts]).value_counts()
    assert (by_cluster == 1).all()  # once each: no flicker around 0 degC
    checked = 0
    for a in alerts:
        calls = d[d["cluster"] == a["cluster"]].set_index("time")
        fired = pd.Timestamp(a["time"])
        margin = 2 * calls["value_se"]
        # not while the truth is still clearly above 0 degC, and at the latest at the first call (the calls come
        # every 1-4 steps) after which the truth is clearly below it
        assert calls.loc[fired, "value_true"] < 273.15 + margin.loc[fired], (a["cluster"], fired)
        surely_below = calls.index[(calls["value_true"] < 273.15 - margin).to_numpy()]
        assert fired <= surely_below[0], (a["cluster"], fired, surely_below[0])
        checked += 1
    assert checked >= 10  # the clusters without the 3 K warm HV04 reach 0 degC


def test_silent_station_and_advective_alerts_follow_the_scenario(night):
    sc = night.scenario
    alerts = _alerts(night)
    silent = [a for a in alerts if a["rule"] == "silent_after"]
    # HV09 is off from 00:00 to 00:40 local (7 h after the start): the only gap over 30 min
    assert [a["station"] for a in silent] == ["HV09"]
    last = sc.start + pd.Timedelta("7h") - STEP
    calls = pd.DatetimeIndex([r.newest for r in night.results if r.newest is not None])
    assert pd.Timestamp(silent[0]["time"]) == calls[calls - last > pd.Timedelta("30min")][0]
    advective = [pd.Timestamp(a["time"]) for a in alerts if a["rule"] == "advective_rate"]
    assert advective, "the evening front carries cold air in at about 2 K/h"
    assert max(advective) < sc.start + pd.Timedelta("4.5h")  # only while the front's wind blows


def test_memory_stays_bounded_the_retained_rows_span_hours_not_the_night(night):
    state = json.loads((night.out / ".follow" / "state.json").read_text())
    obs = pd.read_parquet(night.out / ".follow" / state["obs"])
    span = obs["time"].max() - obs["time"].min()
    assert span < pd.Timedelta("10h")  # QC reach + halo + the open rows: about 9 h of a 15 h night
    assert json.loads((night.out / "run.json").read_text())["final_lag_steps"] * STEP < pd.Timedelta("5h")


def test_the_page_is_self_contained_and_says_its_assumption(night):
    page = (night.out / "now.html").read_text()
    assert "http-equiv='refresh'" in page and "<script" not in page and "src=" not in page
    assert "present in-situ rate goes on" in page and "°F" in page  # the export is in degF: shown in degF
    assert "the freezing point is used" in page  # no follow.critical in the demo: the default is said
    assert "Decision aid" in page or "decision aid" in page
    assert page.count("<svg") >= 10  # a sparkline per cluster


# ---------------------------------------------------------------------------
# killed at random moments
# ---------------------------------------------------------------------------

def _start_follow(live: Path, out: Path) -> subprocess.Popen:
    cmd = [sys.executable, "-m", "stationflow", "budget", "--stations", str(FROST / "stations.csv"), "--obs", str(live),
           "--config", str(FROST / "config.toml"), "--out", str(out), "--follow", "--every", "1", "--quiet"]
    return subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, start_new_session=True)


def test_killed_at_any_moment_it_resumes_with_nothing_lost_or_counted_twice(tmp_path):
    cfg = load(FROST / "config.toml")
    head, groups = split_export(FROST / "observations.csv", cfg)
    live, out = tmp_path / "live.csv", tmp_path / "out"
    live.write_bytes(head + b"".join(groups[:18]))
    rng = np.random.default_rng(11)
    i = 18
    for _ in range(6):
        proc = _start_follow(live, out)
        stop = time.monotonic() + rng.uniform(1.5, 5.0)
        while time.monotonic() < stop and i < len(groups):
            _append(live, b"".join(groups[i:i + 4]))
            i += 4
            time.sleep(0.25)
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
        for line in (out / "alerts.jsonl").read_text().splitlines() if (out / "alerts.jsonl").exists() else []:
            json.loads(line)  # never half-written
        if (out / "now.html").exists():
            assert (out / "now.html").read_text().endswith("</html>\n")
    _append(live, b"".join(groups[i:]))
    ctx = Follow(live, FROST / "stations.csv", cfg, out, every=60.0)
    follow_step(ctx)
    follow_step(ctx)  # nothing new: nothing changes
    acc = json.loads((out / "run.json").read_text())["accounting"]
    assert acc["rows_read"] == sum(g.count(b"\n") for g in groups)
    assert acc["duplicates"] == 0
    alerts = [json.loads(line) for line in (out / "alerts.jsonl").read_text().splitlines()]
    keys = [(a["rule"], a.get("cluster", a.get("station")), a["time"]) for a in alerts]
    assert len(keys) == len(set(keys))
    batch = api.run_budget(FROST / "observations.csv", FROST / "stations.csv", load(out / "settings.toml"))
    assert assert_rows_equal(_final(out), batch.table) > 0
    assert not list(out.glob(".*.part"))


# ---------------------------------------------------------------------------
# a folder into which files arrive; the command line
# ---------------------------------------------------------------------------

def test_a_folder_of_arriving_files_gives_the_batch_rows_of_the_folder(tmp_path):
    cfg = load(FROST / "config.toml")
    head, groups = split_export(FROST / "observations.csv", cfg)
    folder, out = tmp_path / "exports", tmp_path / "out"
    folder.mkdir()
    ctx = Follow(folder, FROST / "stations.csv", cfg, out, every=60.0)
    pieces = [groups[a:a + 36] for a in range(0, len(groups), 36)]  # one file per 3 h
    for n, piece in enumerate(pieces):
        f = folder / f"export_{n:02d}.csv"
        f.write_bytes(head + b"".join(piece[:20]))  # a file arrives, then grows
        follow_step(ctx)
        _append(f, b"".join(piece[20:]))
        follow_step(ctx)
    batch = api.run_budget(folder, FROST / "stations.csv", load(out / "settings.toml"))
    assert assert_rows_equal(_final(out), batch.table) > 0


def test_once_waits_for_enough_data_then_writes_every_output(tmp_path, runner):
    from stationflow.cli import app

    cfg = load(FROST / "config.toml")
    head, groups = split_export(FROST / "observations.csv", cfg)
    live, out = tmp_path / "live.csv", tmp_path / "out"
    live.write_bytes(head + b"".join(groups[:6]))
    args = ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(live), "--config",
            str(FROST / "config.toml"), "--out", str(out), "--once"]
    res = runner.invoke(app, args)
    assert res.exit_code == 0, res.output
    # half an hour of data: answered already, with settings learned so far; nothing final, nothing pinned
    assert "learning" in res.output and "Settings not pinned yet" in (out / "now.html").read_text()
    assert pd.read_parquet(out / "budget.parquet")["provisional"].all() and not (out / "settings.toml").exists()
    assert json.loads((out / "run.json").read_text())["status"] == "learning"
    _append(live, b"".join(groups[6:40]))
    res = runner.invoke(app, args)
    assert res.exit_code == 0, res.output
    for name in ("budget.parquet", "budget.csv", "budget.nc", "now.html", "alerts.jsonl", "run.json", "settings.toml",
                 "reading_noise.csv", "rejected_rows.csv", "clusters.csv", "sensor_offsets.csv"):
        assert (out / name).exists(), name
    res = runner.invoke(app, args)
    assert res.exit_code == 0 and " 0 new rows" in res.output


def test_follow_refuses_what_it_cannot_follow_with_one_line(tmp_path, runner):
    from stationflow.cli import app

    pq = tmp_path / "obs.parquet"
    pq.write_bytes(b"PAR1")
    base = ["budget", "--stations", str(FROST / "stations.csv"), "--config", str(FROST / "config.toml"),
            "--out", str(tmp_path / "out"), "--once"]
    res = runner.invoke(app, [*base, "--obs", str(pq)])
    assert res.exit_code == 2 and "error:" in res.stderr and "CSV" in res.stderr
    res = runner.invoke(app, ["budget", "--obs", str(FROST / "observations.csv"), "--out", str(tmp_path / "o2"), "--once"])
    assert res.exit_code == 2 and "--stations" in res.stderr
    bad = tmp_path / "apply.toml"
    bad.write_text((FROST / "config.toml").read_text() + "\n[sensors]\napply = true\n")
    res = runner.invoke(app, ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
                              "--config", str(bad), "--out", str(tmp_path / "o3"), "--once"])
    assert res.exit_code == 2 and "sensors.apply" in res.stderr
    odd = tmp_path / "odd.toml"
    odd.write_text((FROST / "config.toml").read_text() + '\n[follow]\ncritical = "-2 furlongs"\n')
    res = runner.invoke(app, ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
                              "--config", str(odd), "--out", str(tmp_path / "o4"), "--once"])
    assert res.exit_code == 2 and "follow.critical" in res.stderr and not (tmp_path / "o4" / ".follow").exists()
    res = runner.invoke(app, [*base, "--obs", str(FROST / "observations.csv"), "--engine", "dask"])
    assert res.exit_code == 2 and "leave out --engine" in res.stderr


def _one_day_export(tmp_path: Path) -> tuple[Path, Path]:
    """The frost night's first 3 h moved to 10 April and written month first (04/10/2026 17:00): every time of
    one evening reads as 10 April or as 4 October."""
    cfg = load(FROST / "config.toml")
    head, groups = split_export(FROST / "observations.csv", cfg)
    body = b"".join(groups[:37]).replace(b"2026-04-14 ", b"04/10/2026 ")
    live = tmp_path / "live.csv"
    live.write_bytes(head + body)
    conf = tmp_path / "config.toml"
    conf.write_text((FROST / "config.toml").read_text(), encoding="utf-8")
    return live, conf


def test_times_one_evening_cannot_settle_are_read_by_the_computers_clock(tmp_path, monkeypatch):
    from stationflow.follow import engine

    live, conf = _one_day_export(tmp_path)
    monkeypatch.setattr(engine, "clock", lambda: pd.Timestamp("2026-04-11T04:00Z"))  # 21:00 local that evening
    ctx = Follow(live, FROST / "stations.csv", load(conf), tmp_path / "out", every=60.0)
    res = follow_step(ctx)
    ctx.close()
    assert res.newest is not None and res.newest.month == 4 and res.newest.day == 11  # 20:00 PDT = 03:00 UTC
    state = json.loads((tmp_path / "out" / ".follow" / "state.json").read_text())
    assert state["time_format"] == "%m/%d/%Y %H:%M"
    assert "%m/%d/%Y %H:%M" in (tmp_path / "out" / "settings.toml").read_text()


def test_times_no_clock_can_settle_stop_with_the_key_that_settles_them(tmp_path, runner):
    from stationflow.cli import app

    live, conf = _one_day_export(tmp_path)  # replayed months later: neither reading is near the clock
    res = runner.invoke(app, ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(live), "--config",
                              str(conf), "--out", str(tmp_path / "out"), "--once"])
    assert res.exit_code == 2 and "observations.time_format" in res.stderr


def test_a_real_export_followed_minute_by_minute(tmp_path, arm_dir, arm_config):
    """The ARM SGP front (real, 13 stations, 6 minutes; ../shared/data, skipped when absent) appended a few
    minutes at a time: the newest rows are answered at once, and the network's gradient points from the cold
    north-west to the warm south-east as in the batch run (tests/test_real_front.py)."""
    from stationflow import read
    from stationflow.config import from_dict

    data = read.read(arm_dir / "sgp_met_1min_long.csv", None, load(arm_config))
    stations = tmp_path / "stations.csv"
    data.stations.to_csv(stations, index=False)
    lines = (arm_dir / "sgp_met_1min_long.csv").read_bytes().splitlines(keepends=True)
    head, body = lines[0], sorted(lines[1:], key=lambda b: b.split(b",")[0])  # the export is by station: by time
    live = tmp_path / "live.csv"
    live.write_bytes(head + b"".join(body[:3 * 13]))
    raw = load(arm_config).to_dict()
    raw["follow"]["learn"] = "2min"  # six minutes of data: learn from the first three
    ctx = Follow(live, stations, from_dict(raw), tmp_path / "out", every=60.0)
    first = follow_step(ctx)
    _append(live, b"".join(body[3 * 13:]))
    last = follow_step(ctx)
    ctx.close()
    assert first.newest is not None and last.newest == pd.Timestamp("2019-05-08T04:05:00Z")
    table = pd.read_parquet(tmp_path / "out" / "budget.parquet")
    regional = table[(table["cluster"] == "network") & (table["time"] == last.newest)]
    assert len(regional) == 1 and 90 <= float(regional["gradient_bearing"].iloc[0]) <= 180
    assert table["provisional"].all()  # six minutes: nothing can be final yet
    assert (tmp_path / "out" / "now.html").read_text().count("<tr") > 5


def test_each_alert_reaches_the_users_command_on_its_standard_input(tmp_path):
    cfg_path = tmp_path / "config.toml"
    received = tmp_path / "received.jsonl"
    hook = tmp_path / "hook.py"
    hook.write_text(f"import sys\nopen({str(received)!r}, 'a').write(sys.stdin.read())\n", encoding="utf-8")
    cfg_path.write_text((FROST / "config.toml").read_text() + f"\n[alerts]\ncommand = {json.dumps(f'{sys.executable} {hook}')}\n",
                        encoding="utf-8")
    cfg = load(cfg_path)
    head, groups = split_export(FROST / "observations.csv", cfg)
    live, out = tmp_path / "live.csv", tmp_path / "out"
    live.write_bytes(head)
    ctx = Follow(live, FROST / "stations.csv", cfg, out, every=60.0)
    for i in range(0, 80, 4):  # the evening: the front's advective cooling alerts
        _append(live, b"".join(groups[i:i + 4]))
        follow_step(ctx)
    ctx.close()
    sent = (out / "alerts.jsonl").read_text().splitlines()
    assert sent and received.read_text().splitlines() == sent


def test_ctrl_c_ends_a_follow_run_cleanly(tmp_path):
    cfg = load(FROST / "config.toml")
    head, groups = split_export(FROST / "observations.csv", cfg)
    live, out = tmp_path / "live.csv", tmp_path / "out"
    live.write_bytes(head + b"".join(groups[:20]))
    cmd = [sys.executable, "-m", "stationflow", "budget", "--stations", str(FROST / "stations.csv"), "--obs", str(live),
           "--config", str(FROST / "config.toml"), "--out", str(out), "--follow", "--every", "1"]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while not (out / "now.html").exists() and time.monotonic() < deadline:
        time.sleep(0.2)
    time.sleep(0.5)
    proc.send_signal(signal.SIGINT)
    stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 0, stderr
    assert "stopped; the state is kept" in stdout and "error" not in stderr


def test_an_export_that_does_not_exist_yet_is_waited_for(tmp_path, runner):
    from stationflow.cli import app

    live, out = tmp_path / "later.csv", tmp_path / "out"
    args = ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(live), "--config",
            str(FROST / "config.toml"), "--out", str(out), "--once"]
    res = runner.invoke(app, args)
    assert res.exit_code == 0 and "does not exist yet" in res.output
    assert "waiting for the first observations" in (out / "now.html").read_text()
    head, groups = split_export(FROST / "observations.csv", load(FROST / "config.toml"))
    live.write_bytes(head + b"".join(groups[:4]))  # the logger starts
    res = runner.invoke(app, args)
    assert res.exit_code == 0 and "learning" in res.output and (out / "budget.parquet").exists()


def test_a_pm25_network_followed_shows_its_units_and_projects_only_what_is_set(tmp_path, runner):
    from stationflow.cli import app

    town = ROOT / "sample_data" / "town"
    cfg = load(town / "config.toml")
    head, groups = split_export(town / "observations.csv", cfg)
    live, out = tmp_path / "live.csv", tmp_path / "out"
    live.write_bytes(head + b"".join(groups[:30]))
    args = ["budget", "--stations", str(town / "stations.csv"), "--obs", str(live), "--config", str(town / "config.toml"),
            "--out", str(out), "--once"]
    assert runner.invoke(app, args).exit_code == 0
    page = (out / "now.html").read_text()
    assert "ug/m3" in page and "Air quality" in page and "Frost:" not in page  # the unit the config declares
    latest = pd.read_parquet(out / "budget.parquet")
    assert latest["provisional"].any()
    # no critical value set for a concentration: nothing projected
    assert "not approaching" not in page and "reached" not in page
