"""Write the contract's output files for ``check``, ``network`` and ``budget``."""

from __future__ import annotations

import datetime as _dt
import platform
from concurrent.futures import Future
from importlib import metadata
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..network.geometry import cluster_table
from ..network.grid import format_duration
from . import files, tables
from .html import Page
from .painter import Painter
from .text import describe_period, describe_scales, display_zone, show_time, two_scales

PACKAGES = ("numpy", "pandas", "scipy", "pyproj", "xarray", "pyarrow", "matplotlib", "statsmodels", "typer", "netCDF4")


def versions() -> dict[str, str]:
    """Versions of Python and the packages the run used."""
    out = {"python": platform.python_version(), "stationflow": __version__}
    for p in PACKAGES:
        try:
            out[p] = metadata.version(p)
        except metadata.PackageNotFoundError:
            out[p] = "not installed"
    return out


def run_record(command: str, inputs: dict, config, accounting: dict, extra: dict | None = None) -> dict:
    """The run.json content."""
    rec = {
        "stationflow_version": __version__,
        "command": command,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "inputs": {k: (str(v) if v is not None else None) for k, v in inputs.items()},
        "config": config.to_dict(),
        "config_file": config.source,
        "versions": versions(),
        "accounting": {k: int(v) for k, v in accounting.items()},
        "status": "complete",
    }
    if extra:
        rec.update(extra)
    return rec


def submit_qc_figure(painter: Painter, out: Path, chk) -> Future:
    """Start drawing qc_overview.png (the image is prepared here, drawn by ``painter``)."""
    from . import plots

    out.mkdir(parents=True, exist_ok=True)
    image = plots.qc_overview_image(chk.data.observations, chk.qc.flags, tz=display_zone(chk.config))
    return painter.submit(plots.draw_qc_overview, image, out / "qc_overview.png")


#: clusters drawn in budget_timeseries.png (the main periods' first); the caption names the others
TIMESERIES_PANELS = 8


def mostly_bad(run) -> list[str]:
    """Stations whose budgeted variable QC left out (suspect or bad) for more than half of their values (on the map)."""
    obs = run.check.data.observations
    flags = run.check.qc.flags.get(run.variable)
    if flags is None or obs.empty:
        return []
    f = np.asarray(flags)
    allowed = (1,) if run.check.config["qc"]["use_suspect"] else ()
    left_out = pd.Series(((f == 1) | (f == 2)) & ~np.isin(f, allowed)).groupby(obs["station_id"].astype(str).to_numpy())
    share = left_out.mean()
    return [str(s) for s in share.index[share.to_numpy() > 0.5]]


def timeseries_caption(run) -> str:
    """The time-series figure's caption: which clusters it draws and which usable ones it leaves out."""
    bs = run.summary
    drawn = bs.figure_clusters(TIMESERIES_PANELS, run.periods)
    names = bs.clusters["cluster"].astype(str).tolist()
    left = [names[c] for c in range(len(names)) if c not in drawn]
    text = (f"Budget over time: clusters {', '.join(names[c] for c in drawn)} (those of the main periods first, "
            "then the ones with the most determined steps)")
    if left:
        text += f"; not drawn: {', '.join(left[:40])}" + (f" and {len(left) - 40} more" if len(left) > 40 else "")
        text += " (every cluster is in budget.csv / budget.parquet)"
    return text


def submit_budget_figures(painter: Painter, out: Path, run) -> dict:
    """Start drawing budget_timeseries.png and budget_map.png from the run's summary."""
    from . import plots

    out.mkdir(parents=True, exist_ok=True)
    local = display_zone(run.check.config)
    summary = run.summary
    panels = plots.timeseries_panels(summary, clusters=summary.figure_clusters(TIMESERIES_PANELS, run.periods), tz=local)
    # one job: the worker draws the two side by side (see Painter.submit_together)
    ts, mp = painter.submit_together([
        (plots.draw_timeseries, (panels, out / "budget_timeseries.png"), {"unit": run.unit, "tz": local}),
        (plots.draw_map, (plots.map_layers(run.network, bad_stations=mostly_bad(run)), out / "budget_map.png"),
         {"colour_by": summary.dominant(), "arrows": summary.arrows(),
          "title": "Clusters by their commonest regime; mean wind and gradient"})])
    return {"timeseries": ts, "map": mp}


def write_check(out: Path, chk, *, inputs: dict, command: str = "check", figure: bool = True,
                qc_figure: Future | None = None) -> list[Path]:
    """run.json, rejected_rows.csv, qc_flags.csv, qc_summary.csv and qc_overview.png.

    ``qc_figure``: the figure already started with :func:`submit_qc_figure`.
    """
    out.mkdir(parents=True, exist_ok=True)
    if figure and qc_figure is None:
        qc_figure = submit_qc_figure(Painter(background=False), out, chk)
    written = [files.write_rejected(chk.data.rejected, out / "rejected_rows.csv"),
               files.write_qc_flags(chk.flags, out / "qc_flags.csv")]
    written.append(files.write_csv(chk.periods, out / "qc_periods.csv", time_columns=("start", "end")))
    if figure:
        written.append(qc_figure.result())
    if command == "check":  # (budget writes its own run.json)
        qc_counts = {f"{r.variable}:{r.test}": int(r.values) for r in chk.per_test.itertuples()}
        extra = {"qc": {"tests_fired": qc_counts, "flags": _flag_counts(chk)},
                 "stations": int(len(chk.data.stations)), "variables": chk.data.variables,
                 "units": chk.data.units, "ignored_columns": chk.data.ignored_columns, "reading": chk.data.reading}
        rec = run_record(command, inputs, chk.config, chk.data.accounting, extra)
        rec["outputs"] = [p.name for p in written] + ["run.json"]
        written.append(files.write_json(rec, out / "run.json"))
    return written


def write_rejected_only(out: Path, data, *, inputs: dict, command: str, config) -> list[Path]:
    """rejected_rows.csv and run.json of a run that stopped because no row could be used."""
    out.mkdir(parents=True, exist_ok=True)
    written = [files.write_rejected(data.rejected, out / "rejected_rows.csv")]
    rec = run_record(command, inputs, config, data.accounting, {"status": "failed: no usable rows",
                                                                "reading": data.reading})
    rec["outputs"] = ["rejected_rows.csv", "run.json"]
    written.append(files.write_json(rec, out / "run.json"))
    return written


def _flag_counts(chk) -> dict:
    out = {}
    for v, f in chk.qc.flags.items():
        out[v] = {name: int(np.count_nonzero(f == code))
                  for code, name in enumerate(("good", "suspect", "bad", "missing"))}
    return out


def write_network(out: Path, network, *, inputs: dict, config, accounting: dict | None = None) -> list[Path]:
    """clusters.csv, network_map.png and run.json."""
    from . import plots

    out.mkdir(parents=True, exist_ok=True)
    written = [files.write_csv(cluster_table(network), out / "clusters.csv", time_columns=(), float_format="%.6g"),
               plots.network_map(network, out / "network_map.png", title="Network: usable and rejected clusters")]
    rec = run_record("network", inputs, config, accounting or {"rows_read": 0, "rows_accepted": 0, "rows_rejected": 0},
                     {"projection": network.crs, "clusters": {"total": int(len(network.clusters)),
                                                              "usable": int(len(network.usable))}})
    rec["outputs"] = [p.name for p in written] + ["run.json"]
    written.append(files.write_json(rec, out / "run.json"))
    return written


def write_budget(out: Path, run, *, inputs: dict, csv: bool = False, report: bool = True,
                 tables_written: bool = False, qc_figure: Future | None = None,
                 figures: dict[str, Future] | None = None) -> tuple[list[Path], list[str]]:
    """Every budget output. Returns (paths, notes for the user).

    ``tables_written``: budget.parquet / budget.nc / budget.csv were already
    written partition by partition by :func:`stationflow.report.tables.budget_files`
    (the CLI path); otherwise they are written here from ``run.dataset``.
    ``qc_figure`` and ``figures``: figures already started on a
    :class:`~stationflow.report.painter.Painter` (drawn here otherwise).
    """
    out.mkdir(parents=True, exist_ok=True)
    notes: list[str] = []
    if report and not figures:
        figures = submit_budget_figures(Painter(background=False), out, run)
    written = write_check(out, run.check, inputs=inputs, command="budget", qc_figure=qc_figure)
    summary = run.summary
    if tables_written:
        with_csv = tables.csv_wanted(summary.rows, csv)
        written += [out / n for n in ["budget.parquet", "budget.nc"] + (["budget.csv"] if with_csv else [])]
        if not with_csv:
            notes.append(tables.csv_skipped(summary.rows))
    else:
        from ..run.sinks import Partition

        ds = run.dataset
        part = Partition(0, {name: ds[name].values for name in ds.data_vars})
        with tables.budget_files(out, run.layout, csv=csv, background=False) as sinks:
            for sink in sinks:
                sink.write(part)
        for sink in sinks:
            written += sink.paths
            notes += getattr(sink, "notes", [])
    written.append(files.write_csv(cluster_table(run.network), out / "clusters.csv", time_columns=()))
    if run.sensors is not None:
        written.append(files.write_csv(run.sensors, out / "sensor_offsets.csv", time_columns=()))
    lines = [describe_period(p, variable=run.quantity, timezone=display_zone(run.check.config) or "UTC")
             for p in run.periods]
    # everything the report says is prepared while the figures are still being drawn
    flags = _flag_counts(run.check)
    scales = scale_lines(run)
    pieces = _report_pieces(run, lines, inputs, flags, out, scales) if report else None
    rec = run_record("budget", inputs, run.check.config, run.check.data.accounting, {
        "variable": run.variable, "quantity": run.quantity, "unit": run.unit, "reading": run.check.data.reading,
        "interval": format_duration(run.interval), "window": format_duration(run.window),
        "sensor_uncertainty": float(np.median(np.hypot(run.settings.sigma, run.settings.offset))),
        "wind_uncertainty": run.settings.wind_sigma,
        "error_model": error_model_record(run),
        "vertical": {"setting": run.choices.get("vertical_setting"), "used": run.choices.get("vertical")},
        "window_source": run.choices.get("window_source"), "min_rate": run.settings.min_rate,
        "qc_tests_off": run.choices.get("qc_tests_off", []), "wind": run.choices.get("wind", "observed"),
        "implausible_rows": summary.implausible_rows,
        "projection": run.network.crs,
        "clusters": {"total": int(len(run.network.clusters)), "usable": int(len(run.network.usable))},
        "regimes": summary.regime_counts(),
        "main_periods": lines,
        "sensors": run.choices.get("sensors", {}),
        "humidity_correction": run.choices.get("humidity_correction") or "none",
        "regional": ({"regimes": run.regional.regime_counts(),
                      "main_periods": [describe_scales(x, unit=f"{run.unit} h-1") for x in scales]}
                     if run.regional is not None else "off"),
        "qc": {"flags": flags},
    })
    if report:
        ts, mp = figures["timeseries"].result(), figures["map"].result()
        figs = [(timeseries_caption(run), ts), ("Network map: clusters coloured by their commonest regime over the record (steady and undetermined "
                            "included); every mark is explained beside the map", mp),
                ("Quality control overview", out / "qc_overview.png")]
        written += [ts, mp]
        written.append(_report(out, pieces, figs))
    rec["outputs"] = sorted({p.name for p in written} | {"run.json"})
    written.append(files.write_json(rec, out / "run.json"))
    return written, notes


def scale_lines(run) -> list[dict]:
    """For each main period, the advection at the regional and the local scale (:func:`text.two_scales`);
    empty without the regional rows."""
    if run.regional is None:
        return []
    return [two_scales(p, run.summary, run.regional, min_rate=run.settings.min_rate) for p in run.periods]


def corrections_sentence(run) -> str:
    """What was done to the values before the fits: the humidity correction, the sensor corrections."""
    parts = []
    hum = run.choices.get("humidity_correction") or {}
    if hum:
        parts.append(f"humidity correction of the PM2.5 readings, {hum['equation']} (relative humidity from the nearest "
                     f"station for {hum['from_nearest_station']:,} readings; {hum['without_humidity']:,} readings "
                     "without humidity nearby left out)")
    cal = run.choices.get("sensors") or {}
    if cal.get("applied"):
        parts.append("each sensor's estimated offset (and gain) removed (sensors.apply; sensor_offsets.csv)")
    return "; ".join(parts) if parts else "none (values as read, after quality control)"


def sensor_lines(run, *, top: int = 10) -> list[str]:
    """The sensors ranked by the advection their bias would fake, worst first (the report's list)."""
    t = run.sensors
    if t is None or t.empty:
        return []
    cal = run.choices.get("sensors", {})
    unit = run.unit
    gains = bool((t["gain_se"] > 0).any())
    head = (f"Each sensor against what its neighbours predict ({cal.get('method', '')}). "
            f"{'Corrections were applied before the plane fits (sensors.apply).' if cal.get('applied') else 'Not applied (sensors.apply = false): the budget uses the values as read.'} "
            "Ranked: biases beyond twice their error first, then by the advection the bias would fake in the median "
            "wind; sensor_offsets.csv has every station.")
    lines = [head]
    for r in t.head(top).itertuples():  # ranked in the plan: beyond twice their error first, then by fake advection
        sig = bool(r.beyond_two_se)
        gain = f", gain {r.gain:.3f} +/- {r.gain_se:.3f}" if gains else ""
        lines.append(f"{r.station_id}: offset {r.offset:+.3g} +/- {r.offset_se:.2g} {unit}{gain} ({r.n_periods} hours); "
                     f"would fake up to {r.fake_advection:.2g} {unit}/h of advection"
                     + (" - beyond twice its error: check this sensor" if sig else " - within twice its error"))
    return lines


def regional_sentence(run) -> str:
    """What the network-scale plane says over the whole record."""
    counts = run.regional.regime_counts()
    shown = ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in counts.items() if v)
    return (f"One plane through all {run.choices['regional_stations']} stations per time (the regional "
            f"scale, cluster '{run.layout.clusters['cluster'].iloc[-1]}', scale = regional in the table): {shown} steps. "
            "Its error bars include the plane's misfit over the whole network (chi-square above one), which grows "
            "with the network's size (docs/method.md).")


def display_name(variable: str) -> str:
    """A variable's name as people write it: 'air temperature', 'PM2.5', 'PM10', or the column name with spaces."""
    import re

    m = re.fullmatch(r"(?i)(?:mass_concentration_of_)?pm_?(\d+)(?:p(\d+)|_(\d+))?.*", variable)
    if m:
        whole, frac = m.group(1), m.group(2) or m.group(3)
        if whole == "25" and not frac:  # "pm25" is how many exports spell PM2.5
            whole, frac = "2", "5"
        return f"PM{whole}" + (f".{frac}" if frac else "")
    return variable.replace("_", " ")


def variable_kind(variable: str, kinds: dict[str, str] | None = None) -> str:
    """temperature, concentration or other: which cautions a report on ``variable`` carries
    (``kinds``: ``observations.kinds``; see :func:`stationflow.variables.kind_of`)."""
    from ..variables import kind_of

    kind = kind_of(variable, kinds)
    return kind if kind in ("temperature", "concentration") else "other"


#: what each elevation handling means, for the report
VERTICAL_WORDS = {
    "measured": "vertical gradient measured per time over the network and removed before the horizontal fits "
                "(column vertical_gradient)",
    "none": "not used (flat network, or not air temperature)",
    "potential_temperature": "air temperature converted to potential temperature",
    "regression": "elevation fitted per cluster (column vertical_gradient)",
}


def _report_pieces(run, lines: list[str], inputs: dict, flags: dict, out: Path, scales: list[dict]) -> Page:
    """The text and tables of report.html (all but the figures and the file list); ``flags``: :func:`_flag_counts`;
    ``scales``: :func:`scale_lines`."""
    two = []
    if run.regional is not None:
        two = [regional_sentence(run)] + [f"{line}; {describe_scales(x, unit=f'{run.unit} h-1')}"
                                          for line, x in zip(lines, scales)]
    return Page(title=f"stationflow budget: {display_name(run.variable)}", summary=_summary_rows(run, inputs),
                periods=lines, quality=_quality_lines(run, flags), cluster_table=_cluster_rows(run),
                method=_method_lines(run), columns=_column_rows(out / "budget.parquet", run.unit),
                kind=variable_kind(run.variable, run.check.config["observations"]["kinds"]), scales=two,
                sensors=sensor_lines(run))


def _summary_rows(run, inputs: dict) -> list[tuple[str, str]]:
    """The report's "What was computed" table."""
    data = run.check.data
    obs = data.observations
    zone = display_zone(run.check.config)
    return [
        ("Question", f"How much of the observed change of {display_name(run.variable)} was carried in by the wind "
                     "(advection) and how much was made in place (in-situ residual)?"),
        ("Data", f"{inputs.get('observations')} ({data.accounting['rows_read']:,} rows read, "
                 f"{data.accounting['rows_accepted']:,} accepted, {data.accounting['rows_rejected']:,} rejected)"),
        ("Stations", f"{len(data.stations)} stations; {len(run.network.usable)} of {len(run.network.clusters)} "
                     "clusters usable"),
        ("Period", f"{show_time(obs['time'].min(), zone)} to {show_time(obs['time'].max(), zone)}"),
        ("Quantity fitted", f"{run.quantity} [{run.unit}]"),
        ("Analysis step / window", f"{format_duration(run.interval)} / {format_duration(run.window)} (centred)"),
        ("How the window was chosen", run.choices.get("window_source", "")),
        ("Station heights", VERTICAL_WORDS.get(run.choices.get("vertical", ""), str(run.choices.get("vertical", "")))),
        ("Sensor errors", noise_sentence(run)),
        ("Corrections before the fits", corrections_sentence(run)),
    ]


def _quality_lines(run, flags: dict) -> list[str]:
    """The report's "How good is it" list."""
    bs = run.summary
    zone = display_zone(run.check.config)
    counts = bs.regime_counts()
    determined = bs.rows - counts.get("undetermined", 0)
    quality = [
        "Regimes over all clusters and times: " + ", ".join(f"{k.replace('_', ' ')} {int(v)}" for k, v in counts.items()) + ".",
        (f"Median standard error of the advection {bs.median_se('advection_se'):.3g} and of the residual "
         f"{bs.median_se('residual_se'):.3g} {run.unit}/h." if determined else "No cluster could be evaluated."),
        f"Quality control flagged {sum(c['suspect'] for c in flags.values())} values suspect and "
        f"{sum(c['bad'] for c in flags.values())} bad (see qc_flags.csv); the estimator used "
        f"{'good and suspect' if run.check.config['qc']['use_suspect'] else 'only good'} values.",
        "'undetermined' means too few good stations in the cluster for a plane, gaps at the window ends, or a "
        "change whose cause cannot be told (both parts too uncertain).",
    ]
    if run.choices.get("wind") == "none":
        quality.insert(0, "No wind was observed (no wind_speed and wind_from_direction columns): the advection cannot "
                          "be estimated, so every row is undetermined. Map the wind columns in [observations.columns].")
    quality.append(_implausible_line(bs))
    if run.choices.get("qc_tests_off"):
        quality.append("Quality-control tests switched off in the configuration: "
                       + ", ".join(run.choices["qc_tests_off"]) + "; values they would have caught were used.")
    if bs.not_planar is not None and bs.planar_rows.sum():
        share = bs.not_planar.sum() / bs.planar_rows.sum()
        worst = np.argsort(-bs.not_planar / np.maximum(bs.planar_rows, 1))[:5]
        names = [f"{bs.clusters['cluster'].iloc[i]} {bs.not_planar[i] / max(bs.planar_rows[i], 1):.0%}" for i in worst
                 if bs.not_planar[i] > 0]
        quality.append(f"The plane was a poor model (model error above the sensors' gradient error) in {share:.0%} of "
                       "rows; the error bars include it (column model_error)"
                       + (f"; most often in clusters {', '.join(names)}." if names else "."))
    for p in run.check.periods.sort_values("values", ascending=False, kind="stable").head(8).itertuples():
        quality.append(f"QC: {p.station_id} {p.variable} {show_time(p.start, zone)} to "
                       f"{show_time(p.end, zone)}: {p.values} values flagged, {p.bad_values} bad and "
                       f"{p.values - p.bad_values} suspect (tests: {p.tests})")
    if "inversion" in run.extras:
        inv = run.extras["inversion"]
        if np.isfinite(inv).any():
            quality.append(f"Mast inversion (upper minus surface sensor): max {np.nanmax(inv):+.2f} K, "
                           f"min {np.nanmin(inv):+.2f} K; positive values mean warmer air aloft (radiative cooling).")
    return quality


def _implausible_line(bs) -> str:
    if bs.implausible_rows:
        return (f"{bs.implausible_rows} rows had advected and in-situ parts each over 5 times the observed change "
                "and cancelling (usually height differences or a broken sensor posing as a gradient): they are "
                "marked in the implausible column, labelled undetermined and left out of the main periods.")
    return ("No row had advected and in-situ parts that each far exceeded the change and cancelled "
            "(the implausible column).")


def _cluster_rows(run) -> pd.DataFrame:
    """The report's cluster table: shape, status and the steps in each regime that occurs."""
    ct = cluster_table(run.network)[["cluster", "stations", "area_km2", "min_angle", "noise_amplification", "status", "reason"]]
    reg = run.summary.cluster_counts()
    reg = reg.loc[:, reg.sum(axis=0) > 0]  # the regimes that occur
    return ct.merge(reg, left_on="cluster", right_index=True, how="left")


def _method_lines(run) -> list[str]:
    """The report's "Method" list."""
    method = [
        "Stations are projected with a local azimuthal equidistant projection (WGS84) centred on the network.",
        "Clusters (Delaunay triangles by default) with poor shape are rejected; a weighted least-squares plane is "
        "fitted per cluster and time to the good values, giving the centre value and the horizontal gradient with its covariance.",
        "Tendency: centred difference of the centre value over the window. Advection: -(u dT/dx + v dT/dy) with "
        "the cluster-mean wind, averaged over the same window. Residual (in situ) = tendency - advection.",
        "Uncertainty: first-order propagation of three parts. Reading noise (learned per station from its series "
        "unless declared) enters values, gradients and tendencies; sensor offsets enter values and gradients but cancel "
        "in tendencies; the model error (how far neighbouring clusters' gradients disagree beyond the noise, smoothed "
        "over an hour: the field is not a plane) enters gradients and advection. See docs/method.md.",
        f"Regime: a term counts when it exceeds {run.settings.significance:g} standard errors"
        f"{f' and {run.settings.min_rate:g} {run.unit}/h' if run.settings.min_rate else ''}; the advective share "
        f"|A|/(|A|+|R|) >= {run.settings.dominance:g} is advective, <= {1 - run.settings.dominance:.2f} in situ, between: mixed.",
    ]
    if run.choices.get("vertical") == "measured":
        method.append("Station heights differ: a vertical gradient was fitted per time over the whole network and removed "
                      "before the horizontal fits (its error is carried into the gradients); it is the vertical_gradient "
                      "column (positive: an inversion).")
    if run.quantity == "potential_temperature":
        method.append("Air temperature was converted to potential temperature (pressure observed or from the standard "
                      "atmosphere at the station elevation) so that height differences do not pose as horizontal gradients.")
    return method


def _column_rows(parquet: Path, unit: str) -> list[tuple[str, str, str]]:
    """(name, unit, meaning) of every column the budget table has, from :mod:`stationflow.schema`."""
    import pyarrow.parquet as pq

    from ..schema import BY_NAME, unit_of

    try:
        names = pq.read_schema(parquet).names
    except (OSError, ValueError):
        return []
    return [(n, unit_of(n, unit) or "", BY_NAME[n].long_name) for n in names if n in BY_NAME]


def error_model_record(run) -> dict:
    """The error model in force, for run.json: reading noise per station, offsets, model error."""
    st = list(run.check.data.stations["station_id"].astype(str))
    noise = np.broadcast_to(np.asarray(run.settings.sigma, float), (len(st),))
    rec = {"reading_noise_source": run.choices.get("noise_source", ""),
           "reading_noise_median": float(np.median(noise)),
           "reading_noise_per_station": {sid: round(float(n), 6) for sid, n in zip(st, noise)},
           "offset": run.settings.offset, "offset_source": run.choices.get("offset_source", ""),
           "model_error": "neighbour spread of cluster gradients beyond the noise, smoothed over "
                          f"{2 * run.settings.model_steps + 1} steps" if run.settings.model_error else "off"}
    return rec


def noise_sentence(run) -> str:
    """One sentence on the sensor errors for the report, naming stations far noisier than their peers."""
    st = np.asarray(run.check.data.stations["station_id"].astype(str))
    noise = np.broadcast_to(np.asarray(run.settings.sigma, float), (len(st),))
    med = float(np.median(noise))
    text = (f"reading noise {med:.3g} {run.unit} (median; {run.choices.get('noise_source', 'declared')}), offsets "
            f"{run.settings.offset:g} {run.unit} ({run.choices.get('offset_source', '')}); wind components "
            f"{run.settings.wind_sigma:.2g} m/s ({run.choices.get('wind_noise_source', 'declared')})")
    loud = np.flatnonzero(noise > 3 * med) if med > 0 else np.zeros(0, int)
    if loud.size:
        worst = loud[np.argsort(-noise[loud])][:5]
        text += (". Noisier than 3x the median (check these sensors): "
                 + ", ".join(f"{st[i]} {noise[i]:.3g}" for i in worst) + (f" and {loud.size - 5} more" if loud.size > 5 else ""))
    return text


def _report(out: Path, pieces: Page, figs) -> Path:
    """Write report.html from :func:`_report_pieces` and the finished figures (run.json is written next)."""
    from .html import write_report

    file_list = sorted(p.name for p in out.iterdir() if p.is_file() and not p.name.startswith("."))
    return write_report(out / "report.html", pieces, figs, sorted(set(file_list) | {"report.html", "run.json"}))
