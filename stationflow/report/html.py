"""The self-contained HTML report (figures embedded as base64 PNG).

Everything taken from input files (station ids, file names, reasons) is
escaped with :func:`html.escape`.
"""

from __future__ import annotations

import base64
import html
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .atomic import atomic_write

#: the caution every report opens with
DECISION_AID = ("This report is a decision aid, not an alarm system or a forecast. Keep independent low-temperature "
                "and air-quality alarms, and follow local codes, your extension service and licensed professional "
                "practice; they prevail over anything shown here.")
#: cautions by the kind of variable budgeted (a frost report gets no PM cautions and the other way round)
CAUTIONS_BY_KIND = {
    "temperature": [
        "Frost: critical bud temperatures are averages for a 30-minute exposure, not guarantees; act on the "
        "10 % kill values with a margin. Screen-height air can differ from bud temperature by 1-2 degC on clear calm "
        "nights.",
        "Frost: wind machines help only with an inversion (warmer air aloft) and light wind; in advective frost "
        "they mix in no warm air. Sprinklers, once started, must run until all ice has melted. Orchard heaters carry "
        "fire and air-quality risks and are regulated in many places.",
    ],
    "concentration": [
        "Air quality: low-cost PM2.5 sensors need calibration against reference monitors; differences in sensor gain "
        "look like gradients and can fake advection. Public health messages belong to the responsible agency.",
        "An in-situ rise can be a local source or a shallowing boundary layer concentrating what is there; read it "
        "with the time of day before looking for a source.",
    ],
    "other": [],
}
GENERAL = ("The plane model is weakest on calm nights with cold pools and when clusters are larger than the feature; "
           "'steady' means the change was too small to tell from zero, not that nothing happened.")


def cautions(kind: str) -> list[str]:
    """The cautions of a report on a variable of ``kind`` (temperature, concentration or other)."""
    return [DECISION_AID, *CAUTIONS_BY_KIND.get(kind, []), GENERAL]


#: every caution, for the documentation
CAUTIONS = [DECISION_AID, *CAUTIONS_BY_KIND["temperature"], *CAUTIONS_BY_KIND["concentration"], GENERAL]


CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Roboto,sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#1d1d1d;line-height:1.45}
h1{font-size:1.6em;margin-bottom:.2em}h2{font-size:1.2em;margin-top:1.8em;border-bottom:1px solid #ddd;padding-bottom:.2em}
table{border-collapse:collapse;font-size:.88em;margin:.6em 0}td,th{border:1px solid #ddd;padding:.25em .5em;text-align:left}
th{background:#f4f4f4}.caution{background:#fff6e5;border-left:4px solid #e0a030;padding:.6em 1em;margin:.5em 0}
.muted{color:#666;font-size:.9em}img{max-width:100%;border:1px solid #eee;margin:.5em 0}
.reg-advective{color:#2f6db5;font-weight:600}.reg-in_situ{color:#d4622a;font-weight:600}.reg-mixed{color:#8b68b5;font-weight:600}
code{background:#f4f4f4;padding:0 .2em}
"""


def _img(path: Path) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    return f'<img alt="{html.escape(Path(path).stem)}" src="data:image/png;base64,{data}">'


def _table(frame: pd.DataFrame, *, max_rows: int = 60) -> str:
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in frame.columns)
    rows = []
    for rec in frame.head(max_rows).itertuples(index=False):
        cells = []
        for v in rec:
            if isinstance(v, float):
                s = "" if not np.isfinite(v) else f"{v:.3g}"
            else:
                s = str(v)
            cells.append(f"<td>{html.escape(s)}</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    more = f'<p class="muted">{len(frame) - max_rows} more rows in the CSV files.</p>' if len(frame) > max_rows else ""
    return f"<table><tr>{head}</tr>{''.join(rows)}</table>{more}"


@dataclass
class Page:
    """The pieces of report.html, computed before it is written (all text is escaped when written)."""

    title: str
    summary: list[tuple[str, str]]
    periods: list[str]
    quality: list[str]
    cluster_table: pd.DataFrame
    method: list[str]
    columns: list[tuple[str, str, str]]  # (name, unit, meaning) of the budget table's columns
    kind: str = "other"  # temperature, concentration or other: which cautions
    scales: list[str] = field(default_factory=list)  # the regional scale, then each main period at both scales
    sensors: list[str] = field(default_factory=list)  # sensors whose bias would fake advection, worst first


def write_report(path: str | Path, page: Page, figures: list[tuple[str, Path]], files: list[str]) -> Path:
    """Write report.html from ``page``, the finished ``figures`` (caption, PNG) and the list of ``files``."""
    esc = html.escape
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{esc(page.title)}</title>"
             f"<style>{CSS}</style></head><body>", f"<h1>{esc(page.title)}</h1>"]
    parts.append('<div class="caution"><strong>Decision aid only.</strong> ' + esc(DECISION_AID) + "</div>")
    parts.append("<h2>What was computed</h2><table>" +
                 "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in page.summary) + "</table>")
    parts.append("<h2>Main periods</h2>")
    if page.periods:
        items = []
        for line in page.periods:
            cls = "advective" if " advective " in line else "in_situ" if " in-situ " in line else "mixed"
            items.append(f'<li class="reg-{cls}">{esc(line)}</li>')
        parts.append("<ul>" + "".join(items) + "</ul>")
        parts.append('<p class="muted">A period is a run of at least three analysis steps with the same regime. '
                     "The rate given is the dominant term (advection for advective periods, the in-situ residual for "
                     "in-situ periods) with its mean standard error; mixed periods give both terms.</p>")
    else:
        parts.append("<p>No period of three or more steps had a clear regime.</p>")
    if page.scales:
        parts.append("<h2>Transport at two scales</h2><p>" + esc(page.scales[0]) + "</p>")
        if page.scales[1:]:
            parts.append('<p class="muted">For each main period: was the change carried in by the wind across the '
                         "whole network (regional), within the cluster (local), both or neither? A scale counts when its "
                         "mean advection exceeds twice its standard error and the smallest rate that counts.</p><ul>"
                         + "".join(f"<li>{esc(x)}</li>" for x in page.scales[1:]) + "</ul>")
    if page.sensors:
        parts.append("<h2>Sensors that disagree with their neighbours</h2><ul>"
                     + "".join(f"<li>{esc(x)}</li>" for x in page.sensors) + "</ul>")
    parts.append("<h2>How good is it</h2><ul>" + "".join(f"<li>{esc(q)}</li>" for q in page.quality) + "</ul>")
    parts.append("<h2>Clusters</h2>" + _table(page.cluster_table))
    parts.append("<h2>Figures</h2>")
    for caption, fig in figures:
        parts.append(f"<h3>{esc(caption)}</h3>{_img(fig)}")
    parts.append("<h2>Method</h2><ul>" + "".join(f"<li>{esc(m)}</li>" for m in page.method) + "</ul>")
    parts.append("<h2>Cautions</h2>" + "".join(f'<div class="caution">{esc(c)}</div>' for c in cautions(page.kind)))
    parts.append("<h2>Files</h2><ul>" + "".join(f"<li><code>{esc(f)}</code></li>" for f in files) + "</ul>")
    if page.columns:
        parts.append("<h2>Columns of budget.csv and budget.parquet</h2><table><tr><th>column</th><th>unit</th>"
                     "<th>meaning</th></tr>" + "".join(f"<tr><td><code>{esc(n)}</code></td><td>{esc(u)}</td>"
                                                       f"<td>{esc(m)}</td></tr>" for n, u, m in page.columns)
                     + "</table>")
    parts.append('<p class="muted">Made by stationflow.</p></body></html>')
    with atomic_write(path) as tmp:
        tmp.write_text("\n".join(parts), encoding="utf-8")
    return Path(path)
