"""What the report needs from a budget, kept while the full table streams to disk.

A run over months of a large network produces tens of millions of budget
rows; they are written to Parquet and NetCDF one time partition at a time
(:mod:`stationflow.report.tables`, :mod:`stationflow.report.netcdf`) and never held in memory together.  The
:class:`BudgetSummary` keeps what the report, the figures and the console
summary use: the regime code of every cluster and time (one byte each), the
six budget terms as float32 (periods and the time-series figure), per-cluster
sums for the map arrows and the mast inversion per time.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..estimate.budget import REGIMES, periods_from_arrays

#: budget terms kept (float32) for periods and the time-series figure
KEPT = ("tendency", "advection", "residual", "tendency_se", "advection_se", "residual_se")
#: per-cluster means over determined times, for the map arrows
ARROWS = ("u", "v", "grad_x", "grad_y")
UNDETERMINED = np.int8(REGIMES.index("undetermined"))


@dataclass
class BudgetSummary:
    """Regimes, kept terms and per-cluster sums of a budget, filled partition by partition."""

    times: pd.DatetimeIndex
    clusters: pd.DataFrame  # cluster, stations, latitude, longitude
    regime: np.ndarray  # int8 codes into REGIMES, (n_times, n_clusters)
    terms: dict[str, np.ndarray]  # KEPT, float32, (n_times, n_clusters)
    sums: dict[str, np.ndarray] = field(default_factory=dict)
    counts: dict[str, np.ndarray] = field(default_factory=dict)
    inversion: np.ndarray | None = None  # per time
    #: steps per cluster (rows) and regime (columns) of the blocks added so far (undetermined: not counted)
    tally: np.ndarray | None = None
    steps_added: int = 0
    #: rows where the model error (the field is not a plane) is larger than the gradient error from the sensors
    not_planar: np.ndarray | None = None  # per cluster
    planar_rows: np.ndarray | None = None  # per cluster: rows with both errors known
    implausible_rows: int = 0  # rows whose parts were each far larger than the change (budget.implausible)
    columns: slice | None = None  # the partition's columns this summary keeps (None: all)

    @classmethod
    def allocate(cls, times: pd.DatetimeIndex, clusters: pd.DataFrame, columns: slice | None = None) -> "BudgetSummary":
        """An empty summary for ``times`` x ``clusters`` (every value undetermined until added); ``columns``: which
        columns of each partition are these clusters (the local ones, or the regional row)."""
        shape = (len(times), len(clusters))
        return cls(times, clusters.reset_index(drop=True), np.full(shape, UNDETERMINED, np.int8),
                   {k: np.full(shape, np.nan, np.float32) for k in KEPT},
                   {k: np.zeros(shape[1]) for k in ARROWS}, {k: np.zeros(shape[1], np.int64) for k in ARROWS},
                   tally=np.zeros((shape[1], len(REGIMES)), np.int64), columns=columns)

    def write(self, part) -> None:
        """Take a :class:`~stationflow.run.sinks.Partition` (the summary is a sink)."""
        first, block = part.first, part.terms
        if self.columns is not None:
            block = {k: v[:, self.columns] for k, v in block.items()}
        reg = np.asarray(block["regime"])
        sl = slice(first, first + reg.shape[0])
        self.regime[sl] = reg
        for k in KEPT:
            self.terms[k][sl] = block[k]
        if self.tally is not None:  # counted here, block by block, so the report needs no pass over every step
            for r in range(len(REGIMES)):
                if r != UNDETERMINED:
                    self.tally[:, r] += (reg == r).sum(axis=0)
        self.steps_added += reg.shape[0]
        det = reg != UNDETERMINED
        for k in ARROWS:
            a = block[k]
            ok = det & np.isfinite(a)
            self.sums[k] += np.where(ok, a, 0.0).sum(axis=0)
            self.counts[k] += ok.sum(axis=0)
        if "implausible" in block:
            self.implausible_rows += int(np.count_nonzero(block["implausible"]))
        if "model_error" in block and "grad_x_se" in block:
            if self.not_planar is None:
                self.not_planar = np.zeros(reg.shape[1], np.int64)
                self.planar_rows = np.zeros(reg.shape[1], np.int64)
            me, gse = np.asarray(block["model_error"]), np.asarray(block["grad_x_se"])
            known = np.isfinite(me) & np.isfinite(gse)
            sensor = np.sqrt(np.fmax(gse * gse - me * me, 0.0))
            self.not_planar += (known & (me > sensor)).sum(axis=0)
            self.planar_rows += known.sum(axis=0)
        if "inversion" in block:
            if self.inversion is None:
                self.inversion = np.full(len(self.times), np.nan)
            self.inversion[sl] = block["inversion"][:, 0]

    def close(self) -> None:
        """Nothing to finish: the summary is complete once every partition was written."""

    # ---- what the report asks --------------------------------------------------------

    @property
    def rows(self) -> int:
        """Rows of the budget table (clusters x times)."""
        return int(self.regime.size)

    def _counts(self) -> np.ndarray:
        """Steps per cluster (rows) and regime code (columns)."""
        n_t, n_c = self.regime.shape
        if self.tally is not None and self.steps_added == n_t:  # every step added once: the running tally
            counts = self.tally.copy()
            counts[:, UNDETERMINED] = n_t - counts.sum(axis=1)
            return counts
        flat = self.regime.astype(np.intp) * n_c + np.arange(n_c)[None, :]
        return np.bincount(flat.reshape(-1), minlength=len(REGIMES) * n_c).reshape(len(REGIMES), n_c).T

    def regime_counts(self) -> dict[str, int]:
        """Cluster-steps per regime, most frequent first (every regime listed)."""
        n = self._counts().sum(axis=0)
        order = sorted(range(len(REGIMES)), key=lambda i: (-n[i], i))
        return {REGIMES[i]: int(n[i]) for i in order}

    def cluster_counts(self) -> pd.DataFrame:
        """Steps per cluster (rows) and regime (columns)."""
        return pd.DataFrame(self._counts(), index=pd.Index(self.clusters["cluster"].astype(str), name="cluster"),
                            columns=list(REGIMES))

    def dominant(self) -> dict[str, str]:
        """The commonest regime of each cluster over the record, steady and undetermined included (the map's rule)."""
        counts = self._counts()
        best = np.argmax(counts, axis=1)
        return {str(k): REGIMES[int(b)] for k, b in zip(self.clusters["cluster"], best)}

    def arrows(self) -> dict:
        """Mean wind and gradient per cluster over its determined times."""
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = {k: self.sums[k] / self.counts[k] for k in ARROWS}
        return {"cluster": list(self.clusters["cluster"].astype(str)), "u": mean["u"], "v": mean["v"],
                "gx": mean["grad_x"], "gy": mean["grad_y"]}

    def median_se(self, name: str) -> float:
        """Median of ``name`` (a kept term) over determined cluster-steps (NaN when none)."""
        vals = self.terms[name][self.regime != UNDETERMINED]
        vals = vals[np.isfinite(vals)]  # a new array: it is reordered in place below
        if not vals.size:
            return float("nan")
        # as np.median, with one selection instead of two (which numpy makes for an even count: 4x the time)
        k = vals.size // 2
        vals.partition(k)
        if vals.size % 2:
            return float(vals[k])
        return (float(vals[:k].max()) + float(vals[k])) / 2

    def periods(self, unit: str, **kw) -> list[dict]:
        """Main periods (runs of one regime), see :func:`stationflow.estimate.budget.periods_from_arrays`."""
        return periods_from_arrays(self.times, self.clusters["cluster"].astype(str).to_numpy(),
                                   {"regime": self.regime, **self.terms}, unit=unit, **kw)

    def busiest(self, n: int) -> list[int]:
        """Indices of the ``n`` clusters with the most determined steps (ties: first listed)."""
        det = len(self.times) - self._counts()[:, UNDETERMINED]
        order = np.argsort(-det, kind="stable")
        return [int(i) for i in order[:n]]

    def figure_clusters(self, n: int, periods: list[dict]) -> list[int]:
        """The clusters a figure draws: every cluster of the main periods (in their order), then the busiest, to ``n``."""
        index = {str(name): i for i, name in enumerate(self.clusters["cluster"])}
        first = list(dict.fromkeys(index[str(p["cluster"])] for p in periods if str(p["cluster"]) in index))
        rest = [c for c in self.busiest(len(self.clusters)) if c not in first]
        return first + rest[:max(0, n - len(first))]

    def series(self, c: int) -> pd.DataFrame:
        """Time series of cluster ``c`` (index into the clusters): kept terms and regime names."""
        frame = pd.DataFrame({k: v[:, c].astype(float) for k, v in self.terms.items()})
        frame.insert(0, "time", self.times)
        frame["regime"] = np.asarray(REGIMES, dtype=object)[self.regime[:, c]]
        return frame
