"""Time layouts as people export them: find the one a file uses when none is configured.

Takes a column of time strings and the station of each row; gives the
``strftime`` layout to parse them with (or ``"ISO8601"``).  Read are ISO 8601
(``T`` or space, with or without seconds and offsets) and the common
spreadsheet and logger layouts: ``M/D/Y``, ``D/M/Y``, ``D.M.Y``, ``D-M-Y``,
``Y/M/D``, each with 4- or 2-digit years, with or without seconds, on a
24-hour or a 12-hour clock with AM/PM.

Day-first against month-first: a field above 12 settles it.  Otherwise the
reading under which each station's series runs on in time at its reporting
interval is taken (a wrong reading jumps by weeks, or back, between rows
that are minutes apart); when neither reading is more regular, a
:class:`~stationflow.errors.ConfigError` names the two candidate layouts
and the key that settles it.
"""

from __future__ import annotations

import pandas as pd

from ..errors import ConfigError

_DATES = {  # family -> date layouts (4-digit year first: a 2-digit year would also match "2026" as "20")
    "month-first": ("%m/%d/%Y", "%m/%d/%y", "%m-%d-%Y"),
    "day-first": ("%d/%m/%Y", "%d/%m/%y", "%d.%m.%Y", "%d.%m.%y", "%d-%m-%Y"),
    "year-first": ("%Y/%m/%d", "%Y.%m.%d"),
}
_CLOCKS = ("%H:%M", "%H:%M:%S", "%I:%M %p", "%I:%M:%S %p", "%I:%M%p", "%H%M", "")
#: distinct values tried per candidate layout before the whole column is parsed
SAMPLE = 2000


class AmbiguousTimes(ConfigError):
    """Times that read both month-first and day-first equally well; ``layouts`` holds the two."""

    def __init__(self, message: str, layouts: tuple[str, str]) -> None:
        super().__init__(message)
        self.layouts = layouts


def candidate_layouts() -> list[tuple[str, str]]:
    """Every (family, layout) tried, in order of preference within a family."""
    out = []
    for family, dates in _DATES.items():
        for d in dates:
            for c in _CLOCKS:
                out.append((family, f"{d} {c}".strip()))
    return out


def _parses(values: pd.Series, layout: str) -> pd.Series:
    return pd.to_datetime(values, format=layout, errors="coerce")


def _irregularity(parsed: pd.Series, station: pd.Series) -> tuple[int, int]:
    """(implausible, irregular) steps between consecutive reports of each station in file order.

    Implausible: backwards in time or more than a day ahead (what a wrong
    day/month reading does at every change of date); irregular: not the
    station's usual step.
    """
    frame = pd.DataFrame({"s": station.to_numpy(), "t": parsed.to_numpy()}).dropna()
    step = frame.groupby("s", sort=False)["t"].diff().dropna()
    if step.empty:
        return 0, 0
    usual = step.groupby(frame.loc[step.index, "s"].to_numpy()).transform("median")
    implausible = int(((step < pd.Timedelta(0)) | (step > pd.Timedelta("1D"))).sum())
    return implausible, int((step != usual).sum())


def detect_layout(text: pd.Series, station: pd.Series) -> str:
    """The layout of a column of time strings: ``"ISO8601"`` or a ``strftime`` format.

    ``text`` holds the strings (missing as NaN or ""); ``station`` the
    station of each row, to settle day-first against month-first.  Raises
    :class:`ConfigError` when two readings fit equally well.
    """
    vals = text.dropna()
    vals = vals[vals.str.strip() != ""]
    if vals.empty:
        return "ISO8601"
    uniq = pd.Series(vals.unique())
    probe = uniq if len(uniq) <= SAMPLE else uniq.sample(SAMPLE, random_state=0)
    # (ISO first: if it reads nearly everything it is the layout)
    iso_share = _parses(probe, "ISO8601").notna().mean()
    if iso_share >= 0.99:
        return "ISO8601"
    scores: dict[str, tuple[float, str]] = {}
    for family, layout in candidate_layouts():
        share = float(_parses(probe, layout).notna().mean())
        if share > scores.get(family, (0.0, ""))[0] + 1e-12:
            scores[family] = (share, layout)
    best = max([s for s, _ in scores.values()] + [iso_share])
    if best < 0.5:
        return "ISO8601"  # none fits: the rows are rejected one by one with their reasons
    fitting = {fam: lay for fam, (s, lay) in scores.items() if s >= best - 0.01}
    if iso_share >= best - 0.01:
        return "ISO8601"
    if len(fitting) == 1:
        return next(iter(fitting.values()))
    if "month-first" in fitting and "day-first" in fitting:
        m, d = fitting["month-first"], fitting["day-first"]
        keep = text.notna() & (text.str.strip() != "")
        im = _irregularity(_parses(text[keep], m), station[keep])
        idd = _irregularity(_parses(text[keep], d), station[keep])
        if im != idd:
            return m if im < idd else d
        raise AmbiguousTimes(
            f"the times (such as {vals.iloc[0]!r}) read both as {m!r} (month first) and as {d!r} (day first) and the "
            f"data do not tell which; set observations.time_format = \"{m}\" or \"{d}\"", (m, d)
        )
    return next(iter(fitting.values()))
