"""The coverage suite, small: stated 95 % intervals cover the known truth about 95 % of the time, untuned.

Every case runs through the whole pipeline with the default configuration (no window, no min_rate, no
uncertainty key).  At this size (2 realisations of 3 hours) sampling noise is a few percent, so the band is
wider than the full-size target of 90-97 % that ``make coverage`` reports (docs/method.md).  The band's upper
edge matters as much as the lower: errors stated too large make every change 'steady' or 'undetermined'.
"""

import numpy as np
import pytest

from stationflow.scenarios.coverage import TERMS, cases, coverage_table, sample_case


@pytest.fixture(scope="module")
def table():
    return coverage_table(seeds=2, hours=3.0).set_index("case")


@pytest.mark.parametrize("name", [c.name for c in cases()])
def test_nominal_95_percent_intervals_cover_the_truth(table, name):
    row = table.loc[name]
    assert row["rows"] > 300
    for term in TERMS:
        assert 0.85 <= row[f"{term}_coverage"] <= 0.995, (term, row[f"{term}_coverage"])


def test_no_bias_on_a_linear_field(table):
    row = table.loc["linear"]
    for term in TERMS:
        assert abs(row[f"{term}_bias"]) < 0.3 * row[f"{term}_se"], term


def test_cases_are_what_they_say():
    """The generator's own truths: the slope case is horizontally uniform, the warm station reads 1 K high."""
    by_name = {c.name: c for c in cases(hours=1.0)}
    slope = by_name["slope under inversion"]
    gx, gy = slope.field.gradient(np.array([1000.0]), np.array([-2000.0]), np.array([400.0]), np.array([600.0]))
    assert gx[0] == pytest.approx(0, abs=1e-9) and gy[0] == pytest.approx(0, abs=1e-9)
    warm = by_name["one station 1 K warm"]
    plain = sample_case(by_name["linear"], 3).observations
    biased = sample_case(warm, 3).observations
    diff = (biased["air_temperature"] - plain["air_temperature"]).to_numpy()
    assert np.isclose(diff, 1.0).sum() == len(plain) / 30 and np.isclose(diff, 0.0).sum() == len(plain) * 29 / 30
