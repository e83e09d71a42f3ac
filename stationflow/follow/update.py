"""The budget part of a follow call: pin, compute the open rows, store the final ones, render the outputs.

See :mod:`stationflow.follow.engine` for the whole call.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..estimate.budget import REGIMES
from ..estimate.projection import crossing
from ..estimate.provisional import drift_per_hour, one_sided
from ..network.grid import grid_times, parse_duration
from ..qc import flag_table
from ..report import files
from ..run.partitions import compute_partition, derive, partition_rows
from ..run.plan import Layout, plan_budget
from ..run.sinks import Partition
from . import alerts as al
from .context import Follow, StepResult, checked, iso_utc, to_time
from .settings import Pinned, pin, pinned_config, qc_reach, write_pinned
from .state import ALERT_LOG, FINAL_CSV, QC_LOG, Columns, FollowState, Store

log = logging.getLogger(__name__)


def advance(ctx: Follow, state: FollowState, store: Store, obs: pd.DataFrame, gen: int, n_new: int,
            progress) -> StepResult:
    """Bring the budget up to date with ``obs`` (the retained rows, new ones merged) and commit."""
    cfg = ctx.cfg
    newest = pd.Timestamp(obs["time"].max()) if len(obs) else None
    learning = ""
    if newest is not None and n_new == 0 and state.rendered == state.generation and (ctx.out / "now.html").exists():
        state.generation = gen
        state.rendered = gen
        store.commit(state)  # only the poll count changed
        return StepResult(0, newest, to_time(state.final_through), [])
    if state.pinned is None:
        need = parse_duration(cfg["follow"]["learn"])
        span = (newest - pd.Timestamp(obs["time"].min())) if newest is not None else pd.Timedelta(0)
        if newest is None or span < need:
            learning = (f"learning the network's settings: {_minutes(span)} of the {_minutes(need)} of data needed "
                        "so far" if newest is not None else
                        f"waiting for the first observations in {ctx.obs}"
                        + ("" if ctx.obs.exists() else " (it does not exist yet)"))
        else:
            progress("learning the settings (pinned for the night: settings.toml)")
            chk = checked(obs, ctx.stations, cfg, state.units)
            plan = plan_budget(chk, cfg)
            p = pin(plan, cfg, time_format=state.time_format, newest=newest)
            state.pinned = p.to_json()
            state.minimum = {}  # the clusters of the learning hour may differ from the pinned network's
            write_pinned(cfg, p, ctx.out)
            if plan.sensors is not None:
                files.write_csv(plan.sensors, ctx.out / "sensor_offsets.csv", time_columns=())
    if learning:
        return _early(ctx, state, store, obs, gen, n_new, learning, progress)
    p = Pinned.from_json(state.pinned)
    step_cfg = pinned_config(cfg, p, ctx.out, for_steps=True)
    progress("quality control and plane fits of the open rows")
    block = _compute(ctx, state, obs, step_cfg, p.network_stations)
    _store_final(state, store, block)
    _store_revisions(state, store, block)
    _update_minimum(state, block)
    latest, new_alerts = _judge(ctx, state, store, block, step_cfg)
    _save_obs(state, store, _trim(obs, block), gen)
    return _finish(ctx, state, store, block, latest, new_alerts, gen, n_new, progress)


def _minutes(td: pd.Timedelta) -> str:
    return f"{td.total_seconds() / 60:.0f} min"


def _early(ctx: Follow, state: FollowState, store: Store, obs: pd.DataFrame, gen: int, n_new: int, learning: str,
           progress) -> StepResult:
    """Before the settings are pinned: the rows answered with settings learned from the data so far (nothing
    becomes final or is stored), or the waiting page when there is too little to fit yet."""
    from ..errors import StationflowError

    _save_obs(state, store, obs, gen)
    block = None
    if len(obs):
        early_cfg = ctx.cfg.with_values(sensors={"estimate": False})
        try:
            progress("quality control and plane fits (settings not pinned yet)")
            block = _compute(ctx, state, obs, early_cfg, None, final=False)
        except StationflowError as exc:  # too few stations or times to fit yet: say so and wait
            learning = f"{learning}; no budget yet ({exc})"
    if block is None or len(block.times) == 0:
        state.generation = gen
        store.commit(state)
        _render_waiting(ctx, state, store, learning)
        return StepResult(n_new, pd.Timestamp(obs["time"].max()) if len(obs) else None, None, [], waiting=learning)
    block.learning = learning
    latest, new_alerts = _judge(ctx, state, store, block, early_cfg)
    return _finish(ctx, state, store, block, latest, new_alerts, gen, n_new, progress)


def _judge(ctx: Follow, state: FollowState, store: Store, block: "Block", cfg) -> tuple:
    """The newest rows with their projections, and the alerts that start now (appended to the log)."""
    from ..report.now import Display

    var = block.plan.variable
    latest = _latest(block, cfg, var)
    display = Display.of(var, block.plan.unit, ctx.cfg["observations"]["units"].get(var))
    new_alerts = al.evaluate(latest, state.last_seen, state.firing, cfg, variable=var,
                             unit=block.plan.unit, zone=_zone(ctx.cfg), display=display)
    store.append_alerts(state, new_alerts)
    return latest, new_alerts


def _finish(ctx: Follow, state: FollowState, store: Store, block: "Block", latest, new_alerts: list, gen: int,
            n_new: int, progress) -> StepResult:
    """Commit, render every output from the committed state, hand the new alerts to alerts.command."""
    _store_qc(state, store, block)
    state.newest = iso_utc(block.times[-1])
    state.generation = gen
    store.commit(state)  # the commit point: everything above is now the state
    progress("writing the outputs")
    render(ctx, state, store, block, latest)
    if state.delivered < state.alert_count:
        state.delivered += al.run_command(ctx.cfg["alerts"]["command"], store.alerts(state, state.delivered))
    state.rendered = gen
    store.commit(state)
    return StepResult(n_new, block.times[-1], to_time(state.final_through), new_alerts,
                      waiting=block.learning, latest=_latest_table(latest, block))


@dataclass
class Block:
    """The rows computed by one call: ``terms`` from the first open analysis time to the newest."""

    plan: object  # the BudgetPlan of the retained rows
    times: pd.DatetimeIndex  # the analysis times of ``terms``
    terms: dict
    n_final: int  # the first rows, which are now final
    reach: int  # the QC reach [analysis steps]
    flags: pd.DataFrame  # the QC flags of the retained rows (qc_flags.csv's columns)
    qc_doubts: pd.DataFrame  # the flags of each station's newest value of the variable or the wind
    drift: np.ndarray  # per cluster: the change per hour of the centred in-situ rate (the projection's drift)
    newest_report: pd.Timestamp  # the newest observation time
    learning: str = ""  # before the settings are pinned: what is being learned

    @property
    def clusters(self) -> pd.DataFrame:
        return self.plan.layout.clusters


def _compute(ctx: Follow, state: FollowState, obs: pd.DataFrame, step_cfg, network_stations: list[str] | None, *,
             final: bool = True) -> Block:
    """QC, fits and budget of the retained rows; the rows from the first open time on, the one-sided newest
    (``final=False``: none becomes final, before the settings are pinned)."""
    chk = checked(obs, ctx.stations, step_cfg, state.units)
    plan = plan_budget(chk, step_cfg, network_stations=network_stations)
    interval = plan.interval
    variables = [c for c in obs.columns if c not in ("station_id", "time")]
    reach = qc_reach(step_cfg, variables, interval)
    times = plan.times
    n = len(times)
    last_final = to_time(state.final_through)
    f = 0 if last_final is None else int(times.searchsorted(last_final + interval))
    a = max(0, f - plan.halo)
    terms = compute_partition(plan, partition_rows(plan, a, n - 1), a, n - 1)
    terms = derive(terms, plan.layout.convergence)
    h = plan.settings.half_window
    drift = drift_per_hour(terms, "residual", h, interval.total_seconds())
    one = one_sided(terms, h, plan.settings)
    core = slice(f - a, None)
    terms = {k: np.ascontiguousarray(v[core]) for k, v in terms.items()}
    lag = plan.halo + reach  # steps after which nothing that can still arrive changes a row
    n_final = max(0, (n - 1 - lag) - f + 1) if final else 0
    k, n_c = terms["regime"].shape
    provisional = np.ones((k, n_c), bool)
    provisional[:n_final] = False
    terms["provisional"] = provisional
    terms["one_sided"] = np.broadcast_to(one[core][:, None], (k, n_c)).copy()
    flags = flag_table(chk.data.observations, chk.qc)
    return Block(plan, times[f:], terms, n_final, reach, flags, _doubts(chk, plan, flags), drift,
                 pd.Timestamp(obs["time"].max()))


def _store_qc(state: FollowState, store: Store, block: Block) -> None:
    """Append the QC flags that became final (their values' QC windows are complete) to the flag log."""
    from ..report.files import QC_FLAG_COLUMNS, csv_bytes

    cut = block.newest_report - block.reach * block.plan.interval
    done = to_time(state.qc_through)
    if done is not None and cut <= done:
        return
    flags = block.flags
    sel = (flags["time"] <= cut) & ((flags["time"] > done) if done is not None else True)
    text = csv_bytes(flags.loc[sel, QC_FLAG_COLUMNS], header=state.qc_bytes == 0)
    state.qc_bytes = store.append_bytes(QC_LOG, state.qc_bytes, text)
    state.qc_through = iso_utc(cut)


def _doubts(chk, plan, table: pd.DataFrame) -> pd.DataFrame:
    """The stations whose newest value of the variable or the wind QC doubts: station, variable, flag, tests
    (``table``: the flags of the retained rows)."""
    obs = chk.data.observations
    if table.empty:
        return table
    last = obs.groupby("station_id", observed=True)["time"].max()
    newest = table["station_id"].astype(str).map({str(k): v for k, v in last.items()})
    keep = (table["time"] == newest) & table["variable"].isin([plan.variable, "wind_speed", "wind_from_direction"])
    return table[keep.to_numpy()].reset_index(drop=True)


def _final_columns(state: FollowState, store: Store) -> Columns:
    return Columns(store, "final", state.final_layout)


def _store_final(state: FollowState, store: Store, block: Block) -> None:
    """Append the rows that became final, once, for good (committed with the state): their columns, and
    their budget.csv lines."""
    from ..report.tables import csv_rows

    k = block.n_final
    if k <= 0:
        return
    if not state.final_layout:
        state.final_layout = {n: [np.asarray(v).dtype.str, int(v.shape[1])] for n, v in block.terms.items()}
        state.first_time = iso_utc(block.times[0])
    rows = {n: v[:k] for n, v in block.terms.items()}
    text = csv_rows(_night_layout(state, block), state.final_rows, rows, header=state.final_rows == 0)
    state.final_csv_bytes = store.append_bytes(FINAL_CSV, state.final_csv_bytes, text)
    _final_columns(state, store).append(state.final_rows, rows)
    state.final_rows += k
    state.final_through = iso_utc(block.times[k - 1])


#: columns of the revision history (the one-sided estimates as they were issued)
REVISION_COLUMNS = ("tendency", "tendency_se", "advection", "advection_se", "residual", "residual_se")
#: the revision history's columns: [dtype, 0] (one value per row)
REVISION_LAYOUT = {"issued": ["<i8", 0], "time": ["<i8", 0], "cluster": ["<i4", 0],
                   **{c: ["<f8", 0] for c in REVISION_COLUMNS}, "regime": ["|i1", 0]}


def _store_revisions(state: FollowState, store: Store, block: Block) -> None:
    """Append the one-sided estimates as issued now (the revision history of the newest rows)."""
    rows = np.flatnonzero(block.terms["one_sided"][:, 0])
    if rows.size == 0:
        return
    n_c = len(block.clusters)
    t = block.terms
    arrays = {"issued": np.repeat(block.times[-1].value, rows.size * n_c),
              "time": np.repeat(block.times[rows].asi8, n_c),
              "cluster": np.tile(np.arange(n_c, dtype=np.int32), rows.size),
              **{c: t[c][rows].reshape(-1) for c in REVISION_COLUMNS},
              "regime": t["regime"][rows].reshape(-1)}
    state.revision_layout = REVISION_LAYOUT
    Columns(store, "revisions", REVISION_LAYOUT).append(state.revision_rows, arrays)
    state.revision_rows += rows.size * n_c


def revisions_table(state: FollowState, store: Store, clusters: pd.DataFrame, since: pd.Timestamp | None = None
                    ) -> pd.DataFrame:
    """The revision history: the one-sided estimates as they were issued (those issued from ``since`` on)."""
    cols = Columns(store, "revisions", state.revision_layout)
    start = 0
    if since is not None:
        issued = cols.read(state.revision_rows, names=["issued"])["issued"]
        start = int(np.searchsorted(issued, since.value))  # issued in order
    got = cols.read(state.revision_rows, start=start)
    names = clusters["cluster"].astype(str).to_numpy()
    return pd.DataFrame({"issued": pd.to_datetime(got["issued"], utc=True), "time": pd.to_datetime(got["time"], utc=True),
                         "cluster": names[got["cluster"]], **{c: got[c] for c in REVISION_COLUMNS},
                         "regime": np.asarray(REGIMES, object)[got["regime"]]})


def _zone(cfg):
    from ..read.times import tzinfo_for
    from ..report.text import display_zone

    return tzinfo_for(display_zone(cfg) or "UTC")


def _latest(block: Block, cfg, variable: str) -> al.Latest:
    """The newest row of every cluster with its projection to the critical value."""
    t = block.terms
    clusters = block.clusters
    critical = al.critical_values(cfg, variable, clusters)
    i = -1
    cross = crossing(t["value"][i], t["value_se"][i], t["residual"][i], t["residual_se"][i], critical,
                     downward=al.downward(variable, cfg), drift=block.drift)
    return al.Latest(block.times[-1], clusters["cluster"].astype(str).tolist(), t["value"][i], t["value_se"][i],
                     t["tendency"][i], t["advection"][i], t["residual"][i], t["residual_se"][i],
                     [REGIMES[c] for c in t["regime"][i]], critical, cross.hours, cross.hours_se)


def _latest_table(latest: al.Latest, block: Block) -> pd.DataFrame:
    t = block.terms
    return pd.DataFrame({"time": latest.time, "cluster": latest.clusters, "value": latest.value,
                         "value_se": latest.value_se, "tendency": latest.tendency,
                         "tendency_se": t["tendency_se"][-1], "advection": latest.advection,
                         "advection_se": t["advection_se"][-1], "residual": latest.residual,
                         "residual_se": latest.residual_se, "regime": latest.regime, "critical": latest.critical,
                         "hours": latest.hours, "hours_se": latest.hours_se})


def _update_minimum(state: FollowState, block: Block) -> None:
    """Each cluster's lowest value so far, and when (``state.minimum``: cluster -> [value, time])."""
    v = np.where(np.isfinite(block.terms["value"]), block.terms["value"], np.inf)
    idx = np.argmin(v, axis=0)
    low = v[idx, np.arange(v.shape[1])]
    names = block.clusters["cluster"].astype(str).to_numpy()
    old = np.array([state.minimum.get(c, [np.inf])[0] for c in names], float)
    lower = np.flatnonzero(np.isfinite(low) & (low < old))
    when = block.times[idx[lower]].strftime("%Y-%m-%dT%H:%M:%SZ")
    state.minimum.update(zip(names[lower].tolist(), ([float(a), t] for a, t in zip(low[lower], when))))


def _trim(obs: pd.DataFrame, block: Block) -> pd.DataFrame:
    """The rows the next call can still need: the QC reach and the budget halo before the first open time."""
    interval = block.plan.interval
    first_open = block.times[block.n_final] if block.n_final < len(block.times) else block.times[-1]
    keep_from = first_open - (block.plan.halo + block.reach + 2) * interval
    return obs[obs["time"] > keep_from].reset_index(drop=True)


def _save_obs(state: FollowState, store: Store, obs: pd.DataFrame, gen: int) -> None:
    name = store.name("obs", gen, "parquet")
    store.dir.mkdir(parents=True, exist_ok=True)
    obs.to_parquet(store.file(name), index=False)
    state.obs = name


# --------------------------------------------------------------------------
# the outputs
# --------------------------------------------------------------------------

def _night_layout(state: FollowState, block: Block) -> Layout:
    """The whole night so far: from the first final row (or the first open one) to the newest."""
    plan = block.plan
    t0 = to_time(state.first_time) if state.final_rows else block.times[0]
    times = grid_times(t0, block.times[-1], plan.interval)
    lay = plan.layout
    return Layout(times, lay.clusters, lay.convergence, lay.unit, lay.variable, lay.quantity)


#: final analysis steps read back at once when the outputs are rendered (memory stays bounded however long
#: the run: a day of 5-minute steps)
FINAL_STEPS_PER_PART = 288


def _parts(state: FollowState, store: Store, block: Block):
    """Every row of the night in time order: the stored final rows (a day at a time), then this call's open
    rows."""
    cols = _final_columns(state, store)
    for a in range(0, state.final_rows, FINAL_STEPS_PER_PART):
        b = min(state.final_rows, a + FINAL_STEPS_PER_PART)
        yield Partition(a, cols.read(b, start=a))
    k = block.n_final
    yield Partition(state.final_rows, {n: v[k:] for n, v in block.terms.items()})


def render(ctx: Follow, state: FollowState, store: Store, block: Block, latest: al.Latest) -> None:
    """Every output from the committed state and this call's open rows (each file written atomically)."""
    from ..report.now import RECENT_ALERTS, write_page
    from ..report.tables import budget_files
    from .history import History

    out = ctx.out
    layout = _night_layout(state, block)
    history = History(layout.times, float(ctx.cfg["follow"]["page_hours"]))
    with budget_files(out, layout, with_csv=False) as sinks:
        for part in _parts(state, store, block):
            for s in sinks:
                s.write(part)
            history.write(part)
    _write_csv(ctx, state, store, block, layout)
    _write_records(ctx, state, store, block, layout)
    recent = store.alerts(state, max(0, state.alert_count - RECENT_ALERTS))
    write_page(out / "now.html", ctx=ctx, state=state, block=block, latest=latest, history=history, recent=recent)
    _write_alerts(out, state, store)


def _write_csv(ctx: Follow, state: FollowState, store: Store, block: Block, layout: Layout) -> None:
    """budget.csv: the final rows' stored lines, then this call's open rows (as a batch run writes it: not
    above the same row limit, unless --csv)."""
    from ..report.tables import csv_rows, csv_wanted

    out = ctx.out
    if not csv_wanted(len(layout.times) * len(layout.clusters), ctx.csv):
        (out / "budget.csv").unlink(missing_ok=True)
        return
    k = block.n_final
    open_rows = {n: v[k:] for n, v in block.terms.items()}
    tail = csv_rows(layout, state.final_rows, open_rows, header=state.final_rows == 0)
    _log_and_tail(out / "budget.csv", store, FINAL_CSV, state.final_csv_bytes, tail)


def _log_and_tail(path: Path, store: Store, log: str, committed: int, tail: bytes) -> None:
    """Write ``path`` atomically: the committed part of the state's log ``log``, then ``tail``."""
    from ..report.atomic import atomic_write

    with atomic_write(path) as tmp:
        with open(tmp, "wb", buffering=0) as fh:
            if committed:
                with open(store.file(log), "rb", buffering=0) as src:
                    _copy(src, fh, committed)
            fh.write(tail)


def _copy(src, dst, n: int) -> None:
    """The first ``n`` bytes of ``src`` to ``dst`` (unbuffered files; in the kernel where it can)."""
    import os

    left = n
    try:
        while left > 0:
            done = os.copy_file_range(src.fileno(), dst.fileno(), left)
            if done == 0:
                break
            left -= done
    except (AttributeError, OSError):  # not Linux, or a file system without it
        pass
    while left > 0:
        chunk = src.read(min(left, 1 << 20))
        if not chunk:
            break
        dst.write(chunk)
        left -= len(chunk)


def _write_qc_flags(out: Path, state: FollowState, store: Store, block: Block) -> None:
    """qc_flags.csv: the logged final flags, then those of the open rows (which may still change)."""
    from ..report.files import QC_FLAG_COLUMNS, csv_bytes

    flags = block.flags
    done = to_time(state.qc_through)
    rest = flags[flags["time"] > done] if done is not None else flags
    tail = csv_bytes(rest[QC_FLAG_COLUMNS], header=state.qc_bytes == 0)
    _log_and_tail(out / "qc_flags.csv", store, QC_LOG, state.qc_bytes, tail)


def _write_alerts(out: Path, state: FollowState, store: Store) -> None:
    _log_and_tail(out / "alerts.jsonl", store, ALERT_LOG, state.alert_bytes, b"")


def _write_records(ctx: Follow, state: FollowState, store: Store, block: Block, layout: Layout) -> None:
    """rejected_rows.csv, clusters.csv, revisions.parquet and run.json."""
    from ..network.geometry import cluster_table
    from ..report.outputs import run_record

    out = ctx.out
    rej = (pd.read_parquet(store.file(state.rejected)) if state.rejected
           else pd.DataFrame(columns=["file", "line", "reason"]))
    files.write_rejected(rej, out / "rejected_rows.csv")
    _write_qc_flags(out, state, store, block)
    files.write_csv(cluster_table(block.plan.network), out / "clusters.csv", time_columns=())
    if state.revision_rows:
        hours = float(ctx.cfg["follow"]["page_hours"])
        rev = revisions_table(state, store, layout.clusters, since=layout.times[-1] - pd.Timedelta(hours=hours))
        from ..report.atomic import write_with

        write_with(out / "revisions.parquet", lambda tmp: rev.to_parquet(tmp, index=False))
    accounting = {k: v for k, v in state.counts.items()}
    rec = run_record("budget --follow", {"observations": ctx.obs, "stations": ctx.stations_path}, ctx.cfg, accounting, {
        "status": "following" if state.pinned else "learning",
        "variable": block.plan.variable, "quantity": block.plan.quantity, "unit": block.plan.unit,
        "pinned": {k: v for k, v in state.pinned.items() if k != "noise"} if state.pinned else None,
        "settings_file": "settings.toml" if state.pinned else None,
        "newest_time": state.newest, "final_through": state.final_through,
        "rows": {"final_steps": int(sum(1 for _ in layout.times[:_final_steps(state, layout)])),
                 "steps": int(len(layout.times)), "clusters": int(len(layout.clusters))},
        "final_lag_steps": int(block.plan.halo + block.reach),
        "alerts": state.alert_count,
    })
    files.write_json(rec, out / "run.json")


def _final_steps(state: FollowState, layout: Layout) -> int:
    if state.final_through is None:
        return 0
    return int(layout.times.searchsorted(to_time(state.final_through), side="right"))


def _render_waiting(ctx: Follow, state: FollowState, store: Store, message: str) -> None:
    from ..report.now import write_waiting

    write_waiting(ctx.out / "now.html", ctx=ctx, state=state, message=message)
    state.rendered = state.generation
    store.commit(state)
