"""The command line and the output contract: exit codes, messages, files, columns, units."""

import hashlib
import json
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from stationflow import docgen
from stationflow.cli import app
from stationflow.estimate.budget import REGIMES
from stationflow.report import atomic, files
from stationflow.schema import TABLE_COLUMNS

from .conftest import ROOT

FROST = ROOT / "sample_data" / "frost"


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def frost_out(tmp_path_factory):
    from typer.testing import CliRunner

    out = tmp_path_factory.mktemp("frost")
    before = {p.name: _sha(p) for p in FROST.iterdir()}
    res = CliRunner().invoke(app, ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
                                   "--config", str(FROST / "config.toml"), "--out", str(out), "--quiet"])
    assert res.exit_code == 0, res.output
    assert {p.name: _sha(p) for p in FROST.iterdir()} == before  # inputs never modified
    return out


def test_budget_writes_the_contract_files(frost_out):
    for name in ("run.json", "rejected_rows.csv", "qc_flags.csv", "budget.parquet", "budget.csv", "budget.nc",
                 "report.html", "budget_timeseries.png", "budget_map.png", "qc_overview.png"):
        assert (frost_out / name).stat().st_size > 0, name
    assert not list(frost_out.glob(".*.part"))  # no temporary files left behind
    # the report's file list is every output, run.json included, on a first run into a new folder too
    listed = set(re.findall(r"<li><code>([^<]+)</code></li>", (frost_out / "report.html").read_text()))
    assert listed == {p.name for p in frost_out.iterdir() if p.is_file()}


def test_budget_table_columns_units_and_regimes(frost_out):
    csv = pd.read_csv(frost_out / "budget.csv")
    assert list(csv.columns[: len(TABLE_COLUMNS)]) == TABLE_COLUMNS
    assert csv["time"].str.match(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ$").all()
    assert set(csv["regime"]) <= set(REGIMES)
    local = csv["scale"] == "local"
    assert csv.loc[local, "stations"].str.count(r"\+").eq(2).all()
    assert (csv.loc[~local, "cluster"] == "network").all() and (~local).sum() == csv["time"].nunique()
    pq = pd.read_parquet(frost_out / "budget.parquet")
    assert len(pq) == len(csv) and list(pq.columns) == list(csv.columns)
    np.testing.assert_allclose(pq["advection"].to_numpy(), csv["advection"].to_numpy(), rtol=1e-5, equal_nan=True)


def test_netcdf_is_cf_style(frost_out):
    with xr.open_dataset(frost_out / "budget.nc") as ds:
        assert set(ds.dims) == {"time", "cluster"}
        for name, var in ds.data_vars.items():
            assert "units" in var.attrs and "long_name" in var.attrs, name
        assert ds["tendency"].attrs["units"] == "K h-1"
        assert ds["grad_x"].attrs["units"] == "K km-1"
        assert ds["u"].attrs["units"] == "m s-1"
        assert ds["value"].attrs["standard_name"] == "air_temperature"  # the lapse is measured, not assumed
        assert ds["model_error"].attrs["units"] == "K km-1"
        assert ds["latitude"].attrs["units"] == "degrees_north"
        # regime as CF flags: integer codes with flag_values and flag_meanings
        assert ds["regime"].attrs["flag_meanings"].split() == list(REGIMES)
        assert set(np.unique(ds["regime"].values)) <= set(range(len(REGIMES)))
        csv = pd.read_csv(frost_out / "budget.csv")
        decoded = np.array(REGIMES)[ds["regime"].values.reshape(-1)]
        assert (decoded == csv["regime"].to_numpy()).all()


def test_run_json_accounting(frost_out):
    run = json.loads((frost_out / "run.json").read_text())
    acc = run["accounting"]
    assert acc["rows_read"] == acc["rows_accepted"] + acc["rows_rejected"] == 2686
    assert run["config"]["budget"]["window"] == ""  # untuned: chosen from the data and said so
    assert run["window"] == "30min" and run["window_source"].startswith("from the data")
    assert run["versions"]["numpy"] and run["variable"] == "air_temperature"
    assert run["quantity"] == "air_temperature" and run["vertical"] == {"setting": "auto", "used": "measured"}
    noise = run["error_model"]["reading_noise_per_station"]
    assert len(noise) == 15 and 0.08 < run["error_model"]["reading_noise_median"] < 0.16  # the demo's noise is 0.12 K


def test_qc_flags_csv_contract(frost_out):
    f = pd.read_csv(frost_out / "qc_flags.csv")
    assert list(f.columns) == ["station_id", "time", "variable", "flag", "tests"]
    assert set(f["flag"]) <= {"suspect", "bad"}
    assert {"HV04", "HV11"} <= set(f.loc[f["variable"] == "air_temperature", "station_id"])


def test_report_is_self_contained_and_cautions(frost_out):
    html = (frost_out / "report.html").read_text()
    assert "data:image/png;base64," in html and "<img" in html
    assert "src=\"http" not in html
    assert "Decision aid only" in html and "extension service" in html
    assert "advective cooling" in html and "in-situ cooling" in html


def test_report_escapes_station_names(tmp_path, runner):
    st = tmp_path / "stations.csv"
    st.write_text("station_id,latitude,longitude,elevation\n<script>alert(1)</script>,45.0,10.0,100\nB,45.0,10.1,100\n"
                  "C,45.08,10.05,100\nD,45.06,9.95,100\n", encoding="utf-8")
    rows = ["station_id,time,air_temperature,wind_speed,wind_from_direction"]
    for k in range(12):
        t = pd.Timestamp("2026-01-01T00:00Z") + pd.Timedelta(minutes=10 * k)
        for i, sid in enumerate(["<script>alert(1)</script>", "B", "C", "D"]):
            rows.append(f"{sid},{t:%Y-%m-%dT%H:%M}Z,{270 + 0.1 * i + 0.05 * k},3,270")
    obs = tmp_path / "obs.csv"
    obs.write_text("\n".join(rows) + "\n", encoding="utf-8")
    res = runner.invoke(app, ["budget", "--stations", str(st), "--obs", str(obs), "--out", str(tmp_path / "o"), "--quiet"])
    assert res.exit_code == 0, res.stderr
    html = (tmp_path / "o" / "report.html").read_text()
    assert "<script>alert(1)</script>" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html


def test_atomic_write_leaves_old_file_on_failure(tmp_path):
    target = tmp_path / "budget.csv"
    target.write_text("old\n")
    with pytest.raises(RuntimeError):
        with files.atomic_write(target) as tmp:
            tmp.write_text("half writ")
            raise RuntimeError("interrupted")
    assert target.read_text() == "old\n"
    assert list(tmp_path.iterdir()) == [target]


@pytest.mark.parametrize("swap", [True, False])
def test_atomic_write_replaces_an_existing_file(tmp_path, monkeypatch, swap):
    # swap: the old and new files are exchanged in one step (Linux); otherwise a plain rename
    if not swap:
        monkeypatch.setattr(atomic, "_exchange", lambda a, b: False)
    target = tmp_path / "budget.nc"
    target.write_text("old\n")
    with files.atomic_write(target) as tmp:
        assert not tmp.exists()  # the writer creates it (no truncation of an existing file)
        tmp.write_text("new\n")
    assert target.read_text() == "new\n"
    assert list(tmp_path.iterdir()) == [target]
    mode = target.stat().st_mode & 0o777
    umask = os.umask(0)
    os.umask(umask)
    assert mode == 0o666 & ~umask
    with files.atomic_write(tmp_path / "empty.txt"):
        pass  # nothing written: an empty file
    assert (tmp_path / "empty.txt").read_bytes() == b""


def test_large_table_goes_to_parquet_only(tmp_path, runner, monkeypatch):
    from stationflow.report import tables

    monkeypatch.setattr(tables, "CSV_ROW_LIMIT", 100)
    args = ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
            "--config", str(FROST / "config.toml")]
    res = runner.invoke(app, args + ["--out", str(tmp_path / "a")])
    assert res.exit_code == 0
    assert not (tmp_path / "a" / "budget.csv").exists() and (tmp_path / "a" / "budget.parquet").exists()
    assert "budget.csv not written" in res.stdout
    res = runner.invoke(app, args + ["--out", str(tmp_path / "b"), "--csv", "--quiet"])
    assert res.exit_code == 0 and (tmp_path / "b" / "budget.csv").exists()


def test_unknown_variable_is_exit_2(tmp_path, runner):
    res = runner.invoke(app, ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
                              "--config", str(FROST / "config.toml"), "--out", str(tmp_path), "--variable", "ozone"])
    assert res.exit_code == 2
    assert res.stderr.startswith("error: variable 'ozone' is not in the observations; available: air_temperature")


def test_output_folder_that_is_a_file_is_exit_2(tmp_path, runner):
    in_the_way = tmp_path / "results"
    in_the_way.write_text("not a folder\n")
    res = runner.invoke(app, ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
                              "--config", str(FROST / "config.toml"), "--out", str(in_the_way), "--quiet"])
    assert res.exit_code == 2
    assert res.stderr == f"error: {in_the_way}: a file is in the way where a folder is needed; --out names a folder, choose another\n"
    assert in_the_way.read_text() == "not a folder\n"  # left as it was


def test_disk_full_while_writing_is_exit_2_and_leaves_no_budget_files(tmp_path, runner, monkeypatch):
    from stationflow.report import tables

    def full(self, first, block):
        raise OSError(28, "No space left on device", str(self.out / "budget.parquet"))

    monkeypatch.setattr(tables.TableFiles, "_write", full)
    out = tmp_path / "o"
    res = runner.invoke(app, ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
                              "--config", str(FROST / "config.toml"), "--out", str(out), "--quiet"])
    assert res.exit_code == 2
    assert res.stderr.startswith(f"error: {out / 'budget.parquet'}: cannot write (No space left on device); check the path")
    assert len(res.stderr.splitlines()) == 1
    assert not list(out.glob("budget*")) and not list(out.glob(".*.part"))


def test_regression_needs_bigger_clusters(tmp_path, runner):
    cfg = tmp_path / "c.toml"
    cfg.write_text((FROST / "config.toml").read_text().replace('[budget]', '[budget]\nvertical = "regression"'))
    res = runner.invoke(app, ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
                              "--config", str(cfg), "--out", str(tmp_path / "o")])
    assert res.exit_code == 2 and "needs clusters of at least 4 stations" in res.stderr
    cfg.write_text(cfg.read_text() + '\n[network]\nclusters = "nearest"\nk = 6\n')
    res = runner.invoke(app, ["budget", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
                              "--config", str(cfg), "--out", str(tmp_path / "o2"), "--quiet"])
    assert res.exit_code == 0, res.stderr
    t = pd.read_parquet(tmp_path / "o2" / "budget.parquet")
    assert "vertical_gradient" in t.columns
    night = t[(t["time"] > "2026-04-15T07:00Z") & (t["time"] < "2026-04-15T12:00Z")]
    assert night["vertical_gradient"].median() > 0  # an inversion: warmer with height


def test_network_command(tmp_path, runner):
    res = runner.invoke(app, ["network", "--stations", str(FROST / "stations.csv"), "--out", str(tmp_path)])
    assert res.exit_code == 0, res.stderr
    c = pd.read_csv(tmp_path / "clusters.csv")
    assert list(c.columns[:5]) == ["cluster", "stations", "n_stations", "latitude", "longitude"]
    assert set(c["status"]) == {"ok", "rejected"}
    assert c.loc[c["status"] == "rejected", "reason"].str.len().gt(0).all()
    assert (tmp_path / "network_map.png").exists()
    assert "rejected" in res.stdout


def test_check_command_summary(tmp_path, runner):
    res = runner.invoke(app, ["check", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
                              "--config", str(FROST / "config.toml"), "--out", str(tmp_path)])
    assert res.exit_code == 0, res.stderr
    assert "rows read 2,686, accepted 2,686, rejected 0" in res.stdout
    assert ("HV11 air_temperature 2026-04-15 00:55 PDT (07:55 UTC) to 2026-04-15 04:00 PDT (11:00 UTC): "
            "38 values flagged, 0 bad (persistence)") in res.stdout  # in the data's zone, UTC beside it
    assert "HV04 air_temperature" in res.stdout
    assert (tmp_path / "qc_overview.png").exists()


def test_every_command_has_help_with_an_example_and_docs():
    assert "Decision aid only" in docgen.help_text("")
    for c in docgen.COMMANDS[1:]:
        assert "Example:" in docgen.help_text(c), c
    budget_help = docgen.help_text("budget")
    assert "CAUTION: a decision aid only" in budget_help and "extension services" in budget_help


@pytest.mark.parametrize("page", sorted(docgen.PAGES) + sorted(docgen.SECTIONS))
def test_generated_docs_are_current(page):
    current = (ROOT / "docs" / page).read_text(encoding="utf-8")
    want = docgen.PAGES[page]() if page in docgen.PAGES else docgen.SECTIONS[page](current)
    assert current == want, f"docs/{page} is stale: run python -m stationflow.docgen docs"


def test_every_output_column_is_in_the_schema(tmp_path):
    # the schema is the one description of the columns: every column a budget writes is in it, with a unit
    from typer.testing import CliRunner

    from stationflow import schema

    frost = ROOT / "sample_data" / "frost"
    res = CliRunner().invoke(app, ["budget", "--stations", str(frost / "stations.csv"), "--obs",
                                   str(frost / "observations.csv"), "--config", str(frost / "config.toml"),
                                   "--out", str(tmp_path), "--quiet"])
    assert res.exit_code == 0, res.output
    import pyarrow.parquet as pq

    names = pq.read_schema(tmp_path / "budget.parquet").names
    assert names[:len(schema.TABLE_COLUMNS)] == schema.TABLE_COLUMNS
    assert set(names) <= set(schema.BY_NAME), set(names) - set(schema.BY_NAME)
    import xarray as xr

    with xr.open_dataset(tmp_path / "budget.nc") as ds:
        for name in ds.data_vars:
            assert ds[name].attrs["long_name"] == schema.BY_NAME[name].long_name or name == "value", name
            assert ds[name].attrs.get("units") == schema.unit_of(name, "K"), name


def test_every_command_and_config_key_is_documented():
    from stationflow.config import SCHEMA

    text = "\n".join(p.read_text(encoding="utf-8") for p in (ROOT / "docs").glob("*.md"))
    for c in docgen.COMMANDS[1:]:
        assert f"stationflow {c}" in text, c
    for section, keys in SCHEMA.items():
        for k in keys:
            assert f"{section}.{k}" in text, f"{section}.{k}"


def test_python_dash_m_works():
    import subprocess
    import sys

    out = subprocess.run([sys.executable, "-m", "stationflow", "--version"], capture_output=True, text=True, check=True)
    assert out.stdout.startswith("stationflow ")


def test_command_ends_with_its_exit_code_and_flushed_output(tmp_path):
    """The command ends the process itself once done (no interpreter teardown): the exit code, the
    one-line error, all printed output and the interpreter's exit handlers survive that."""
    import subprocess
    import sys

    marker = tmp_path / "atexit.txt"
    code = ("import atexit, os, pathlib, sys\n"
            "atexit.register(lambda: pathlib.Path(os.environ['MARKER']).write_text('ran'))\n"
            "print('buffered line')\n"  # print() to a pipe stays in the buffer until flushed
            "from stationflow.cli import main; sys.argv = ['stationflow'] + sys.argv[1:]; main()")
    env = {**os.environ, "MARKER": str(marker)}
    bad = subprocess.run([sys.executable, "-c", code, "check", "--obs", str(tmp_path / "missing.csv"),
                          "--out", str(tmp_path / "out")], capture_output=True, text=True, env=env)
    assert bad.returncode == 2
    assert bad.stderr.strip().startswith("error:") and "missing.csv" in bad.stderr
    assert bad.stdout == "buffered line\n"  # nothing else wrote to stdout: only the flush before the exit sends it
    assert marker.read_text() == "ran"
    marker.unlink()
    ok = subprocess.run([sys.executable, "-c", code, "--help"], capture_output=True, text=True, env=env)
    assert ok.returncode == 0 and "budget" in ok.stdout and ok.stdout.startswith("buffered line")
    assert marker.read_text() == "ran"


def test_python_api_page_runs(tmp_path, monkeypatch):
    import re

    text = (ROOT / "docs" / "python-api.md").read_text(encoding="utf-8")
    code = re.search(r"```python\n(.*?)```", text, re.S).group(1)
    monkeypatch.chdir(tmp_path)
    exec(compile(code.replace('"sample_data/', f'"{ROOT.as_posix()}/sample_data/'), "python-api.md", "exec"), {})
    assert (tmp_path / "budget_timeseries.png").exists()


def test_report_title_and_cautions_fit_the_variable(frost_out, tmp_path):
    from typer.testing import CliRunner

    from stationflow.report.outputs import display_name

    assert [display_name(v) for v in ("pm2_5", "pm25", "PM10", "air_temperature")] == ["PM2.5", "PM2.5", "PM10",
                                                                                      "air temperature"]
    frost = (frost_out / "report.html").read_text()
    assert "<h1>stationflow budget: air temperature</h1>" in frost
    assert "wind machines" in frost and "PM2.5 sensors need calibration" not in frost
    town = ROOT / "sample_data" / "town"
    out = tmp_path / "town"
    res = CliRunner().invoke(app, ["budget", "--stations", str(town / "stations.csv"), "--obs", str(town / "observations.csv"),
                                   "--config", str(town / "config.toml"), "--out", str(out), "--quiet"])
    assert res.exit_code == 0, res.output
    page = (out / "report.html").read_text()
    assert "<h1>stationflow budget: PM2.5</h1>" in page
    assert "PM2.5 sensors need calibration" in page and "wind machines" not in page and "bud temperature" not in page


def test_report_counts_agree_with_run_json(frost_out):
    """Every QC count the report gives comes from the same table as run.json."""
    import html as html_mod

    run = json.loads((frost_out / "run.json").read_text())
    page = html_mod.unescape((frost_out / "report.html").read_text())
    flags = run["qc"]["flags"]
    suspect = sum(c["suspect"] for c in flags.values())
    bad = sum(c["bad"] for c in flags.values())
    assert f"flagged {suspect} values suspect and {bad} bad" in page
    per_period = [(int(n), int(b)) for n, b in re.findall(r"QC: \S+ \S+ .*?: (\d+) values flagged, (\d+) bad", page)]
    assert per_period and sum(b for _, b in per_period) <= bad and all(b <= n for n, b in per_period)
    qc_table = pd.read_csv(frost_out / "qc_flags.csv")
    assert (qc_table["flag"] == "bad").sum() == bad and (qc_table["flag"] == "suspect").sum() == suspect
    for name, count in run["regimes"].items():
        assert f"{name.replace('_', ' ')} {count}" in page


def test_timeseries_figure_draws_the_main_periods_clusters_and_names_the_rest(frost_out):
    import html as html_mod

    run = json.loads((frost_out / "run.json").read_text())
    page = html_mod.unescape((frost_out / "report.html").read_text())
    caption = re.search(r"<h3>(Budget over time: clusters [^<]*)</h3>", page).group(1)
    drawn = caption.split("clusters ", 1)[1].split(" (", 1)[0].split(", ")
    in_periods = {re.match(r"cluster (\S+),", line).group(1) for line in run["main_periods"]}
    assert in_periods <= set(drawn)  # every cluster of a main period is drawn
    usable = run["clusters"]["usable"]
    if usable > len(drawn):
        left = caption.split("not drawn: ", 1)[1].split(" (every", 1)[0].split(", ")
        assert len(drawn) + len(left) == usable and not set(drawn) & set(left)


def test_one_time_zone_for_people(frost_out, tmp_path):
    """Every time on the page is in the display zone (the input's by default) with UTC beside it."""
    import html as html_mod

    page = html_mod.unescape((frost_out / "report.html").read_text())
    body = page.split("<h2>Files</h2>")[0]
    shown = re.findall(r"\d\d:\d\d (?:UTC|[A-Z]{3,4})\b", body)
    local = [t for t in shown if not t.endswith("UTC")]
    assert local and all(t.endswith(("PDT", "PST")) for t in local)
    # each local time has its UTC beside it: "17:00 PDT (00:00 UTC)"
    assert len(re.findall(r"\d\d:\d\d P[DS]T \(\d\d:\d\d", body)) + len(re.findall(r"P[DS]T \(\d\d:\d\d-\d\d:\d\d UTC", body)) \
        >= len(local)
    # a display zone of UTC shows UTC only
    cfg = tmp_path / "c.toml"
    cfg.write_text((FROST / "config.toml").read_text().replace('timezone = "America/Los_Angeles"',
                                                                'timezone = "America/Los_Angeles"\ndisplay_timezone = "UTC"'))
    from typer.testing import CliRunner

    res = CliRunner().invoke(app, ["check", "--stations", str(FROST / "stations.csv"), "--obs", str(FROST / "observations.csv"),
                                   "--config", str(cfg), "--out", str(tmp_path / "o")])
    assert res.exit_code == 0 and "time span: 2026-04-15 00:00 UTC to 2026-04-15 15:00 UTC" in res.stdout


def test_every_figure_of_the_report_is_captioned_and_embedded(frost_out):
    import importlib.util

    spec = importlib.util.spec_from_file_location("report_check", ROOT / "benchmarks" / "report_check.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    assert mod.check_page(frost_out / "report.html") == []
