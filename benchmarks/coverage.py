"""The coverage suite at full size: bias and coverage of nominal 95 % intervals per case (make coverage).

Prints a Markdown table (the one docs/method.md quotes, with the date and this command) and writes it to
benchmarks/output/coverage.md.  Usage: ``python benchmarks/coverage.py [--seeds N] [--hours H]``.
"""

from __future__ import annotations

import argparse
import datetime as dt
from pathlib import Path

from stationflow.scenarios.coverage import TERMS, coverage_table


def markdown(table) -> str:
    head = "| case | " + " | ".join(f"{t} bias | {t} se | {t} coverage" for t in TERMS) + " |"
    rule = "|---|" + "---|" * (3 * len(TERMS))
    rows = []
    for r in table.itertuples():
        cells = []
        for t in TERMS:
            cells += [f"{getattr(r, f'{t}_bias'):+.3f}", f"{getattr(r, f'{t}_se'):.3f}", f"{getattr(r, f'{t}_coverage'):.1%}"]
        rows.append(f"| {r.case} | " + " | ".join(cells) + " |")
    return "\n".join([head, rule, *rows])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=8, help="realisations per case (default 8)")
    ap.add_argument("--hours", type=float, default=6.0, help="length of each case in hours (default 6)")
    args = ap.parse_args()
    table = coverage_table(seeds=args.seeds, hours=args.hours)
    text = (f"Coverage suite, {dt.date.today():%Y-%m-%d}, `python benchmarks/coverage.py --seeds {args.seeds} "
            f"--hours {args.hours:g}` (bias: median of estimate - truth [K/h]; se: median stated standard error [K/h]; "
            "coverage: share of rows within +-1.96 se of the truth)\n\n" + markdown(table) + "\n")
    out = Path(__file__).parent / "output"
    out.mkdir(exist_ok=True)
    (out / "coverage.md").write_text(text, encoding="utf-8")
    print(text)


if __name__ == "__main__":
    main()
