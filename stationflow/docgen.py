"""Generate the CLI reference (docs/cli.md) from the commands' own --help.

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
             "Exit codes: `0` done; `2` bad input or configuration (one line on stderr starting `error:`); "
             "`1` an unexpected fault (please report it, with `--verbose` output).", ""]
    for c in COMMANDS:
        parts += [f"## `stationflow{' ' + c if c else ''}`", "", "```text", help_text(c).rstrip(), "```", ""]
    return "\n".join(parts)


if __name__ == "__main__":  # pragma: no cover
    target = Path(sys.argv[1]) if len(sys.argv) > 1 else Path("docs/cli.md")
    target.write_text(cli_reference(), encoding="utf-8")
    print(target)
