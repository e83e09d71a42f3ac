"""now.html: the page an officer keeps open through the night (budget --follow).

Self-contained (inline style and SVG sparklines, no script, nothing fetched)
and reloading itself.  Per cluster: the newest value, the change and its
advected and in-situ parts with errors, the regime, the lowest value so far,
the last hours as sparklines, the stations QC doubts, and when the critical
value is reached if the present in-situ rate goes on.  Times are in the
data's local zone (UTC beside them); values in the unit of the input
(degF exports are shown in degF, other temperatures in degC).  Everything
taken from input files is escaped.
"""

from __future__ import annotations

import html
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .atomic import atomic_write
from .html import CSS, cautions
from .text import display_zone, show_time

#: the alerts the page lists (the newest first; all are in alerts.jsonl)
RECENT_ALERTS = 12


@dataclass(frozen=True)
class Display:
    """How values of the budgeted variable are shown: ``shown = value * scale + offset``, rates ``* scale``."""

    scale: float
    offset: float
    unit: str
    rate_unit: str

    @classmethod
    def of(cls, variable: str, unit: str, input_unit: str | None) -> "Display":
        if unit == "K":
            if input_unit in ("degF", "°F", "deg F", "F"):
                return cls(1.8, -459.67, "°F", "°F/h")
            return cls(1.0, -273.15, "°C", "°C/h")
        return cls(1.0, 0.0, unit, f"{unit}/h")

    def value(self, x: float) -> str:
        return "–" if not np.isfinite(x) else f"{x * self.scale + self.offset:.1f}"

    def rate(self, x: float, se: float | None = None) -> str:
        if not np.isfinite(x):
            return "–"
        s = f"{x * self.scale:+.2f}"
        if se is not None and np.isfinite(se):
            s += f" ± {se * self.scale:.2f}"
        return s

    def spread(self, se: float) -> str:
        return "" if not np.isfinite(se) else f" ± {se * self.scale:.2f}"


def _esc(x) -> str:
    return html.escape(str(x))


def _sparkline(values: np.ndarray, critical: float, disp: Display, width: int = 160, height: int = 36) -> str:
    """An inline SVG of ``values`` (the last hours), with the critical value as a dashed line when in range."""
    v = np.asarray(values, float) * disp.scale + disp.offset
    ok = np.isfinite(v)
    if ok.sum() < 2:
        return ""
    crit = critical * disp.scale + disp.offset if np.isfinite(critical) else np.nan
    lo0, hi0 = float(np.min(values[ok])), float(np.max(values[ok]))
    lo, hi = lo0 * disp.scale + disp.offset, hi0 * disp.scale + disp.offset
    if np.isfinite(crit) and crit >= lo - 0.5 * (hi - lo + 1):
        lo, hi = min(lo, crit), max(hi, crit)
    span = hi - lo if hi > lo else 1.0
    xs = np.linspace(2, width - 2, v.size)[ok]
    ys = (height - 3 - (v[ok] - lo) / span * (height - 6))
    pts = " ".join(f"{x:.1f},{y:.1f}" for x, y in zip(xs.tolist(), ys.tolist()))
    line = ""
    if np.isfinite(crit):
        yc = height - 3 - (crit - lo) / span * (height - 6)
        line = f'<line x1="0" x2="{width}" y1="{yc:.1f}" y2="{yc:.1f}" stroke="#c0392b" stroke-dasharray="3,2"/>'
    return (f'<svg width="{width}" height="{height}" role="img" aria-label="last hours, {disp.value(lo0)}'
            f' to {disp.value(hi0)} {disp.unit}">{line}'
            f'<polyline fill="none" stroke="#2f6db5" stroke-width="1.5" points="{pts}"/></svg>')


def _when(hours: float, hours_se: float, now: pd.Timestamp, zone: str | None) -> str:
    if not np.isfinite(hours):
        return "not approaching at the present in-situ rate"
    if hours <= 0:
        return "<b>reached</b>"
    at = now + pd.Timedelta(hours=float(hours))
    lo = max(0.0, hours - 2 * hours_se) if np.isfinite(hours_se) else np.nan
    hi = hours + 2 * hours_se if np.isfinite(hours_se) else np.nan
    rng = ""
    if np.isfinite(lo) and np.isfinite(hi):
        rng = (f"<br><span class='muted'>between {_clock(now + pd.Timedelta(hours=lo), zone)} and "
               f"{_clock(now + pd.Timedelta(hours=hi), zone)}</span>")
    return f"{show_time(at, zone, date=False)} (in {hours * 60:.0f} ± {hours_se * 60:.0f} min){rng}"


def _clock(t: pd.Timestamp, zone: str | None) -> str:
    """A time of day in the data's zone, short (the page says the zone once per time in full)."""
    from ..read.times import tzinfo_for

    return f"{pd.Timestamp(t).tz_convert(tzinfo_for(zone) if zone else 'UTC'):%H:%M}"


def _page(title: str, refresh: int, body: list[str]) -> str:
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            f"<meta http-equiv='refresh' content='{int(refresh)}'><title>{_esc(title)}</title>"
            f"<style>{CSS}.past{{background:#fde2e0}}.soon{{background:#fff1d6}}td{{vertical-align:top}}.num{{white-space:nowrap}}</style>"
            "</head><body>" + "".join(body) + "</body></html>\n")


def _cautions(kind: str) -> list[str]:
    return [f"<div class='caution'>{_esc(c)}</div>" for c in cautions(kind)]


def write_waiting(path, *, ctx, state, message: str) -> None:
    """The page before the settings are pinned: what it waits for."""
    from ..variables import kind_of

    var = ctx.cfg["budget"]["variable"]
    body = [f"<h1>stationflow: now ({_esc(var)})</h1>", f"<p>{_esc(message)}.</p>",
            f"<p class='muted'>Source {_esc(ctx.obs)}; rows read {state.counts['rows_read']:,}, rejected "
            f"{state.counts['rows_rejected']:,}. This page reloads itself.</p>",
            *_cautions(kind_of(var, ctx.cfg["observations"]["kinds"]))]
    with atomic_write(path) as tmp:
        tmp.write_text(_page("stationflow: now", max(30, int(ctx.every)), body), encoding="utf-8")


def write_page(path, *, ctx, state, block, latest, history, recent: list[dict]) -> None:
    """now.html after a call (see the module docstring)."""
    from ..follow.alerts import downward
    from ..variables import kind_of

    cfg = ctx.cfg
    plan = block.plan
    zone = display_zone(cfg)
    disp = Display.of(plan.variable, plan.unit, cfg["observations"]["units"].get(plan.variable))
    kind = kind_of(plan.variable, cfg["observations"]["kinds"])
    down = downward(plan.variable, cfg)
    now = latest.time
    t = block.terms
    clusters = block.clusters
    n_local = plan.n_local
    doubts = block.qc_doubts
    body = [f"<h1>stationflow: now, {_esc(plan.variable)}</h1>", *_staleness(now, zone),
            f"<p><b>{_esc(show_time(now, zone))}</b> is the newest analysis time. Final rows up to "
            f"{_esc(show_time(state.final_through, zone) if state.final_through else 'none yet')}; newer rows are "
            "provisional and the newest are one-sided (the last complete window, with its drift in the errors).</p>"]
    if block.learning:
        body.append(f"<div class='caution'><b>Settings not pinned yet</b> ({_esc(block.learning)}): every row is "
                    "provisional, with the reading noise, window and network learned from the data so far.</div>")
    body += _cautions(kind)
    body += _alerts_section(recent, state.alert_count, zone)
    body.append("<h2>Clusters</h2>")
    critical_note = ("Critical value: follow.critical" + (
        " is not set, so the freezing point is used: set the critical temperature of your crop and bud stage"
        if cfg["follow"]["critical"] in ({}, "") and kind == "temperature" else "")
        + ". <b>Reaches it</b>: if the present in-situ rate goes on "
                     "(the assumption: advection is shown beside it and left out, since it stops or starts with the "
                     "wind), with ± one standard error and the two-standard-error range; the error includes the "
                     "rate's own drift over the last window.")
    body.append(f"<p class='muted'>{critical_note} Rates in {disp.rate_unit}; change = carried in + in situ.</p>")
    order = _order(latest, n_local, down)
    rows = ["<tr><th>cluster</th><th>now</th><th>lowest so far</th><th>change</th><th>carried in</th><th>in situ</th>"
            "<th>regime</th><th>critical</th><th>reaches it</th><th>last hours</th><th>QC doubts</th></tr>"]
    names = clusters["cluster"].astype(str).tolist()
    members = clusters["stations"].astype(str).tolist()
    doubted = set(doubts["station_id"].astype(str)) if len(doubts) else set()
    shown: dict = {}

    def when_shown(t) -> str:  # many clusters share the time of their minimum
        if t not in shown:
            shown[t] = f"at {_clock(pd.Timestamp(t), zone)}"
        return shown[t]

    for j in order:
        rows.append(_cluster_row(j, names, members, t, latest, state, history, disp, zone, doubted, when_shown))
    body.append("<table>" + "".join(rows) + "</table>")
    if len(clusters) > n_local:
        j = n_local
        body.append("<h2>Network scale</h2><p>One plane through every station: "
                    f"change {disp.rate(latest.tendency[j], t['tendency_se'][-1, j])}, carried in "
                    f"{disp.rate(latest.advection[j], t['advection_se'][-1, j])}, in situ "
                    f"{disp.rate(latest.residual[j], latest.residual_se[j])} {disp.rate_unit} "
                    f"({_esc(latest.regime[j])}).</p>")
    body += _doubts_section(doubts, zone)
    c = state.counts
    body.append(f"<p class='muted'>Source {_esc(ctx.obs)}: rows read {c['rows_read']:,}, rejected "
                f"{c['rows_rejected']:,} (rejected_rows.csv), repeats dropped {c['duplicates']:,}, arrived after their "
                f"time was final {c['late_after_final']:,}, files restarted (rotated or truncated) {c['restarts']:,}. "
                + ("Settings pinned for the night in settings.toml. " if state.pinned else "")
                + "This page reloads itself.</p>")
    with atomic_write(path) as tmp:
        tmp.write_text(_page(f"now: {plan.variable}", max(30, int(ctx.every)), body), encoding="utf-8")


#: data older than this, against the computer's clock, are called stale on the page (when they look live)
STALE = pd.Timedelta("15min")


def _staleness(newest: pd.Timestamp, zone) -> list[str]:
    """When the page was written (the computer's clock) and, for live data, a warning when they stopped coming."""
    written = pd.Timestamp.now(tz="UTC")
    lines = [f"<p class='muted'>Page written {_esc(show_time(written, zone))} by the computer's clock; if that is "
             "long ago, the follow run has stopped.</p>"]
    behind = written - newest
    if STALE < behind < pd.Timedelta("2D"):  # live data that stopped (a replay of old data is days behind)
        lines.append(f"<div class='caution'><b>No new data for {behind.total_seconds() / 60:.0f} minutes.</b> Check "
                     "the loggers and the export before relying on this page.</div>")
    return lines


def _order(latest, n_local: int, down: bool) -> list[int]:
    """Local clusters, the soonest crossing first, then the coldest (or highest concentration)."""
    hrs = np.where(np.isfinite(latest.hours[:n_local]), latest.hours[:n_local], np.inf)
    val = latest.value[:n_local] if down else -latest.value[:n_local]
    val = np.where(np.isfinite(val), val, np.inf)
    return list(np.lexsort((val, hrs)))


def _cluster_row(j, names, members, t, latest, state, history, disp: Display, zone, doubted_by_station, when_shown
                 ) -> str:
    name = names[j]
    minimum = state.minimum.get(name)
    low = (f"{disp.value(minimum[0])} <span class='muted'>{_esc(when_shown(minimum[1]))}</span>"
           if minimum else "–")
    hrs = latest.hours[j]
    cls = "past" if np.isfinite(hrs) and hrs <= 0 else ("soon" if np.isfinite(hrs) and hrs < 1.0 else "")
    spark = _sparkline(history.columns["value"][:, j], latest.critical[j], disp) if "value" in history.columns else ""
    doubted = sorted({s for s in members[j].split("+") if s in doubted_by_station})
    crit = disp.value(latest.critical[j]) if np.isfinite(latest.critical[j]) else "–"
    reg = latest.regime[j]
    return (f"<tr class='{cls}'><td><b>{_esc(name)}</b><br><span class='muted'>{_esc(members[j])}</span></td>"
            f"<td class='num'>{disp.value(latest.value[j])}{disp.spread(latest.value_se[j])} {disp.unit}</td><td>{low}</td>"
            f"<td class='num'>{disp.rate(latest.tendency[j], t['tendency_se'][-1, j])}</td>"
            f"<td class='num'>{disp.rate(latest.advection[j], t['advection_se'][-1, j])}</td>"
            f"<td class='num'>{disp.rate(latest.residual[j], latest.residual_se[j])}</td>"
            f"<td class='reg-{_esc(reg)}'>{_esc(reg)}</td><td>{crit}</td>"
            f"<td>{_when(hrs, latest.hours_se[j], latest.time, zone) if np.isfinite(latest.critical[j]) else '–'}</td>"
            f"<td>{spark}</td><td>{_esc(', '.join(doubted))}</td></tr>")


def _alerts_section(recent: list[dict], total: int, zone) -> list[str]:
    if not recent:
        return ["<h2>Alerts</h2><p>None so far (alerts.jsonl).</p>"]
    items = []
    for a in reversed(recent):
        items.append(f"<li><b>{_esc(show_time(a['time'], zone, date=False))}</b> {_esc(a['rule'])}: "
                     f"{_esc(a['message'])}</li>")
    more = total - len(recent)
    tail = f"<p class='muted'>{more} earlier alerts in alerts.jsonl.</p>" if more > 0 else ""
    return [f"<h2>Alerts</h2><ul>{''.join(items)}</ul>{tail}"]


def _doubts_section(doubts: pd.DataFrame, zone) -> list[str]:
    if doubts is None or doubts.empty:
        return ["<h2>Stations QC doubts now</h2><p>None: every newest value passed.</p>"]
    rows = ["<tr><th>station</th><th>variable</th><th>flag</th><th>tests</th><th>time</th></tr>"]
    for r in doubts.itertuples():
        rows.append(f"<tr><td>{_esc(r.station_id)}</td><td>{_esc(r.variable)}</td><td>{_esc(r.flag)}</td>"
                    f"<td>{_esc(r.tests)}</td><td>{_esc(show_time(r.time, zone, date=False))}</td></tr>")
    return ["<h2>Stations QC doubts now</h2><table>" + "".join(rows) + "</table>"]
