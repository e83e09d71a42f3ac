"""Quality control: tests that flag values; QC never deletes or changes a value.

Takes the canonical observations and the station table; gives a :class:`QCResult`: per variable an
int8 flag per value (0 good, 1 suspect, 2 bad, 3 missing) and a bitmask of the tests that fired.
Test families follow Shafer et al. (2000), Fiebrich et al. (2010) and the WMO AWS guidelines
(Zahumensky 2004), one module each: :mod:`.range`, :mod:`.steps`, :mod:`.persistence`,
:mod:`.consistency` and :mod:`.neighbours` (spatial); :mod:`.thresholds` holds the defaults with their
sources ("from memory" where recalled), :mod:`.flags` the registry of tests and the flag tables,
:mod:`.runner` runs them all.  Add a test: its function in the module of its family, one line in
:data:`~.flags.TESTS`, one call in :mod:`.runner`.
"""

from __future__ import annotations

from .consistency import (
                    dew_point_not_above_temperature,
                    direction_defined_when_moving,
                    gust_not_below_mean,
)
from .flags import (
                    BAD,
                    FLAG_NAMES,
                    GOOD,
                    MISSING,
                    SEVERITY,
                    SUSPECT,
                    TEST_BITS,
                    TESTS,
                    QCResult,
                    flag_table,
                    flagged_periods,
                    summary,
)
from .neighbours import (
                    BuddyRules,
                    agrees_with_neighbours,
                    row_nanmedian,
                    solar_elevation,
)
from .persistence import not_persistent, regular_slots, rolling_range
from .range import unit_slips, within_range
from .runner import run_qc
from .steps import plausible_steps, step_limit
from .thresholds import (
                    DEFAULT_PERSISTENCE,
                    DEFAULT_RANGE,
                    DEFAULT_SPATIAL_FLOOR,
                    DEFAULT_STEP,
                    SPATIAL_VARIABLES,
                    is_concentration,
                    thresholds,
)

__all__ = ["BAD", "BuddyRules", "DEFAULT_PERSISTENCE", "DEFAULT_RANGE", "DEFAULT_SPATIAL_FLOOR", "DEFAULT_STEP", "FLAG_NAMES", "GOOD",
           "MISSING", "SEVERITY", "SPATIAL_VARIABLES", "SUSPECT", "TESTS", "TEST_BITS", "QCResult",
           "agrees_with_neighbours", "dew_point_not_above_temperature", "direction_defined_when_moving", "flag_table",
           "flagged_periods", "gust_not_below_mean", "is_concentration", "not_persistent", "plausible_steps", "regular_slots",
           "rolling_range", "row_nanmedian", "run_qc", "solar_elevation", "step_limit", "summary", "thresholds",
           "unit_slips", "within_range"]
