"""One call of a followed night: the new lines in, the budget brought up to date, the outputs out.

:func:`follow_step` is what ``stationflow budget --follow`` runs every
``--every`` seconds and ``--once`` runs once.  Each call:

1. reads the new whole lines of the source (:mod:`.source`) and makes them
   canonical exactly as a batch run would (the same readers, line numbers
   and reasons); repeats of rows already held are dropped and counted,
   rows that contradict them are rejected with their file and line;
2. keeps the observations the open rows still need (the retained window:
   the rows not yet final plus the halo their QC and fits look at), so
   memory stays bounded however long the night;
3. once ``follow.learn`` of data has arrived, pins the settings learned
   from the data (:mod:`.settings`); until then it answers with the
   settings learned so far, and nothing becomes final;
4. runs QC, the plane fits and the budget on the retained window only, and
   splits the rows into *final* ones (nothing that can still arrive can
   change them: their centred window, the model error's smoothing and the
   QC windows of every value they use are complete) and *provisional*
   ones; the newest ``h`` rows get one-sided tendencies
   (:mod:`stationflow.estimate.provisional`);
5. stores the new final rows once, for good, and commits the state
   (:mod:`.state`), then renders every output from it: the budget files
   (final rows plus the current provisional ones), now.html, alerts.jsonl.

A final row equals the row a batch run with ``settings.toml`` computes on
the whole record (to rounding): the retained window always holds the QC
reach and the budget halo of every row computed.
"""

from __future__ import annotations

import logging
import time as _time

import numpy as np
import pandas as pd

from ..config import Config
from ..errors import ConfigError
from ..read.canonical import IngestResult, canonicalise
from ..read.layouts import AmbiguousTimes
from ..read.observations import read_csv_lines
from . import source as src
from .context import Follow, StepResult, iso_utc, to_time
from .state import FollowState, Store
from .update import advance

log = logging.getLogger(__name__)


def _empty_obs() -> pd.DataFrame:
    return pd.DataFrame({"station_id": pd.Categorical([]), "time": pd.Series([], dtype="datetime64[ns, UTC]")})


def _read_config(ctx: Follow, state: FollowState) -> Config:
    """The configuration new lines are read with: the time layout found in the first lines pinned."""
    if not state.time_format:
        return ctx.cfg
    return ctx.cfg.with_values(observations={"time_format": state.time_format})


def _ingest(ctx: Follow, state: FollowState, chunks: list, store: Store) -> tuple[list[pd.DataFrame], list, list]:
    """Each chunk's canonical rows with their file and line, and the rejected rows; counts go to ``state``."""
    frames, sources, rejected = [], [], []
    for ch in chunks:
        cfg = _read_config(ctx, state)
        raw = read_csv_lines(ch.path, ch.header, ch.body, ch.first_line, cfg, ctx.stations, store.dir)
        if raw.frame.empty and not raw.rejected:
            continue
        try:
            res: IngestResult = canonicalise(raw, cfg, ctx.stations, keep_lines=True)
        except AmbiguousTimes as exc:
            # a live export's first lines may all fall on one day, which cannot tell 04/10 from 10/04 until
            # midnight: the reading that puts them near this computer's clock is taken (else the error stands)
            state.time_format = _by_the_clock(raw, cfg, exc)
            cfg = _read_config(ctx, state)
            res = canonicalise(raw, cfg, ctx.stations, keep_lines=True)
        acc = res.accounting
        state.counts["rows_read"] += acc["rows_read"]
        state.counts["rows_accepted"] += acc["rows_accepted"]
        state.counts["rows_rejected"] += acc["rows_rejected"]
        state.counts["duplicates"] += acc.get("duplicates_collapsed", 0)
        if len(res.rejected):
            rejected.append(res.rejected)
        if not state.time_format and len(res.observations):
            layout = res.reading.get("time_layout", "")
            if layout and layout != "ISO8601":
                state.time_format = layout
        if not state.units:
            state.units = dict(res.units)
        if len(res.observations):
            frames.append(res.observations)
            sources.append(res.row_sources)
    return frames, sources, rejected


def clock() -> pd.Timestamp:
    """This computer's time (UTC)."""
    return pd.Timestamp.now(tz="UTC")


def _by_the_clock(raw, cfg: Config, exc: AmbiguousTimes) -> str:
    """Of the two readings of ambiguous times, the one whose newest time lies within two days of now (and the
    other's not); else ``exc`` is raised."""
    from ..read.stations import rename_columns
    from ..read.times import tzinfo_for

    frame = raw.frame.rename(columns=rename_columns(list(raw.frame.columns), cfg["observations"]["columns"]))
    if "time" not in frame:
        raise exc
    now = clock()
    near = []
    for layout in exc.layouts:
        t = pd.to_datetime(frame["time"].astype(str), format=layout, errors="coerce").dropna()
        if t.empty:
            continue
        newest = t.max().tz_localize(tzinfo_for(cfg["observations"]["timezone"]), ambiguous="NaT",
                                     nonexistent="NaT")
        if pd.notna(newest) and abs(newest - now) <= pd.Timedelta("2D"):
            near.append(layout)
    if len(near) != 1:
        raise exc
    return near[0]


def _merge(state: FollowState, retained: pd.DataFrame, frames: list, sources: list
           ) -> tuple[pd.DataFrame, list[pd.DataFrame], int]:
    """The retained rows plus the new ones: repeats of held rows dropped (counted), contradictions rejected
    (file, line, reason), rows for times already final counted as late.  Returns (rows, rejected, new rows)."""
    if not frames:
        return retained, [], 0
    new = pd.concat([f.assign(station_id=f["station_id"].astype(str)) for f in frames], ignore_index=True)
    files = np.concatenate([s[0] for s in sources])
    lines = np.concatenate([s[1] for s in sources])
    old = retained.assign(station_id=retained["station_id"].astype(str)) if len(retained) else retained
    var_cols = sorted((set(new.columns) | set(old.columns)) - {"station_id", "time"})
    both = pd.concat([old, new], ignore_index=True)
    for c in var_cols:
        if c not in both:
            both[c] = np.nan
    key = both["station_id"] + "|" + pd.DatetimeIndex(both["time"]).asi8.astype(str)
    first = ~key.duplicated(keep="first").to_numpy()
    n_old = len(old)
    repeat = np.flatnonzero(~first)
    rejected = []
    drop = np.zeros(len(both), bool)
    if repeat.size:
        first_pos = pd.Series(np.arange(len(both)), index=key).groupby(level=0).transform("first").to_numpy()
        vals = both[var_cols].to_numpy(float)
        a, b = vals[repeat], vals[first_pos[repeat]]
        same = np.all((a == b) | (np.isnan(a) & np.isnan(b)), axis=1)
        drop[repeat] = True
        state.counts["duplicates"] += int(same.sum())
        conflict = repeat[~same]
        if conflict.size:
            state.counts["conflicts"] += int(conflict.size)
            state.counts["rows_rejected"] += int(conflict.size)
            state.counts["rows_accepted"] -= int(conflict.size)
            rejected.append(pd.DataFrame({
                "file": files[conflict - n_old], "line": lines[conflict - n_old].astype(int),
                "reason": "conflicts with an earlier row of the same station and time (different values); the "
                          "earlier row was already in use and is kept"}))
    out = both[~drop]
    n_new = int((~drop[n_old:]).sum())
    final = to_time(state.final_through)
    if final is not None and n_new:
        late = out["time"].iloc[n_old - int(drop[:n_old].sum()):] <= final
        state.counts["late_after_final"] += int(late.sum())
    out = out.sort_values(["time", "station_id"], kind="stable").reset_index(drop=True)
    out["station_id"] = pd.Categorical(out["station_id"], categories=sorted(out["station_id"].unique()))
    out["time"] = pd.DatetimeIndex(out["time"]).as_unit("ns")
    return out, rejected, n_new


def follow_step(ctx: Follow, *, progress=lambda _m: None) -> StepResult:
    """One call (see the module docstring)."""
    cpu0 = _time.process_time()
    store = Store(ctx.out)
    if not ctx.locked:
        store.lock()
        ctx.locked = True
    state = store.load()
    store.tidy(state)
    if state.source and state.source != str(ctx.obs):
        raise ConfigError(f"{ctx.out} follows {state.source}, not {ctx.obs}; use another --out folder")
    state.source = str(ctx.obs)
    gen = state.generation + 1
    chunks, marks, restarts = src.poll(ctx.obs, state.marks)
    state.counts["restarts"] += restarts
    state.counts["polls"] += 1
    progress("reading new lines")
    frames, sources, rejected = _ingest(ctx, state, chunks, store)
    retained = pd.read_parquet(store.file(state.obs)) if state.obs else _empty_obs()
    obs, conflicts, n_new = _merge(state, retained, frames, sources)
    rejected += conflicts
    state.marks = marks
    if n_new:
        seen = obs.groupby("station_id", observed=True)["time"].max()
        for sid, t in seen.items():
            state.last_seen[str(sid)] = iso_utc(t)
    if rejected:
        old = pd.read_parquet(store.file(state.rejected)) if state.rejected else None
        allrej = pd.concat(([old] if old is not None else []) + rejected, ignore_index=True)
        state.rejected = store.name("rejected", gen, "parquet")
        allrej.astype({"file": str, "reason": str}).to_parquet(store.file(state.rejected), index=False)
    result = advance(ctx, state, store, obs, gen, n_new, progress)
    result.cpu_s = _time.process_time() - cpu0
    return result


__all__ = ["Follow", "StepResult", "follow_step"]
