"""Property tests: random CSV text never produces a traceback, only accepted rows or clear errors."""

import tempfile
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stationflow import config
from stationflow import read
from stationflow.cli import app
from stationflow.errors import StationflowError

from .conftest import STATIONS_CSV

cell = st.one_of(
    st.sampled_from(["A", "B", "C", "ZZ", "", "2026-01-01T00:00Z", "2026-01-01 01:30", "271.5", "-99.9", "nan",
                     "inf", "1e999", "abc", "\"q,uoted\"", "N", "CALM", "  ", "1e30", "0", "-0.0"]),
    st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"), max_size=8),
)
row = st.lists(cell, min_size=1, max_size=5).map(lambda cells: ",".join(cells))
header = st.sampled_from(["station_id,time,air_temperature", "station_id,time,air_temperature,wind_speed,wind_from_direction",
                          "station_id;time;air_temperature", "time,station_id,pm2_5", "a,b,c", ""])
document = st.tuples(header, st.lists(row, max_size=12), st.sampled_from(["\n", "\r\n"])).map(
    lambda t: (t[0] + t[2] + t[2].join(t[1]) + t[2]).encode("utf-8", "surrogatepass"))
raw = st.one_of(document, st.binary(max_size=200))


def _stations(tmp: Path) -> Path:
    p = tmp / "stations.csv"
    p.write_text(STATIONS_CSV, encoding="utf-8")
    return p


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=raw)
def test_random_csv_is_accepted_or_clearly_refused(data):
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        obs = tmp / "obs.csv"
        obs.write_bytes(data)
        cfg = config.from_dict({"observations": {"columns": {}, "units": {}}})
        try:
            r = read.read(obs, _stations(tmp), cfg)
        except StationflowError as exc:
            msg = str(exc)
            assert msg and "\n" not in msg
            return
        acc = r.accounting
        assert acc["rows_accepted"] + acc["rows_rejected"] == acc["rows_read"]
        assert len(r.rejected) == acc["rows_rejected"]
        assert (r.rejected["line"] >= 2).all()
        assert len(r.observations) == acc["rows_accepted"] - acc["duplicates_collapsed"]
        assert str(r.observations["time"].dt.tz) == "UTC"


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=document)
def test_cli_exit_codes_only_0_or_2(runner, data):
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        obs = tmp / "obs.csv"
        obs.write_bytes(data)
        res = runner.invoke(app, ["check", "--stations", str(_stations(tmp)), "--obs", str(obs), "--out", str(tmp / "o"), "--quiet"])
        assert res.exit_code in (0, 2), (res.exit_code, res.stderr)
        assert "Traceback" not in (res.stderr or "")
        if res.exit_code == 2:
            assert res.stderr.startswith("error: ")
