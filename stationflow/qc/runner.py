"""The runner: every test on the observations, combined into flags.

Takes the canonical observations (names and SI units as :mod:`stationflow.read` gives them), the
station table and the configuration; gives a :class:`~.flags.QCResult`.  The rows are sorted once by
(station, time), every test runs on the sorted arrays, and the flags are mapped back to the rows'
own order.  After the internal-consistency tests (which read only the raw values) the variables are
independent, so on large inputs they are checked as a small task graph on two threads
(:func:`stationflow.run.workers.run_graph`; numpy releases the interpreter lock): the buddy test's
set-up beside the sorting of the values, each variable's range/step and persistence tests, then each
buddy test (which skips what the other tests failed) in :data:`SPATIAL_PARTS` parts of the times.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from functools import cached_property, partial

import numpy as np
import pandas as pd

from ..config import Config
from ..network.grid import interval_of_sorted
from ..run.workers import Task, run_graph
from .consistency import (
    dew_point_not_above_temperature,
    direction_defined_when_moving,
    gust_not_below_mean,
)
from .flags import (
    BAD,
    GOOD,
    MISSING,
    SEVERITY,
    SEVERITY_BY_VARIABLE,
    TEST_BITS,
    QCResult,
)
from .neighbours import SpatialTest
from .persistence import Slots, not_persistent, regular_slots
from .range import within_range
from .steps import plausible_steps
from .thresholds import SPATIAL_VARIABLES, is_concentration, persistence_rule, thresholds

log = logging.getLogger(__name__)

#: rows above which the variables are checked on two threads
THREADED_ROWS = 200_000
#: the buddy test of a variable runs in this many parts of the times (independent per time), one per thread
SPATIAL_PARTS = 2


@dataclass
class SortedRows:
    """The observations' rows in (station, time) order: sorted row ``i`` is row ``order[i]``."""

    order: np.ndarray
    codes: np.ndarray  # station code of each sorted row (0, 1, 2, ... in order of first appearance)
    time_ns: np.ndarray
    interval: pd.Timedelta | None

    @classmethod
    def of(cls, observations: pd.DataFrame) -> "SortedRows":
        n = len(observations)
        first_seen = pd.factorize(observations["station_id"])[0]  # stations in order of first appearance
        if n and 0 <= first_seen.min() and first_seen.max() < 2 ** 15:
            first_seen = first_seen.astype(np.int16)  # a quarter of the memory, and sorted by radix
        t_all = observations["time"].to_numpy("datetime64[ns]").view(np.int64)
        if n > 1 and bool((t_all[1:] >= t_all[:-1]).all()):  # in time order (as ingest leaves it)
            order = np.argsort(first_seen, kind="stable")  # the same order as the two-key sort below
        else:
            order = np.lexsort((t_all, first_seen))
        codes, tns = first_seen[order], t_all[order]
        return cls(order, codes, tns, interval_of_sorted(codes, tns))  # in (station, time) order: no sort needed

    @cached_property
    def inverse(self) -> np.ndarray:
        """Sorted row -> the row's own position."""
        inv = np.empty(len(self.order), np.int64)
        inv[self.order] = np.arange(len(self.order))
        return inv


def run_qc(observations: pd.DataFrame, stations: pd.DataFrame, config: Config | None = None) -> QCResult:
    """Run every test on the tidy observations and combine the results into flags (see the module docstring)."""
    cfg = config or Config()
    qcfg = cfg["qc"]
    variables = [c for c in observations.columns if c not in ("station_id", "time")]
    rows = SortedRows.of(observations)
    buddy = [v for v in variables if qcfg["enabled"] and qcfg["spatial"]
             and (v in SPATIAL_VARIABLES or is_concentration(v, cfg))]
    run = _Run(observations, stations, cfg, thresholds(cfg), variables, buddy, rows)
    threaded = qcfg["enabled"] and len(observations) >= THREADED_ROWS and (len(variables) > 1 or bool(buddy))
    if qcfg["enabled"]:
        tasks, last = run.tasks()
        run_graph(tasks, threads=2 if threaded else 1,
                  then=[(last[v], partial(run.combine, v)) for v in sorted(variables, key=last.__getitem__)])
    for v in variables:
        if run.flags[v] is None:
            run.combine(v)
    return QCResult(run.flags, run.tests, rows.interval)


@dataclass
class _Run:
    """One QC run: the sorted values, the tests that fired, and the flags (see :func:`run_qc`)."""

    observations: pd.DataFrame
    stations: pd.DataFrame
    cfg: Config
    th: dict
    variables: list[str]
    buddy: list[str]
    rows: SortedRows
    arr: dict[str, np.ndarray] = field(default_factory=dict)
    fired: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)
    spatial: SpatialTest | None = None
    slots: Slots | None = None
    flags: dict[str, np.ndarray | None] = field(default_factory=dict)
    tests: dict[str, np.ndarray | None] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.fired = {v: {} for v in self.variables}
        # the flags and fired tests of each variable, in the variables' order whichever is combined first
        self.flags = dict.fromkeys(self.variables)
        self.tests = dict.fromkeys(self.variables)

    # ---- the task graph ---------------------------------------------------------------------------------

    def tasks(self) -> tuple[list[Task], dict[str, int]]:
        """The tasks of a run in order, and each variable's last task (when it is done, so are all of v's)."""
        tasks = [Task(self.spatial_setup), Task(self.sort_values, here=True), Task(self.consistency, (1,), here=True)]
        # the buddy-tested variables first (range/step, then persistence), then the others, then the buddy
        # tests, each in SPATIAL_PARTS parts of the times, so that the two threads finish together
        before: dict[str, list[int]] = {v: [] for v in self.buddy}
        for v in self.buddy:
            before[v].append(len(tasks))
            tasks.append(Task(partial(self.first_tests, v), (2,)))
        slots = len(tasks)  # the persistence slots: found here while the range and step tests run
        tasks.append(Task(self.find_slots, here=True))
        for v in self.buddy:
            before[v].append(len(tasks))
            tasks.append(Task(partial(self.persistence_test, v), (2, slots)))
        last: dict[str, int] = {}
        for v in self.variables:
            if v not in self.buddy:
                last[v] = len(tasks)
                tasks.append(Task(partial(self.all_tests, v), (2, slots)))
        for v in self.buddy:
            g = len(tasks)
            tasks.append(Task(partial(self.spatial_grid, v), (0, *before[v])))
            tasks += [Task(partial(self.spatial_part, v, k), (g,)) for k in range(SPATIAL_PARTS)]
            last[v] = len(tasks)
            tasks.append(Task(partial(self.spatial_finish, v), tuple(range(g + 1, g + 1 + SPATIAL_PARTS))))
        return tasks, last

    def sort_values(self) -> None:
        self.arr = {v: self.observations[v].to_numpy(float)[self.rows.order] for v in self.variables}

    def find_slots(self) -> None:
        self.slots = regular_slots(self.rows.time_ns, self.rows.codes)

    def spatial_setup(self) -> None:
        """The buddy test's shared set-up: it reads the rows in their own order and needs only the interval."""
        if self.buddy:
            self.spatial = SpatialTest.setup(self.observations, self.stations, self.buddy,
                                             "wind_speed" in self.variables, self.cfg, self.th, self.rows.interval,
                                             self.rows.order)

    # ---- the tests --------------------------------------------------------------------------------------

    def consistency(self) -> None:
        """The internal-consistency tests use only the raw values: first, so that the buddy test skips them."""
        arr, fired, qcfg = self.arr, self.fired, self.cfg["qc"]
        if "dew_point_temperature" in arr and "air_temperature" in arr:
            fired["dew_point_temperature"]["consistency"] = ~dew_point_not_above_temperature(
                arr["dew_point_temperature"], arr["air_temperature"], qcfg["dew_point_tolerance"])
        if "wind_speed_of_gust" in arr and "wind_speed" in arr:
            fired["wind_speed_of_gust"]["consistency"] = ~gust_not_below_mean(arr["wind_speed_of_gust"], arr["wind_speed"])
        if "wind_from_direction" in arr and "wind_speed" in arr:
            fired["wind_from_direction"]["consistency"] = ~direction_defined_when_moving(
                arr["wind_from_direction"], arr["wind_speed"], qcfg["calm_speed"])

    def first_tests(self, v: str) -> None:
        """Range, step and spike tests of ``v``."""
        x, th = self.arr[v], self.th
        if v in th["range"]:
            self.fired[v]["range"] = ~within_range(x, *th["range"][v])
        elif is_concentration(v, self.cfg):
            self.fired[v]["range"] = ~within_range(x, 0.0, 1000.0)
        if v in th["step"]:
            step_ok, spike_ok = plausible_steps(x, self.rows.time_ns, self.rows.codes, th["step"][v])
            self.fired[v]["step"] = ~step_ok
            self.fired[v]["spike"] = ~spike_ok

    def persistence_test(self, v: str) -> None:
        x, calm_speed = self.arr[v], self.cfg["qc"]["calm_speed"]
        rule = persistence_rule(v, self.cfg, self.th)
        if rule is not None:
            mr, win = rule
            exempt = None
            if v == "wind_speed":
                exempt = x < calm_speed
            elif v == "wind_from_direction" and "wind_speed" in self.arr:
                exempt = ~(self.arr["wind_speed"] >= calm_speed)
            elif v == "relative_humidity":
                exempt = x >= 99.0
            self.fired[v]["persistence"] = ~not_persistent(x, self.rows.time_ns, self.rows.codes, mr, win, exempt=exempt,
                                                           slots=self.slots)

    def all_tests(self, v: str) -> None:
        self.first_tests(v)
        self.persistence_test(v)

    def _spatial_for(self, v: str) -> SpatialTest | None:
        """The buddy test's shared set-up, or None where ``v`` is not tested."""
        return self.spatial if self.spatial is not None and v in self.spatial.names else None

    def spatial_grid(self, v: str) -> None:
        """The bin means the buddy test of ``v`` reads: after its other tests, whose failures it skips."""
        if (spatial := self._spatial_for(v)) is not None:
            spatial.grid(v, self.fired[v], SPATIAL_PARTS)

    def spatial_part(self, v: str, part: int) -> None:
        if (spatial := self._spatial_for(v)) is not None:
            spatial.test(v, part)

    def spatial_finish(self, v: str) -> None:
        if (spatial := self._spatial_for(v)) is not None:
            spatial.finish(v, self.fired[v], np.isfinite(self.arr[v]))

    # ---- flags ------------------------------------------------------------------------------------------

    def combine(self, v: str) -> None:
        """Flags and test bits of ``v`` from its fired tests, back in the rows' own order."""
        order = self.rows.order
        n = len(order)
        present = ~np.isnan(self.arr[v]) if v in self.arr else ~np.isnan(self.observations[v].to_numpy(float)[order])
        f = np.full(n, MISSING, np.int8)
        f[present] = GOOD
        bits = np.zeros(n, np.int16)
        fired = self.fired[v]
        spatial_bad = fired.pop("spatial_bad", None)
        for name in TEST_BITS:  # a fixed order: the result does not depend on which thread finished first
            if name not in fired:
                continue
            mask = fired[name] & present  # in place below: no temporary arrays per test
            np.bitwise_or(bits, TEST_BITS[name], out=bits, where=mask)
            np.maximum(f, SEVERITY_BY_VARIABLE.get((v, name), SEVERITY[name]), out=f, where=mask)
        if spatial_bad is not None:
            np.maximum(f, BAD, out=f, where=spatial_bad & present)  # BAD is the highest flag of a present value
        inv = self.rows.inverse
        self.flags[v] = f[inv]
        self.tests[v] = bits[inv]
