"""PNG figures: QC overview, network map, budget over time.

matplotlib is imported inside the functions (Agg backend), so importing
stationflow stays fast.  Each figure is prepared (``*_image``, ``*_panels``,
``map_layers``: small arrays, from the pandas objects of a run) and drawn
(``draw_*``) separately: the drawing runs in the figure worker process
(:mod:`stationflow.report.painter`), which then needs neither the data nor
pandas (0.3 s of start-up there).
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .atomic import write_with

if TYPE_CHECKING:
    import pandas as pd

REGIME_COLOURS = {
    "advective": "#2f6db5",
    "in_situ": "#d4622a",
    "mixed": "#8b68b5",
    "steady": "#b9b9b9",
    "undetermined": "#efefef",
}
STATUS_COLOURS = {"ok": "#3a8f5c", "rejected": "#c9503c"}
FLAG_COLOURS = ["#d8e8d0", "#f2b33d", "#c62f2f", "#ffffff"]  # good, suspect, bad, missing


def pyplot():
    """matplotlib.pyplot on the Agg backend (files only, no display)."""
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


def _save(fig, path: str | Path, *, tight: bool = True) -> Path:
    """Write the figure atomically; ``tight`` crops to the drawn extent (needed for legends outside the axes;
    it costs a second draw)."""
    plt = pyplot()

    def writer(tmp: Path) -> None:
        # zlib level 3 instead of 6: a third less encoding time for 5 % more bytes
        fig.savefig(tmp, format="png", dpi=110, bbox_inches="tight" if tight else None, pil_kwargs={"compress_level": 3})

    try:
        return write_with(path, writer)
    finally:
        plt.close(fig)


def qc_overview_image(observations: pd.DataFrame, flags: dict[str, np.ndarray], *, max_bins: int = 400,
                      tz: str | None = None) -> dict:
    """What :func:`draw_qc_overview` draws: the worst flag per station and time bin (small arrays); times in ``tz``."""
    worst = np.full(len(observations), 3, np.int8)
    for f in flags.values():
        present = f != 3
        worst = np.where(present & ((worst == 3) | (f > worst)), f, worst)
    import pandas as pd

    codes, uniq = pd.factorize(observations["station_id"])
    names = np.array([str(u) for u in uniq], dtype=object)
    by_id = np.argsort(names, kind="stable")  # stations sorted by id
    rank = np.empty(len(names), np.int64)
    rank[by_id] = np.arange(len(names))
    codes = rank[codes]
    stations = names[by_id].tolist()
    t = observations["time"].to_numpy("datetime64[ns]").astype(np.int64)
    t0, t1 = (int(t.min()), int(t.max())) if len(t) else (0, 0)
    per_station = np.bincount(codes, minlength=len(stations)) if len(stations) else np.zeros(1, int)
    nb = int(min(max_bins, max(1, per_station.max())))
    span = max((t1 - t0) / 1e9, 1.0)
    b = np.minimum(((t - t0) / 1e9 / span * nb).astype(int), nb - 1)
    img = np.full((len(stations), nb), -1, np.int8)
    # worst flag per cell, missing only where nothing was present
    order = np.argsort(np.where(worst == 3, -1, worst), kind="stable")
    img[codes[order], b[order]] = np.where(worst[order] == 3, 3, worst[order])
    img = np.where(img < 0, 3, img)
    start = pd.Timestamp(t0, tz="UTC")
    if tz:
        from ..read.times import tzinfo_for

        start = start.tz_convert(tzinfo_for(tz))
    labels = [(start + pd.Timedelta(seconds=span * k / nb)).strftime("%m-%d %H:%M") for k in np.linspace(0, nb, 6)]
    return {"img": img, "stations": stations, "tick_labels": labels, "bins": nb,
            "axis": f"local time ({tz})" if tz else "time (UTC)"}


def draw_qc_overview(image: dict, path: str | Path) -> Path:
    """Draw the QC overview from :func:`qc_overview_image` (runs in the figure process)."""
    plt = pyplot()
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    img, stations, nb = image["img"], image["stations"], image["bins"]
    fig, ax = plt.subplots(figsize=(10, min(14.0, max(2.5, 0.22 * len(stations) + 1.2))))
    ax.imshow(img, aspect="auto", interpolation="nearest", cmap=ListedColormap(FLAG_COLOURS), vmin=0, vmax=3,
              extent=(0, nb, len(stations) - 0.5, -0.5))
    if len(stations) <= 60:
        ax.set_yticks(range(len(stations)))
        ax.set_yticklabels(stations, fontsize=7)
    else:
        ax.set_ylabel(f"{len(stations)} stations (sorted by id)")
    ax.set_xticks(np.linspace(0, nb, len(image["tick_labels"])))
    ax.set_xticklabels(image["tick_labels"], fontsize=7)
    ax.set_xlabel(image.get("axis", "time (UTC)"))
    ax.set_title("Quality control: worst flag per station and time", y=1.0)
    ax.legend(handles=[Patch(facecolor=c, edgecolor="#999999", label=n) for c, n in zip(FLAG_COLOURS, ["good", "suspect", "bad", "missing"])],
              loc="upper left", bbox_to_anchor=(1.01, 1), fontsize=8, frameon=False)
    return _save(fig, path)


def qc_overview(observations: pd.DataFrame, flags: dict[str, np.ndarray], path: str | Path, *, max_bins: int = 400) -> Path:
    """Stations by time, coloured by the worst flag of any variable in each time bin."""
    return draw_qc_overview(qc_overview_image(observations, flags, max_bins=max_bins), path)


def map_layers(network, *, bad_stations: list[str] | None = None) -> dict:
    """What :func:`draw_map` draws of ``network``: station and cluster geometry on the grid [km] (small arrays)."""
    st, cl = network.stations, network.clusters
    x, y = st["x"].to_numpy(float) / 1000, st["y"].to_numpy(float) / 1000
    polys = []
    for m in network.members:  # one polygon per cluster, its corners in order around the centre
        pts = np.column_stack([x[m], y[m]])
        if len(m) > 3:
            c = pts.mean(axis=0)
            pts = pts[np.argsort(np.arctan2(pts[:, 1] - c[1], pts[:, 0] - c[0]))]
        polys.append(pts)
    return {"x": x, "y": y, "station_id": [str(v) for v in st["station_id"]],
            "surface": (st["role"] == "surface").to_numpy(bool), "polygons": polys,
            "cluster": [str(v) for v in cl["cluster"]], "ok": (cl["status"] == "ok").to_numpy(bool),
            "centroid_x": cl["centroid_x"].to_numpy(float) / 1000, "centroid_y": cl["centroid_y"].to_numpy(float) / 1000,
            "bad": st["station_id"].astype(str).isin(bad_stations or []).to_numpy(bool)}


def network_map(network, path: str | Path, *, colour_by: dict[str, str] | None = None, arrows: dict | None = None,
                title: str = "Network and clusters", bad_stations: list[str] | None = None) -> Path:
    """Stations and clusters on the local grid [km].

    ``colour_by`` maps cluster id -> regime (budget map); without it clusters
    are coloured by status (usable or rejected).  ``arrows`` may hold
    per-cluster ``u``, ``v`` [m s-1] and ``gx``, ``gy`` (gradient, any unit)
    drawn at the cluster centroids.
    """
    return draw_map(map_layers(network, bad_stations=bad_stations), path, colour_by=colour_by, arrows=arrows, title=title)


def draw_map(layers: dict, path: str | Path, *, colour_by: dict[str, str] | None = None, arrows: dict | None = None,
             title: str = "Network and clusters") -> Path:
    """Draw the map from :func:`map_layers` (runs in the figure process); arguments as :func:`network_map`."""
    plt = pyplot()
    from matplotlib.collections import PolyCollection
    from matplotlib.colors import to_rgba
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    x, y, ok, names = layers["x"], layers["y"], layers["ok"], layers["cluster"]
    fig, ax = plt.subplots(figsize=(7.5, 6.5))
    faces, alphas, styles = [], [], []
    for i in range(len(names)):
        if colour_by is not None:
            faces.append(REGIME_COLOURS.get(colour_by.get(names[i]), "#ffffff") if ok[i] else "#ffffff")
            alphas.append(0.75 if ok[i] else 0.3)
        else:
            faces.append(STATUS_COLOURS["ok" if ok[i] else "rejected"])
            alphas.append(0.35 if ok[i] else 0.2)
        styles.append("-" if ok[i] else ":")
    polys = layers["polygons"]
    coll = PolyCollection(polys, facecolors=[to_rgba(f, a) for f, a in zip(faces, alphas)], edgecolors="#555555",
                          linewidths=0.8 if len(polys) < 300 else 0.2, linestyles=styles)
    ax.add_collection(coll)
    labelled = thin_labels(layers["centroid_x"][ok], layers["centroid_y"][ok], _extent(x, y) / 25)
    for i in np.flatnonzero(ok)[labelled]:  # below the centroid, where the arrows start
        ax.annotate(names[i], (layers["centroid_x"][i], layers["centroid_y"][i]), xytext=(0, -5),
                    textcoords="offset points", fontsize=6.5, ha="center", va="top", color="#222222", zorder=4)
    surface = layers["surface"]
    bad = np.asarray(layers.get("bad", np.zeros(len(x), bool)), bool)
    ax.scatter(x[surface & ~bad], y[surface & ~bad], s=18 if len(x) < 300 else 2, color="#111111", zorder=3)
    ax.scatter(x[~surface], y[~surface], s=50, facecolor="none", edgecolor="#111111", zorder=3)
    if bad.any():
        ax.scatter(x[bad], y[bad], s=40, marker="x", color="#c62f2f", linewidths=1.5, zorder=5)
    ids = np.asarray(layers["station_id"], dtype=object)
    keep = np.flatnonzero(surface)[thin_labels(x[surface], y[surface], _extent(x, y) / 18)]
    for i in keep:
        ax.annotate(ids[i], (x[i], y[i]), xytext=(3, 3), textcoords="offset points", fontsize=6.5, color="#333333",
                    zorder=4)
    handles = []
    if arrows:
        where = {c: i for i, c in enumerate(names)}
        got = [c for c in arrows.get("cluster", []) if c in where]
        if got:
            at = np.array([where[c] for c in got])
            px, py = layers["centroid_x"][at], layers["centroid_y"][at]
            q = ax.quiver(px, py, arrows["u"], arrows["v"], color="#1b3a6b", scale_units="inches", scale=8,
                          width=0.004, zorder=6)
            ax.quiverkey(q, 0.84, -0.09, 5.0, "wind 5 m/s", labelpos="E", coordinates="axes", fontproperties={"size": 7})
            g = np.hypot(arrows["gx"], arrows["gy"])
            gmax = np.nanmax(g) if np.isfinite(g).any() and np.nanmax(g) > 0 else 1.0
            ax.quiver(px, py, arrows["gx"] / gmax, arrows["gy"] / gmax, color="#b02a1e", scale_units="inches",
                      scale=3, width=0.003, zorder=6)
            handles += [Line2D([], [], color="#1b3a6b", lw=1.5, label="mean wind (key below)"),
                        Line2D([], [], color="#b02a1e", lw=1.2,
                               label="gradient toward higher values\n(length relative to the largest)")]
    ax.set_aspect("equal")
    ax.autoscale_view()
    ax.set_xlabel("x (km, grid east)")
    ax.set_ylabel("y (km, grid north)")
    ax.set_title(title, y=1.0)
    if colour_by is not None:
        handles = [Patch(color=c, label=k.replace("_", " ")) for k, c in REGIME_COLOURS.items()] + handles
        note = "colour: each cluster's commonest\nregime over the record"
    else:
        handles = [Patch(color=c, alpha=0.5, label=k) for k, c in STATUS_COLOURS.items()] + handles
        note = "colour: usable or rejected"
    handles += [Patch(facecolor="white", edgecolor="#555555", linestyle=":", label="rejected cluster (clusters.csv)"),
                Line2D([], [], marker="o", ls="", color="#111111", markersize=4, label="station"),
                Line2D([], [], marker="o", ls="", markerfacecolor="none", markeredgecolor="#111111", markersize=7,
                       label="upper mast sensor")]
    if bad.any():
        handles.append(Line2D([], [], marker="x", ls="", color="#c62f2f", markersize=6,
                              label="station QC left out\nfor most of the record"))
    if len(keep) < int(surface.sum()):
        note += f"\n{int(surface.sum()) - len(keep)} station labels left out\nwhere they would overlap"
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1), fontsize=7, frameon=False, title=note,
              title_fontsize=7)
    return _save(fig, path)


def _extent(x: np.ndarray, y: np.ndarray) -> float:
    """The larger side of the points' bounding box (1 when there is none)."""
    if len(x) == 0:
        return 1.0
    return float(max(np.ptp(x), np.ptp(y), 1e-9))


def thin_labels(x: np.ndarray, y: np.ndarray, min_distance: float) -> np.ndarray:
    """Indices of points to label so that no two labels are closer than ``min_distance`` (greedy, in order).

    Runs once per figure over the stations or clusters (not a hot path);
    a k-d tree finds each point's neighbours.
    """
    from scipy.spatial import cKDTree

    n = len(x)
    if n == 0:
        return np.zeros(0, int)
    tree = cKDTree(np.column_stack([x, y]))
    taken = np.zeros(n, bool)
    blocked = np.zeros(n, bool)
    for i in range(n):  # greedy over the points of one figure
        if blocked[i]:
            continue
        taken[i] = True
        blocked[tree.query_ball_point([x[i], y[i]], min_distance)] = True
    return np.flatnonzero(taken)


def _shade_regimes(ax, times: np.ndarray, regimes: np.ndarray, *, alpha: float = 0.14) -> None:
    """Shade the background by regime: one image strip (fast for long records, unlike one polygon per run)."""
    from matplotlib import dates as mdates
    from matplotlib.colors import to_rgba

    if len(times) == 0:
        return
    x = mdates.date2num(np.asarray(times))
    rgba = np.zeros((1, len(x), 4))
    for r in ("advective", "in_situ", "mixed"):
        rgba[0, regimes == r] = to_rgba(REGIME_COLOURS[r], alpha)
    half = (x[1] - x[0]) / 2 if len(x) > 1 else 0.01
    ylim = ax.get_ylim()
    ax.imshow(rgba, aspect="auto", interpolation="nearest", extent=(x[0] - half, x[-1] + half, 0, 1),
              transform=ax.get_xaxis_transform(), zorder=0)
    ax.set_ylim(ylim)  # the strip spans the axes height; the data keep their own limits
    ax.set_xlim(x[0] - half, x[-1] + half)


def timeseries_panels(summary, *, clusters: list[int] | None = None, max_panels: int = 8,
                      tz: str | None = None) -> list[dict]:
    """What :func:`draw_timeseries` draws: per cluster panel, the (block-mean) series and regimes."""
    import warnings

    import pandas as pd

    from ..read.times import tzinfo_for

    if clusters is None:
        clusters = summary.busiest(max_panels)
    names = ("tendency", "advection", "residual")
    zone = tzinfo_for(tz) if tz else "UTC"
    panels = []
    for c in clusters:
        d = summary.series(c)
        tt = pd.DatetimeIndex(d["time"]).tz_convert(zone).tz_localize(None)
        cols = {k: d[k].to_numpy(float) for k in names + tuple(f"{k}_se" for k in names)}
        reg = d["regime"].astype(str).to_numpy()
        if len(d) > 900:  # long records: block means keep the figure legible and fast
            k = int(np.ceil(len(d) / 600))  # about one block per two pixels
            m = len(d) // k * k
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                cols = {name: np.nanmean(v[:m].reshape(-1, k), axis=1) for name, v in cols.items()}
            tt = tt[:m:k]
            reg = reg[k // 2:m:k]  # the regime in the middle of each block
        panels.append({"time": tt.to_numpy("datetime64[ns]"), "columns": cols, "regime": reg,
                       "label": summary.clusters["cluster"].iloc[c], "stations": summary.clusters["stations"].iloc[c]})
    return panels


def draw_timeseries(panels: list[dict], path: str | Path, *, unit: str, tz: str | None = None) -> Path:
    """Draw the budget figure from :func:`timeseries_panels` (runs in the figure process)."""
    plt = pyplot()
    from matplotlib.patches import Patch
    from matplotlib.ticker import MaxNLocator

    n = len(panels)
    height = 1.9 * n + 0.8
    fig, axes = plt.subplots(n, 1, figsize=(10, height), sharex=True, squeeze=False)
    # fixed margins in inches instead of tight_layout (which lays the figure out twice)
    fig.subplots_adjust(left=0.085, right=0.985, top=1 - 0.62 / height, bottom=0.85 / height, hspace=0.38)
    for ax, p in zip(axes[:, 0], panels):
        tt, cols, reg = p["time"], p["columns"], p["regime"]
        for name, colour in (("tendency", "#222222"), ("advection", REGIME_COLOURS["advective"]),
                             ("residual", REGIME_COLOURS["in_situ"])):
            val, se = cols[name], cols[f"{name}_se"]
            ax.plot(tt, val, color=colour, lw=1.3, label=name if name != "residual" else "residual (in situ)")
            ax.fill_between(tt, val - 1.96 * se, val + 1.96 * se, color=colour, alpha=0.15, lw=0)
        _shade_regimes(ax, tt, reg)
        ax.axhline(0, color="#888888", lw=0.6)
        ax.tick_params(labelsize=7)
        ax.set_ylabel(f"{p['label']}\n{unit}/h", fontsize=8)
        # a fixed title position (no layout search) and a few y ticks: each tick is a costly artist
        ax.set_title(f"cluster {p['label']}  ({p['stations']})", fontsize=8, loc="left", y=1.0)
        ax.yaxis.set_major_locator(MaxNLocator(nbins=4))
    lines = axes[0, 0].legend(loc="upper right", fontsize=7, ncol=3, frameon=False)
    if n == 1:
        axes[0, 0].add_artist(lines)  # one panel: the regime legend below would replace this one
    handles = [Patch(color=REGIME_COLOURS[r], alpha=0.4, label=r.replace("_", " ")) for r in ("advective", "in_situ", "mixed")]
    axes[-1, 0].legend(handles=handles, loc="lower right", fontsize=7, ncol=3, frameon=False, title="regime (shading)",
                       title_fontsize=7)
    axes[-1, 0].set_xlabel(f"local time ({tz})" if tz else "time (UTC)")
    fig.suptitle("Budget per cluster: tendency = advection + residual (bands: 95 %)", fontsize=10,
                 y=1 - 0.2 / height)
    for label in axes[-1, 0].get_xticklabels():  # as autofmt_xdate, without its layout pass
        label.set_rotation(30)
        label.set_horizontalalignment("right")
    return _save(fig, path, tight=False)  # the legends are inside the axes: no cropping draw needed


def budget_timeseries(summary, path: str | Path, *, unit: str, clusters: list[int] | None = None,
                      max_panels: int = 8, tz: str | None = None) -> Path:
    """Tendency, advection and residual with 95 % bands per cluster, regimes shaded.

    ``summary`` is a :class:`stationflow.report.summary.BudgetSummary`; ``clusters``
    are indices into its clusters (default: those with the most determined steps).
    """
    return draw_timeseries(timeseries_panels(summary, clusters=clusters, max_panels=max_panels, tz=tz), path,
                           unit=unit, tz=tz)
