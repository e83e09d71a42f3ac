"""Flags: the registry of tests, the flag each gives, and the tables made from the flags.

Takes the masks of the tests that fired; gives CF flags per value (``flag_values = 0 1 2 3``,
``flag_meanings = "good suspect bad missing"``) with a bitmask of the tests, and the qc_flags.csv,
summary and flagged-period tables.  Add a test: one line in :data:`TESTS`, its function in the module
of its family, and one call in :mod:`.runner`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

GOOD, SUSPECT, BAD, MISSING = 0, 1, 2, 3
FLAG_NAMES = {GOOD: "good", SUSPECT: "suspect", BAD: "bad", MISSING: "missing"}


@dataclass(frozen=True)
class Test:
    """One QC test: its name (in qc_flags.csv), bit in the test mask, the flag it gives, where it lives."""

    name: str
    bit: int
    severity: int
    module: str
    checks: str


#: every test, in the order their bits are combined (the result does not depend on which finished first)
TESTS: tuple[Test, ...] = (
    Test("range", 1, BAD, "range", "value outside its plausible range"),
    Test("step", 2, SUSPECT, "steps", "change since the previous report larger than plausible for the interval"),
    Test("spike", 4, BAD, "steps", "a jump away and straight back"),
    Test("persistence", 8, SUSPECT, "persistence", "less variation over the window than the field can have"),
    Test("consistency", 16, BAD, "consistency", "contradicts another variable of the same station"),
    Test("spatial", 32, SUSPECT, "neighbours", "far from what the neighbouring stations predict (bad when very far)"),
)
TEST_BITS = {t.name: t.bit for t in TESTS}
#: severity of each test when it fires
SEVERITY = {t.name: t.severity for t in TESTS}
#: exceptions by variable: a vane that keeps reporting a direction in calm is a nuisance, not an error
SEVERITY_BY_VARIABLE = {("wind_from_direction", "consistency"): SUSPECT}


@dataclass
class QCResult:
    """Flags aligned with the observations frame.

    ``flags[name]`` is an int8 array (0 good, 1 suspect, 2 bad, 3 missing),
    ``tests[name]`` an int16 bitmask of :data:`TEST_BITS`.
    ``interval``: the reporting interval of the same observations
    (:func:`stationflow.network.grid.infer_interval`), found while their rows were
    in station order; None when not known.
    """

    flags: dict[str, np.ndarray]
    tests: dict[str, np.ndarray]
    interval: pd.Timedelta | None = None

    def usable(self, *, use_suspect: bool = False) -> dict[str, np.ndarray]:
        """Masks of the values the estimator may use."""
        limit = SUSPECT if use_suspect else GOOD
        return {k: f <= limit for k, f in self.flags.items()}

    def columns(self) -> dict[str, np.ndarray]:
        """The ``<name>_qc`` and ``<name>_qc_tests`` columns."""
        out: dict[str, np.ndarray] = {}
        for k in self.flags:
            out[f"{k}_qc"] = self.flags[k]
            out[f"{k}_qc_tests"] = self.tests[k]
        return out


def flag_table(observations: pd.DataFrame, result: QCResult) -> pd.DataFrame:
    """The qc_flags.csv table: one row per value that is not good (and not missing)."""
    parts = []
    names = {bit: name for name, bit in TEST_BITS.items()}
    for v, f in result.flags.items():
        sel = (f == SUSPECT) | (f == BAD)
        if not sel.any():
            continue
        bits = result.tests[v][sel]
        uniq, inv = np.unique(bits, return_inverse=True)
        labels = np.array(["+".join(names[b] for b in sorted(names) if u & b) for u in uniq], dtype=object)
        parts.append(pd.DataFrame({
            "station_id": observations["station_id"].array[sel],  # typed take: no object conversion
            "time": observations["time"].array[sel],
            "variable": v,
            "flag": np.where(f[sel] == BAD, "bad", "suspect"),
            "tests": labels[inv],
        }))
    if not parts:
        return pd.DataFrame({"station_id": pd.Series([], dtype=str), "time": pd.Series([], dtype="datetime64[ns, UTC]"),
                             "variable": pd.Series([], dtype=str), "flag": pd.Series([], dtype=str),
                             "tests": pd.Series([], dtype=str)})
    out = pd.concat(parts, ignore_index=True)
    return out.sort_values(["time", "station_id", "variable"], kind="stable").reset_index(drop=True)


def summary(observations: pd.DataFrame, result: QCResult) -> dict[str, pd.DataFrame]:
    """Counts of fired tests per variable and test, and flags per station."""
    rows = []
    combos = np.arange(1 << 16)
    for v, bits in result.tests.items():
        # values per combination of fired tests (one pass), then per test the combinations that include it
        fired = bits[bits != 0]  # most values pass every test
        per_combo = np.bincount(fired.view(np.uint16), minlength=1 << 16)
        for name, b in TEST_BITS.items():
            c = int(per_combo[(combos & b) != 0].sum())
            if c:
                rows.append({"variable": v, "test": name, "values": c})
    per_test = pd.DataFrame(rows, columns=["variable", "test", "values"])
    if result.flags:
        codes, ids = pd.factorize(observations["station_id"], sort=True)
        n_s = len(ids)
        # values per (station, flag) of each variable, in one count of the values that are not good
        n = sum(np.bincount(codes[f != GOOD] * 4 + f[f != GOOD], minlength=4 * n_s)
                for f in result.flags.values()).reshape(n_s, 4)
        sus, bad = n[:, SUSPECT], n[:, BAD]
        per_station = pd.DataFrame({"station_id": np.asarray(ids, dtype=object), "suspect": np.asarray(sus, int),
                                    "bad": np.asarray(bad, int)})
    else:
        per_station = pd.DataFrame(columns=["station_id", "suspect", "bad"])
    return {"per_test": per_test, "per_station": per_station}


def flagged_periods(observations: pd.DataFrame, result: QCResult, *, gap: str = "2h",
                    table: pd.DataFrame | None = None) -> pd.DataFrame:
    """Contiguous periods of non-good values per station and variable (for the check summary)."""
    t = (flag_table(observations, result) if table is None else table).copy()
    if t.empty:
        return pd.DataFrame(columns=["station_id", "variable", "start", "end", "values", "bad_values", "flag", "tests"])
    # vectorised over flagged values: sort, cut into periods, reduce each period with ufunc.reduceat
    s_codes, s_ids = pd.factorize(t["station_id"], sort=True)
    v_codes, v_ids = pd.factorize(t["variable"], sort=True)
    ns = pd.DatetimeIndex(t["time"]).asi8
    order = np.lexsort((ns, v_codes, s_codes))
    s_codes, v_codes, ns = s_codes[order], v_codes[order], ns[order]
    new = np.ones(len(order), bool)
    new[1:] = (s_codes[1:] != s_codes[:-1]) | (v_codes[1:] != v_codes[:-1]) | (np.diff(ns) > pd.Timedelta(gap).value)
    starts = np.flatnonzero(new)
    t_codes, t_labels = pd.factorize(t["tests"].to_numpy()[order])
    names = sorted({n for lab in t_labels for n in str(lab).split("+")})
    masks = np.array([sum(1 << names.index(n) for n in str(lab).split("+")) for lab in t_labels], dtype=np.int64)
    union = np.bitwise_or.reduceat(masks[t_codes], starts)
    bad_values = np.add.reduceat((t["flag"].to_numpy()[order] == "bad").astype(np.int64), starts)
    is_bad = bad_values > 0
    time_sorted = pd.DatetimeIndex(ns).tz_localize("UTC")
    ends = np.append(starts[1:], len(order)) - 1
    return pd.DataFrame({
        "station_id": np.asarray(s_ids, dtype=object)[s_codes[starts]],
        "variable": np.asarray(v_ids, dtype=object)[v_codes[starts]],
        "start": time_sorted[starts], "end": time_sorted[ends], "values": ends - starts + 1,
        "bad_values": bad_values, "flag": np.where(is_bad, "bad", "suspect"),
        "tests": _mask_labels(union, names),
    })


def _mask_labels(masks: np.ndarray, names: list[str]) -> np.ndarray:
    """'a+b' labels of bit masks over ``names`` (one label built per distinct mask)."""
    uniq, inv = np.unique(masks, return_inverse=True)
    labels = np.array(["+".join(n for i, n in enumerate(names) if int(m) >> i & 1) for m in uniq], dtype=object)
    return labels[inv]
