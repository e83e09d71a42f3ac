"""Generate the CLI reference (docs/cli.md) from the commands' own --help, the configuration reference and
the column table of docs/outputs.md (from :mod:`stationflow.schema`).

``python -m stationflow.docgen`` rewrites docs/cli.md; a test fails when the
file is stale.
"""

from __future__ import annotations

import sys
from pathlib import Path

COMMANDS = ("", "check", "network", "budget", "demo")


def help_text(command: str) -> str:
    """The --help output of ``stationflow [command]`` at a fixed width."""
    from typer.testing import CliRunner

    from .cli import app

    args = ([command] if command else []) + ["--help"]
    res = CliRunner().invoke(app, args, terminal_width=100, env={"COLUMNS": "100", "TERM": "dumb"})
    return res.output.rstrip() + "\n"


def cli_reference() -> str:
    """docs/cli.md content."""
    parts = ["# Command-line reference", "",
             "Generated from the commands' own `--help` by `python -m stationflow.docgen`; "
             "a test fails when this page is stale.", "",
             "Exit codes: `0` done; `2` bad input or configuration, or an output the file system refused (one line on stderr starting `error:`); "
             "`1` an unexpected fault (please report it, with `--verbose` output).", ""]
    for c in COMMANDS:
        parts += [f"## `stationflow{' ' + c if c else ''}`", "", "```text", help_text(c).rstrip(), "```", ""]
    return "\n".join(parts)


CONFIG_INTRO = """# Configuration

One TOML file, passed with `--config`. Every key is optional; the defaults are below. Unknown keys
and wrong types are refused with a one-line `error:` that names the key and the keys that exist.
This page is generated from `stationflow.config.SCHEMA` (and the QC default tables) by
`python -m stationflow.docgen`; a test fails when it is stale.

Units: QC thresholds and uncertainties are in the variables' internal units (K, m s-1, degree,
%, Pa; user scalars in their declared unit). Temperature *differences* are the same in K and degC.

A complete example (the frost demo's file):

```toml
[observations]
timezone = "America/Los_Angeles"
skip_lines = [2]                 # a units row under the header
missing_values = ["-99.9", "NAN"]

[observations.columns]           # source column -> canonical name
Site = "station_id"
LocalTime = "time"
Temp_F = "air_temperature"
WindSpd_mph = "wind_speed"
WindDir = "wind_from_direction"

[observations.units]
air_temperature = "degF"
wind_speed = "mph"

[uncertainty.sensor]
air_temperature = 0.15           # K, one reading

[budget]
vertical = "potential_temperature"
interval = "5min"
window = "60min"
```
"""


def config_reference() -> str:
    """docs/configuration.md content: every key with its default and meaning."""
    import json

    from . import qc
    from .config import SCHEMA

    parts = [CONFIG_INTRO]
    for section, keys in SCHEMA.items():
        parts += [f"## `[{section}]`", "", "| key | default | meaning |", "|---|---|---|"]
        for name, key in keys.items():
            default = key.unset if key.default is None else json.dumps(key.default)
            meaning = key.doc + (f" (one of: {', '.join(key.choices)})" if key.choices else "")
            parts.append(f"| `{section}.{name}` | `{default}` | {meaning} |")
        parts.append("")
    parts += ["## Default QC thresholds", "",
              "Used when `[qc.range]`, `[qc.step]` or `[qc.persistence]` do not name the variable.", "",
              "| variable | range [SI] | source |", "|---|---|---|"]
    for v, (lo, hi, src) in qc.DEFAULT_RANGE.items():
        parts.append(f"| `{v}` | {lo:g} .. {hi:g} | {src} |")
    parts += ["", "| variable | step limits [(minutes, limit)] | source |", "|---|---|---|"]
    for v, (table, src) in qc.DEFAULT_STEP.items():
        parts.append(f"| `{v}` | {', '.join(f'({a:g}, {b:g})' for a, b in table)} | {src} |")
    parts += ["", "| variable | persistence (min range, window min) | source |", "|---|---|---|"]
    for v, (a, b, src) in qc.DEFAULT_PERSISTENCE.items():
        parts.append(f"| `{v}` | {a:g}, {b:g} | {src} |")
    parts += ["", "Spatial-test floors (smallest flaggable residual): "
              + ", ".join(f"`{k}` {v:g}" for k, v in qc.DEFAULT_SPATIAL_FLOOR.items())
              + "; particulate matter is tested on ln(C) with a floor of ln 2.", ""]
    return "\n".join(parts)


COLUMNS_BEGIN = "<!-- columns: generated from stationflow/schema.py -->"
COLUMNS_END = "<!-- end of generated columns -->"


def outputs_page(current: str) -> str:
    """docs/outputs.md with its column table regenerated from :data:`stationflow.schema.COLUMNS`."""
    from .schema import markdown_table

    head, rest = current.split(COLUMNS_BEGIN, 1)
    _, tail = rest.split(COLUMNS_END, 1)
    return f"{head}{COLUMNS_BEGIN}\n{markdown_table()}{COLUMNS_END}{tail}"


#: whole pages generated from the code
PAGES = {"cli.md": cli_reference, "configuration.md": config_reference}
#: pages whose generated part sits between markers in hand-written text
SECTIONS = {"outputs.md": outputs_page}


def write_all(folder: Path) -> list[Path]:
    """Regenerate the generated pages and sections in ``folder``."""
    out = []
    for name, fn in PAGES.items():
        p = folder / name
        p.write_text(fn(), encoding="utf-8")
        out.append(p)
    for name, fn in SECTIONS.items():
        p = folder / name
        p.write_text(fn(p.read_text(encoding="utf-8")), encoding="utf-8")
        out.append(p)
    return out


if __name__ == "__main__":  # pragma: no cover
    for path in write_all(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("docs")):
        print(path)
