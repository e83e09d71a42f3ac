"""Range tests: values outside their plausible range, and whole variables read in the wrong unit.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import variables as V

# --------------------------------------------------------------------------
# the tests: each returns True where the value passed
# --------------------------------------------------------------------------

def within_range(values: np.ndarray, low: float, high: float) -> np.ndarray:
    """Plausible-value test: True where ``low <= value <= high`` or missing."""
    v = np.asarray(values, float)
    return np.isnan(v) | ((v >= low) & (v <= high))


# --------------------------------------------------------------------------
# running all tests and combining
# --------------------------------------------------------------------------

def unit_slips(observations: pd.DataFrame, declared: dict[str, str], ranges: dict[str, tuple[float, float]], *,
               min_share: float = 0.5) -> list[str]:
    """One sentence per variable whose values look like another unit than the declared (or default) one.

    A slip: more than ``min_share`` of the values fail the range test as
    read, while at least 95 % would pass read in another usual unit of the
    same kind.  Each sentence names the key and the value(s) to set.
    """
    out = []
    for name, (lo, hi) in ranges.items():
        if name not in observations or name not in V.CANONICAL or name == "wind_from_direction":
            continue
        x = observations[name].to_numpy(float)
        x = x[np.isfinite(x)]
        if x.size == 0 or np.mean((x < lo) | (x > hi)) <= min_share:
            continue
        unit = declared.get(name)
        scale, offset = V.unit_factors(name, unit)
        raw = (x - offset) / scale
        table = V.UNITS_BY_KIND[V.CANONICAL[name].kind]
        fits = []
        for alt, (sc, off) in table.items():
            if (sc, off) == (scale, offset) or any(table[f] == (sc, off) for f in fits):
                continue  # the unit as read, or an alias of one already listed
            y = raw * sc + off
            share = float(np.mean((y >= lo) & (y <= hi)))
            if share >= 0.95:
                fits.append(alt)
        if fits:
            shown = " or ".join(f'"{f}"' for f in fits)
            out.append(f"{np.mean((x < lo) | (x > hi)):.0%} of the {name} values are outside the plausible range when read "
                       f"in {unit or V.CANONICAL[name].unit}, but fit in {shown}; set observations.units.{name} = {shown}")
    return out
