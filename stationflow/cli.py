"""The command line: a thin typer layer over :mod:`stationflow.api`.

Exit codes: 0 done; 2 bad input or configuration, or an output the file
system refused (one ``error:`` line on stderr); 1 an unexpected fault.
"""

from __future__ import annotations

import contextlib
import sys
import traceback
from enum import Enum
from pathlib import Path
from typing import Annotated, Optional

import typer

from . import __version__
from .errors import StationflowError

SAFETY = ("Decision aid only: the advection/in-situ split supports, and does not replace, independent frost and "
          "air-quality alarms; local codes, extension services and licensed practice prevail.")

app = typer.Typer(
    name="stationflow",
    help=("Split the local change seen by a network of fixed stations into what the wind carried in "
          "(advection) and what happened in place (in situ), with uncertainties.\n\n"
          "Start with:  stationflow demo --out demo_output\n\n" + SAFETY),
    no_args_is_help=True,
    add_completion=False,
    rich_markup_mode=None,
    context_settings={"help_option_names": ["-h", "--help"]},
)

STATE = {"verbose": False}


class Engine(str, Enum):
    """Where the budget runs."""

    local = "local"
    dask = "dask"


class ScenarioName(str, Enum):
    """Bundled demo scenarios."""

    frost = "frost"
    town = "town"


def _err(message: str) -> None:
    typer.echo(f"error: {message}", err=True)


def _os_error_line(exc: OSError) -> str:
    """One line for an output the file system refused: which path, why, what to do."""
    import re

    # a path inside the staging folder is named as the output it was to become
    name = re.sub(r"\.([^/\\]+)\.stationflow-(?:stage|old)-\d+", r"\1", str(exc.filename)) if exc.filename else ""
    where = f"{name}: " if name else ""
    if isinstance(exc, (FileExistsError, NotADirectoryError)):
        return f"{where}a file is in the way where a folder is needed; --out names a folder, choose another"
    reason = exc.strerror or str(exc)
    return (f"{where}cannot write ({reason}); check the path, its permissions and the free space "
            "(the output folder was left as it was)")


def _progress(quiet: bool):
    """A stage reporter on stderr (a spinner with the current stage), or nothing."""
    if quiet:
        return None, (lambda _msg: None)
    from rich.console import Console
    from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    console = Console(stderr=True)
    prog = Progress(SpinnerColumn(), TextColumn("{task.description}"), TimeElapsedColumn(), console=console,
                    transient=True, disable=not console.is_terminal)
    task = prog.add_task("starting", total=None)

    def report(msg: str) -> None:
        prog.update(task, description=msg)

    return prog, report


def _run(fn, *, quiet: bool):
    from .run.workers import tune_allocator

    tune_allocator()
    STATE["published"] = False
    prog, report = _progress(quiet)
    try:
        if prog is not None:
            with prog:
                return fn(report)
        return fn(report)
    except StationflowError as exc:
        _err(str(exc).replace("\n", " "))
        raise typer.Exit(2) from None
    except typer.Exit:
        raise
    except Terminated:
        _err("terminated (SIGTERM); the run stopped and the output folder was left as it was")
        raise typer.Exit(143) from None
    except KeyboardInterrupt:
        _err("interrupted; the run stopped and the output folder was left as it was")
        raise typer.Exit(130) from None
    except OSError as exc:  # the file system refused (the inputs' own errors are IngestErrors): not a bug
        _err(_os_error_line(exc))
        raise typer.Exit(2) from None
    except Exception as exc:  # noqa: BLE001 - the last line of defence: a bug, not a user error
        signum = _cancelling_signal(exc)
        if signum is not None:  # a signal that stopped a pyarrow read: the same as when it reaches Python
            _err("terminated (SIGTERM); the run stopped and the output folder was left as it was" if signum == 15
                 else "interrupted; the run stopped and the output folder was left as it was")
            raise typer.Exit(143 if signum == 15 else 130) from None
        if STATE["verbose"]:
            traceback.print_exc()
        _err(f"unexpected fault ({type(exc).__name__}: {exc}); rerun with --verbose and please report it")
        raise typer.Exit(1) from None


def _cancelling_signal(exc: BaseException) -> int | None:
    """The signal number when ``exc`` is pyarrow's ``ArrowCancelled`` (pyarrow stops a long read on SIGINT or
    SIGTERM itself and raises it instead of letting the signal reach Python), else None."""
    import re

    if type(exc).__name__ != "ArrowCancelled":
        return None
    m = re.search(r"signal (\d+)", str(exc))
    return int(m.group(1)) if m else 2


def _config(path: Optional[Path]):
    from .config import load

    return load(path)


def _check_paths(**paths: Optional[Path]) -> None:
    from .errors import IngestError

    for name, p in paths.items():
        if p is not None and not Path(p).exists():
            raise IngestError(f"{p}: file not found (given as --{name})")


def _version(value: bool) -> None:
    if value:
        typer.echo(f"stationflow {__version__}")
        raise typer.Exit(0)


@app.callback()
def main_options(
    verbose: Annotated[bool, typer.Option("--verbose", "-v", help="Show details, and tracebacks for unexpected faults.")] = False,
    version: Annotated[bool, typer.Option("--version", help="Print the version and exit.", callback=_version,
                                          is_eager=True)] = False,
) -> None:
    """Global options."""
    STATE["verbose"] = verbose
    import logging

    logging.basicConfig(level=logging.INFO if verbose else logging.WARNING, format="%(levelname)s %(name)s: %(message)s",
                        stream=sys.stderr)


StationsOpt = Annotated[Optional[Path], typer.Option("--stations", help="Stations CSV (station_id, latitude, longitude[, elevation]). "
                                                     "Optional when the observations carry latitude/longitude.")]
ObsOpt = Annotated[Path, typer.Option("--obs", help="Observations: CSV (long or wide), Parquet file or dataset folder, "
                                      "or a folder of netCDF station files.")]
ConfigOpt = Annotated[Optional[Path], typer.Option("--config", help="TOML configuration (every key optional; see docs/configuration.md).")]
OutOpt = Annotated[Path, typer.Option("--out", help="Output folder (created if needed).")]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="No progress or summary output.")]


@app.command()
def check(
    obs: ObsOpt,
    out: OutOpt,
    stations: StationsOpt = None,
    config: ConfigOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Read and quality-control the inputs; report what was read, rejected and flagged.

    Writes run.json, rejected_rows.csv, qc_flags.csv, qc_periods.csv and qc_overview.png.

    Example:

    \b
        stationflow check --stations sample_data/frost/stations.csv \\
            --obs sample_data/frost/observations.csv \\
            --config sample_data/frost/config.toml --out check_out
    """
    from .report.outputs import write_check

    def job(report):
        _check_paths(obs=obs, stations=stations, config=config)
        cfg = _config(config)
        with _staged(out) as stage:
            chk = _checked(obs, stations, cfg, stage, report, command="check")
            report("writing outputs")
            write_check(stage, chk, inputs={"observations": obs, "stations": stations})
        if not quiet:
            typer.echo(_check_summary(chk, out))

    _run(job, quiet=quiet)


@contextlib.contextmanager
def _staged(out: Path):
    """The staging folder of a command's outputs (:func:`report.staging.staged`); published on success and when
    no row was usable (its error names rejected_rows.csv, written for it).  Once published, a SIGTERM no longer
    stops the command: its outputs are whole and it only has to end."""
    from .errors import NoUsableRows
    from .report.staging import staged

    with staged(out, publish_on=(NoUsableRows,)) as stage:
        yield stage
    STATE["published"] = True  # (reached only when the block ended normally and the folder is in place)


def _checked(obs: Path, stations: Path | None, cfg, out: Path, report, *, command: str):
    """``run_check``; when no row is usable, rejected_rows.csv and run.json are written before the error."""
    from .errors import NoUsableRows
    from .run.check import run_check

    try:
        return run_check(obs, stations, cfg, progress=report)
    except NoUsableRows as exc:
        from .report.outputs import write_rejected_only

        write_rejected_only(out, exc.data, inputs={"observations": obs, "stations": stations}, command=command,
                            config=cfg)
        raise


def _check_summary(chk, out: Path) -> str:
    import numpy as np
    import pandas as pd

    from .network.grid import format_duration
    from .report.text import display_zone, show_time

    zone = display_zone(chk.config)
    d = chk.data
    o = d.observations
    acc = d.accounting
    lines = [f"stations: {len(d.stations)}   rows read {acc['rows_read']:,}, accepted {acc['rows_accepted']:,}, "
             f"rejected {acc['rows_rejected']:,}" + (f", identical duplicates collapsed {acc['duplicates_collapsed']:,}"
                                                     if acc["duplicates_collapsed"] else "")]
    if len(o):
        lines.append(f"time span: {show_time(o['time'].min(), zone)} to {show_time(o['time'].max(), zone)}")
        srt = o[["station_id", "time"]].sort_values(["station_id", "time"])
        gaps = srt["time"].diff().where(srt["station_id"] == srt["station_id"].shift())
        step = gaps.groupby(srt["station_id"]).median()
        common = step.mode().iloc[0] if len(step.dropna()) else None
        odd = step[step != common].dropna()

        def fmt(td) -> str:
            return format_duration(td) if pd.notna(td) else "single report"

        lines.append(f"reporting interval: {fmt(common)} at {int((step == common).sum())} stations"
                     + ("; others: " + ", ".join(f"{k} {fmt(v)}" for k, v in odd.head(6).items()) if len(odd) else ""))
    lines.append("completeness (good / present / expected):")
    n_exp = max(1, len(d.stations)) * max(1, o["time"].nunique())
    for v in d.variables:
        f = chk.qc.flags[v]
        lines.append(f"  {v:<28} {np.sum(f == 0) / n_exp:6.1%} / {np.sum(f != 3) / n_exp:6.1%}   "
                     f"[{d.units.get(v, '')}]")
    if len(chk.per_test):
        lines.append("QC tests fired: " + ", ".join(f"{r.variable}:{r.test} {r.values}" for r in chk.per_test.itertuples()))
    flagged = chk.per_station[(chk.per_station["suspect"] > 0) | (chk.per_station["bad"] > 0)]
    if len(flagged):  # the worst few and a count: the full list is in qc_flags.csv
        worst = flagged.assign(_n=flagged["suspect"] + flagged["bad"]).sort_values(["bad", "_n"], ascending=False).head(6)
        lines.append(f"flags at {len(flagged)} station(s); worst: " + ", ".join(
            f"{r.station_id} {r.suspect} suspect/{r.bad} bad" for r in worst.itertuples())
            + (f" (and {len(flagged) - 6} more in qc_flags.csv)" if len(flagged) > 6 else ""))
    big = chk.periods[chk.periods["values"] >= 3]
    for p in big.head(12).itertuples():
        lines.append(f"  {p.station_id} {p.variable} {show_time(p.start, zone)} to {show_time(p.end, zone)}:"
                     f" {p.values} values flagged, {p.bad_values} bad ({p.tests})")
    if acc["rows_rejected"]:
        first = d.rejected.head(3)
        for r in first.itertuples():
            lines.append(f"  rejected {Path(r.file).name} line {r.line}: {r.reason}")
    lines.append(f"outputs in {out}/ (run.json, rejected_rows.csv, qc_flags.csv, qc_overview.png)")
    return "\n".join(lines)


@app.command()
def network(
    out: OutOpt,
    stations: StationsOpt = None,
    obs: Annotated[Optional[Path], typer.Option("--obs", help="Observations to take the station table from, when no --stations.")] = None,
    config: ConfigOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Inspect the network: which clusters are usable for gradients, and why the others are not.

    Writes clusters.csv (id, members, centroid, area, angles, shape, noise amplification, status, reason),
    network_map.png and run.json.

    Example:

    \b
        stationflow network --stations sample_data/frost/stations.csv --out network_out
    """
    from .api import run_network
    from .read import read_observations, read_stations
    from .report.outputs import write_network

    def job(report):
        from .errors import IngestError

        if stations is None and obs is None:
            raise IngestError("give --stations FILE (or --obs FILE with latitude/longitude columns)")
        _check_paths(stations=stations, obs=obs, config=config)
        cfg = _config(config)
        report("reading stations")
        st = read_stations(stations, cfg) if stations is not None else read_observations(obs, cfg).stations
        net = run_network(st, cfg)
        report("writing outputs")
        with _staged(out) as stage:
            write_network(stage, net, inputs={"stations": stations, "observations": obs}, config=cfg)
        if not quiet:
            c = net.clusters
            typer.echo(f"{len(net.stations)} stations, projection {net.crs}")
            typer.echo(f"{len(c)} clusters: {int((c['status'] == 'ok').sum())} usable, {int((c['status'] != 'ok').sum())} rejected")
            for r in c[c["status"] != "ok"].head(20).itertuples():
                typer.echo(f"  {r.cluster} ({r.stations}): {r.reason}")
            typer.echo(f"outputs in {out}/ (clusters.csv, network_map.png, run.json)")

    _run(job, quiet=quiet)


@app.command()
def budget(
    obs: ObsOpt,
    out: OutOpt,
    stations: StationsOpt = None,
    config: ConfigOpt = None,
    variable: Annotated[Optional[str], typer.Option("--variable", help="Scalar to budget (default budget.variable, air_temperature).")] = None,
    engine: Annotated[Engine, typer.Option("--engine", help="local: this process; dask: dask.distributed, partitioned in time.")] = Engine.local,
    scheduler: Annotated[Optional[str], typer.Option("--scheduler", help="Dask scheduler address (default: a local cluster on loopback).")] = None,
    csv: Annotated[bool, typer.Option("--csv", help="Write budget.csv even above 1,000,000 rows.")] = False,
    follow: Annotated[bool, typer.Option("--follow", help="Follow a growing CSV export (a file a logger appends to, or a folder new files arrive in): poll it every --every seconds and keep the budget, now.html and alerts.jsonl current until Ctrl-C. The state lives in --out.")] = False,
    every: Annotated[float, typer.Option("--every", min=1.0, help="With --follow: seconds between polls.")] = 60.0,
    once: Annotated[bool, typer.Option("--once", help="Follow mode, one call: process what is new since the last call and exit (for cron or a systemd timer).")] = False,
    quiet: QuietOpt = False,
) -> None:
    """The main job: split each observed change into advection and an in-situ part, per cluster and time.

    Runs ingest, QC, the network, the plane fits and the budget; writes run.json, rejected_rows.csv,
    qc_flags.csv, budget.parquet, budget.csv, budget.nc, sensor_offsets.csv, figures and report.html, and prints
    the main periods, each with the advection at the network (regional) and the cluster (local) scale.

    CAUTION: a decision aid only. It supports, and does not replace, frost and air-quality alarms and
    warnings; local codes, extension services and licensed practice prevail. Check sensors and cold-pool
    stations by hand before acting on a flag.

    With --follow (or --once) it follows a live export through the night: the newest rows are answered at
    once with one-sided tendencies marked provisional and revised as data arrive; rows that can no longer
    change are final and equal a batch run with the settings.toml it writes. now.html shows each cluster's
    newest value and parts, and when it reaches follow.critical if the present in-situ rate goes on;
    alerts.jsonl collects the [alerts] rules as they fire.

    Example:

    \b
        stationflow budget --stations sample_data/frost/stations.csv \\
            --obs sample_data/frost/observations.csv \\
            --config sample_data/frost/config.toml --out frost_out
        stationflow budget --stations stations.csv --obs /data/logger/export.csv \\
            --config orchard.toml --out tonight --follow --every 60
    """
    def job(report):
        # a followed export may not exist yet (the logger starts later): the follow mode waits for it
        _check_paths(obs=None if (follow or once) else obs, stations=stations, config=config)
        cfg = _config(config)
        if follow or once:
            _follow_job(obs, stations, cfg, out, report, every=every, once=once, quiet=quiet,
                        variable=variable, engine=engine, scheduler=scheduler, csv=csv)
            return
        if scheduler and engine != Engine.dask:
            from .errors import ConfigError

            raise ConfigError("--scheduler goes with --engine dask")
        with _staged(out) as stage:
            run, notes = _budget_job(obs, stations, cfg, stage, report, variable=variable, csv=csv,
                                     engine=engine.value, scheduler=scheduler)
        if not quiet:
            typer.echo(_budget_summary(run, out, notes))

    _run(job, quiet=quiet)


def _budget_job(obs: Path, stations: Path | None, cfg, out: Path, report, *, variable: str | None = None,
                csv: bool = False, engine: str = "local", scheduler: str | None = None):
    """Check, budget (written to ``out`` partition by partition) and report; returns (run, notes).
    Shared by ``budget`` and ``demo``.

    The figures are drawn in a worker process while the budget is computed:
    the QC overview as soon as QC is done, the budget figures as soon as the
    last partition is (while the files are closed).
    """
    from .api import budget_to_files
    from .report.outputs import submit_budget_figures, submit_qc_figure, write_budget
    from .report.painter import Painter
    from .run.workers import import_ahead, side_task

    import_ahead()
    with Painter() as painter:
        chk = _checked(obs, stations, cfg, out, report, command="budget")
        # the QC overview's image is binned on a thread beside the budget's set-up (both only read the
        # checked observations), then drawn by the figure worker
        qc_job = side_task(submit_qc_figure, painter, out, chk, name="qc-figure")
        figs: dict = {}
        run = budget_to_files(chk, cfg, out, variable=variable, csv=csv, progress=report, engine=engine,
                              scheduler=scheduler,
                              on_summary=lambda r: figs.update(submit_budget_figures(painter, out, r)))
        qc_fig = qc_job.result()
        report("writing the report")
        _, notes = write_budget(out, run, inputs={"observations": obs, "stations": stations}, csv=csv,
                                tables_written=True, qc_figure=qc_fig, figures=figs)
    return run, notes


def _follow_job(obs: Path, stations: Path | None, cfg, out: Path, report, *, every: float, once: bool, quiet: bool,
                variable: str | None = None, engine=None, scheduler: str | None = None, csv: bool = False) -> None:
    """budget --follow / --once: one call, or calls every ``every`` seconds until Ctrl-C (which ends cleanly)."""
    import time

    from .errors import ConfigError
    from .follow import Follow, follow_step

    if stations is None:
        raise ConfigError("--follow needs --stations (the network must be known before the rows arrive)")
    if (engine is not None and engine != Engine.local) or scheduler:
        raise ConfigError("--follow runs on the local engine (each call is small): leave out --engine and --scheduler")
    if variable:
        cfg = cfg.with_values(budget={"variable": variable})
    ctx = Follow(obs, stations, cfg, out, every, csv=csv)
    try:
        while True:
            res = follow_step(ctx, progress=report)
            if not quiet:
                typer.echo(_follow_line(res, cfg, out))
            if once:
                return
            time.sleep(every)
    except Exception as exc:  # noqa: BLE001 - only a signal's cancellation is a stop; the rest goes on up
        if _cancelling_signal(exc) is None:
            raise
        if not quiet:
            typer.echo(f"stopped; the state is kept in {out} (run the same command again to resume)")
        return
    except KeyboardInterrupt:
        if not quiet:
            typer.echo(f"stopped; the state is kept in {out} (run the same command again to resume)")
        return
    finally:
        ctx.close()


def _follow_line(res, cfg, out: Path) -> str:
    from .report.text import display_zone, show_time

    zone = display_zone(cfg)
    if res.waiting:
        return f"{res.waiting}; page: {out / 'now.html'}"
    if res.newest is None:
        return "no observations yet"
    head = (f"{show_time(res.newest, zone)}: {res.new_rows:,} new rows; final through "
            f"{show_time(res.final_through, zone) if res.final_through is not None else 'none yet'}; page: {out / 'now.html'}")
    lines = [head] + [f"  ALERT {a['rule']}: {a['message']}" for a in res.new_alerts]
    return "\n".join(lines)


def _budget_summary(run, out: Path, notes: list[str]) -> str:
    from .network.grid import format_duration
    from .report.outputs import scale_lines
    from .report.text import describe_period, describe_scales, display_zone

    counts = run.summary.regime_counts()
    fitted = f" (fitted as {run.quantity})" if run.quantity != run.variable else ""
    lines = [f"{run.variable}{fitted} over {len(run.network.usable)} clusters, "
             f"{len(run.summary.times)} times of {format_duration(run.interval)} (window {format_duration(run.window)})",
             "regimes: " + ", ".join(f"{k} {v}" for k, v in counts.items())]
    if run.periods:
        lines.append("main periods:")
        tz = display_zone(run.check.config) or "UTC"
        scales = scale_lines(run)
        for i, p in enumerate(run.periods):
            lines.append("  " + describe_period(p, variable=run.quantity, timezone=tz))
            if scales:
                lines.append("    " + describe_scales(scales[i], unit=f"{run.unit} h-1"))
    if run.choices.get("wind") == "none":
        lines.append("no wind observed: advection cannot be estimated, so every row is undetermined "
                     "(map the wind columns in [observations.columns])")
    if run.choices.get("qc_tests_off"):
        lines.append("QC switched off: " + ", ".join(run.choices["qc_tests_off"]))
    if run.sensors is not None and not run.sensors.empty:
        worst = run.sensors.head(3)  # ranked: beyond twice their error first, then by the advection they would fake
        unit = run.unit
        lines.append("sensors to check first (bias at their usual level, the advection it would fake): " + ", ".join(
            f"{r.station_id} bias {r.bias_at_typical_level:.2g} {unit} ({r.fake_advection:.2g} {unit}/h)"
            for r in worst.itertuples()) + ("; corrected" if run.choices.get("sensors", {}).get("applied")
                                             else "; not corrected (sensors.apply)") + " - see sensor_offsets.csv")
    acc = run.check.data.accounting
    lines.append(f"rows read {acc['rows_read']:,}, accepted {acc['rows_accepted']:,}, rejected {acc['rows_rejected']:,}")
    lines += notes
    lines.append(f"report: {out / 'report.html'}")
    lines.append(SAFETY)
    return "\n".join(lines)


@app.command()
def demo(
    out: Annotated[Path, typer.Option("--out", help="Output folder.")] = Path("demo_output"),
    scenario: Annotated[ScenarioName, typer.Option("--scenario", help="frost: a frost night in an invented valley; town: PM2.5 sensors in an invented town.")] = ScenarioName.frost,
    night: Annotated[bool, typer.Option("--night", help="Replay the scenario through the follow mode (budget --follow) as if a logger were writing it, at full speed: leaves now.html, alerts.jsonl and the budget files.")] = False,
    quiet: QuietOpt = False,
) -> None:
    """Run the main job on a bundled scenario (invented place, known truth) and say where the report is.

    Uses sample_data/<scenario>/ when present (as shipped), else generates the scenario. With --night the
    scenario is replayed time step by time step through the follow mode instead.

    Example:

    \b
        stationflow demo --scenario frost --out demo_output/frost
    """
    from .scenarios import synthetic

    def job(report):
        folder = Path(__file__).resolve().parent.parent / "sample_data" / scenario.value
        if night:
            _night_job(folder, scenario.value, out, report, quiet=quiet)
            return
        with _staged(out) as stage:
            source = folder
            if not (folder / "observations.csv").exists():
                folder, source = out / "input", stage / "input"
                report("generating the scenario")
                make, write = synthetic.SCENARIOS[scenario.value]
                write(make(), source)
            cfg = _config(source / "config.toml")
            run, notes = _budget_job(source / "observations.csv", source / "stations.csv", cfg, stage, report)
        if not quiet:
            typer.echo(f"scenario: {scenario.value} ({folder})")
            typer.echo(_budget_summary(run, out, notes))
            typer.echo(f"\nOpen the report: {(out / 'report.html').resolve()}")

    _run(job, quiet=quiet)


def _night_job(folder: Path, scenario: str, out: Path, report, *, quiet: bool) -> None:
    """demo --night: the scenario replayed through the follow mode into ``out`` (a fresh start each time)."""
    import shutil

    from .scenarios import replay, synthetic

    if (out / ".follow").exists():
        shutil.rmtree(out / ".follow")
    (out / "live").mkdir(parents=True, exist_ok=True)
    if not (folder / "observations.csv").exists():
        folder = out / "input"
        make, write = synthetic.SCENARIOS[scenario]
        write(make(), folder)

    def say(res) -> None:
        if not quiet and (res.new_alerts or (res.newest is not None and res.newest.minute == 0)):
            typer.echo(_follow_line(res, _config(folder / "config.toml"), out))

    results = replay.replay(folder, out, progress=report, on_step=say)
    if not quiet:
        cpu = sorted(r.cpu_s for r in results)
        typer.echo(f"replayed {len(results)} follow calls (median {cpu[len(cpu) // 2]:.2f} s of CPU each)")
        typer.echo(f"alerts: {out / 'alerts.jsonl'}")
        typer.echo(f"\nOpen the page: {(out / 'now.html').resolve()}")
        typer.echo(SAFETY)


class Terminated(KeyboardInterrupt):
    """SIGTERM (a scheduler stopping the run): handled like Ctrl-C, with exit code 143."""


def _on_sigterm(signum, frame) -> None:  # noqa: ARG001 - the signal module's signature
    if STATE.get("published"):
        return  # the outputs are in place: finish the last steps of a successful run
    if _later(signum):
        return
    raise Terminated()


def _on_sigint(signum, frame) -> None:  # noqa: ARG001 - the signal module's signature
    if _later(signum):
        return
    raise KeyboardInterrupt()


def _later(signum: int) -> bool:
    """True when the signal was put off until the imports on the side thread are done (it is then delivered
    again): raised while both threads import, it could leave a module lock held and hang the process."""
    import _thread

    from .run.workers import after_imports

    return after_imports(lambda: _thread.interrupt_main(signum))


def main() -> None:
    """Entry point of the ``stationflow`` command.

    SIGTERM stops a run as Ctrl-C does: workers are stopped, the staging folder is removed, the
    output folder is left as it was, and the exit code is 143 (130 for Ctrl-C).

    When the command has finished, the process ends without tearing the interpreter down module by
    module (0.15-0.2 s with pandas, pyarrow and scipy loaded, measured on the benchmark machine): the
    ``atexit`` handlers still run (log handlers, worker processes and threads, a Dask cluster), the
    standard streams are flushed, and every output file was already closed and renamed into place.
    """
    import signal

    from .run.workers import leave

    signal.signal(signal.SIGTERM, _on_sigterm)
    if signal.getsignal(signal.SIGINT) is signal.default_int_handler:
        signal.signal(signal.SIGINT, _on_sigint)
    try:
        app()
    except SystemExit as done:
        if done.code is None or isinstance(done.code, int):
            leave(done.code or 0)
        raise


if __name__ == "__main__":  # pragma: no cover
    main()
