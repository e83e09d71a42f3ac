"""A catalogue of bad inputs: each gets a clear answer and loses nothing valid.

File-level problems: exit code 2 and one line on stderr beginning 'error:'.
Row-level problems: the row is listed in rejected_rows.csv with its line and
reason, the valid rows are kept, and the accounting adds up.
"""

import json

import pandas as pd

from stationflow.cli import app

from .conftest import STATIONS_CSV

GOOD_ROWS = "A,2026-01-01T00:00Z,271.5\nB,2026-01-01T00:00Z,272.5\n"
HEADER = "station_id,time,air_temperature\n"


def _check(runner, tmp_path, obs_bytes: bytes, *, stations: str = STATIONS_CSV, toml: str | None = None, name="obs.csv"):
    obs = tmp_path / name
    obs.write_bytes(obs_bytes)
    st = tmp_path / "stations.csv"
    st.write_text(stations, encoding="utf-8")
    args = ["check", "--stations", str(st), "--obs", str(obs), "--out", str(tmp_path / "out"), "--quiet"]
    if toml is not None:
        c = tmp_path / "c.toml"
        c.write_text(toml, encoding="utf-8")
        args += ["--config", str(c)]
    before = obs.read_bytes()
    res = runner.invoke(app, args)
    assert obs.read_bytes() == before  # inputs are never modified
    return res


def _file_error(res, *fragments):
    assert res.exit_code == 2, (res.exit_code, res.stdout, res.stderr)
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: "), res.stderr
    for f in fragments:
        assert f in lines[0], lines[0]
    assert "Traceback" not in res.stderr


def _rejected(res, tmp_path, expected: dict[int, str], accepted: int):
    assert res.exit_code == 0, res.stderr
    rej = pd.read_csv(tmp_path / "out" / "rejected_rows.csv")
    got = dict(zip(rej["line"], rej["reason"]))
    assert set(got) == set(expected), got
    for line, frag in expected.items():
        assert frag in got[line], (line, got[line])
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    acc = run["accounting"]
    assert acc["rows_accepted"] == accepted
    assert acc["rows_accepted"] + acc["rows_rejected"] == acc["rows_read"]


# ----- file-level problems ------------------------------------------------------------

def test_empty_file(runner, tmp_path):
    _file_error(_check(runner, tmp_path, b""), "obs.csv", "the file is empty")


def test_header_only(runner, tmp_path):
    _file_error(_check(runner, tmp_path, HEADER.encode()), "no data rows after the header")


def test_wrong_delimiter(runner, tmp_path):
    _file_error(_check(runner, tmp_path, b"station_id;time;air_temperature\nA;2026-01-01T00:00Z;1\n"),
                "header has one column but contains ';'", 'delimiter = ";"')


def test_unknown_unit(runner, tmp_path):
    _file_error(_check(runner, tmp_path, (HEADER + GOOD_ROWS).encode(),
                       toml='[observations.units]\nair_temperature = "degR"\n'),
                "observations.units.air_temperature", "unknown unit 'degR'", "degF")


def test_missing_station_column(runner, tmp_path):
    _file_error(_check(runner, tmp_path, b"site,time,air_temperature\nA,2026-01-01T00:00Z,1\n"),
                "no column 'station_id'", "[observations.columns]")


def test_missing_time_column(runner, tmp_path):
    _file_error(_check(runner, tmp_path, b"station_id,when,air_temperature\nA,2026-01-01T00:00Z,1\n"),
                "no column 'time'")


def test_no_variable_columns(runner, tmp_path):
    _file_error(_check(runner, tmp_path, b"station_id,time,foo\nA,2026-01-01T00:00Z,1\n"), "no variable columns")


def test_latitude_out_of_range(runner, tmp_path):
    _file_error(_check(runner, tmp_path, (HEADER + GOOD_ROWS).encode(),
                       stations="station_id,latitude,longitude\nA,95.0,10\nB,45,10\n"),
                "stations.csv: line 2: latitude 95 of station 'A'", "outside [-90, 90]")


def test_stations_missing_longitude_column(runner, tmp_path):
    _file_error(_check(runner, tmp_path, (HEADER + GOOD_ROWS).encode(), stations="station_id,latitude\nA,45\n"),
                "no column 'longitude'", "[stations.columns]")


def test_unreadable_observation_file(runner, tmp_path):
    st = tmp_path / "stations.csv"
    st.write_text(STATIONS_CSV)
    res = runner.invoke(app, ["check", "--stations", str(st), "--obs", str(tmp_path / "nope.csv"), "--out", str(tmp_path / "o")])
    _file_error(res, "nope.csv", "file not found")


def test_bad_toml(runner, tmp_path):
    _file_error(_check(runner, tmp_path, (HEADER + GOOD_ROWS).encode(), toml="[observations\n"), "not valid TOML")


def test_unknown_config_key(runner, tmp_path):
    _file_error(_check(runner, tmp_path, (HEADER + GOOD_ROWS).encode(), toml="[budget]\nwindw = '30min'\n"),
                "unknown key budget.windw", "window")


def test_duplicate_header_column(runner, tmp_path):
    _file_error(_check(runner, tmp_path, b"station_id,time,time\nA,2026-01-01T00:00Z,x\n"), "repeats column(s) time")


def test_corrupt_parquet(runner, tmp_path):
    _file_error(_check(runner, tmp_path, b"PAR1 this is not parquet", name="obs.parquet"), "cannot read as Parquet")


# ----- row-level problems -------------------------------------------------------------

def test_unparseable_time(runner, tmp_path):
    res = _check(runner, tmp_path, (HEADER + GOOD_ROWS + "C,yesterday noon,3\n").encode())
    _rejected(res, tmp_path, {4: "cannot parse time 'yesterday noon'"}, accepted=2)


def test_empty_time(runner, tmp_path):
    res = _check(runner, tmp_path, (HEADER + GOOD_ROWS + "C,,3\n").encode())
    _rejected(res, tmp_path, {4: "time is missing"}, accepted=2)


def test_unknown_station(runner, tmp_path):
    res = _check(runner, tmp_path, (HEADER + GOOD_ROWS + "ZZ,2026-01-01T00:00Z,3\n").encode())
    _rejected(res, tmp_path, {4: "station 'ZZ' is not in the stations file"}, accepted=2)


def test_conflicting_duplicates(runner, tmp_path):
    res = _check(runner, tmp_path, (HEADER + GOOD_ROWS + "A,2026-01-01T00:00Z,9.5\n").encode())
    _rejected(res, tmp_path, {2: "conflicts with line 4", 4: "conflicts with line 2"}, accepted=1)


def test_non_utf8_bytes(runner, tmp_path):
    res = _check(runner, tmp_path, HEADER.encode() + GOOD_ROWS.encode() + b"C,2026-01-01T00:00Z,\xff\xfe\n")
    _rejected(res, tmp_path, {4: "not valid UTF-8"}, accepted=2)


def test_inf_and_nan_text(runner, tmp_path):
    res = _check(runner, tmp_path, (HEADER + GOOD_ROWS + "C,2026-01-01T00:00Z,inf\nD,2026-01-01T00:00Z,1e999\n").encode())
    _rejected(res, tmp_path, {4: "'inf' is not a finite number", 5: "'1e999' is not a finite number"}, accepted=2)


def test_huge_value_kept_and_flagged_bad(runner, tmp_path):
    res = _check(runner, tmp_path, (HEADER + GOOD_ROWS + "C,2026-01-01T00:00Z,1e30\n").encode())
    _rejected(res, tmp_path, {}, accepted=3)
    flags = pd.read_csv(tmp_path / "out" / "qc_flags.csv")
    assert flags[["station_id", "flag", "tests"]].values.tolist() == [["C", "bad", "range"]]


def test_wrong_field_count(runner, tmp_path):
    res = _check(runner, tmp_path, (HEADER + GOOD_ROWS + "C,2026-01-01T00:00Z\nD,2026-01-01T00:00Z,1,2\n").encode())
    _rejected(res, tmp_path, {4: "expected 3 fields, found 2", 5: "expected 3 fields, found 4"}, accepted=2)


def test_text_in_a_number_column(runner, tmp_path):
    res = _check(runner, tmp_path, (HEADER + GOOD_ROWS + "C,2026-01-01T00:00Z,twelve\n").encode())
    _rejected(res, tmp_path, {4: "air_temperature: cannot read 'twelve' as a number"}, accepted=2)


def test_empty_station_id(runner, tmp_path):
    res = _check(runner, tmp_path, (HEADER + GOOD_ROWS + ",2026-01-01T00:00Z,3\n").encode())
    _rejected(res, tmp_path, {4: "station_id is empty"}, accepted=2)


def test_quoted_fields_and_crlf(runner, tmp_path):
    text = 'station_id,time,air_temperature\r\n"A","2026-01-01T00:00Z","271.5"\r\n"B, north","2026-01-01T00:00Z",272\r\n'
    res = _check(runner, tmp_path, text.encode())
    _rejected(res, tmp_path, {3: "station 'B, north' is not in the stations file"}, accepted=1)


def test_all_rows_bad_is_a_file_error(runner, tmp_path):
    _file_error(_check(runner, tmp_path, (HEADER + "ZZ,2026-01-01T00:00Z,1\n").encode()), "no usable rows")
