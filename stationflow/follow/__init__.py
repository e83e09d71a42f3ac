"""Following a growing observation source through the night (``stationflow budget --follow``).

- :mod:`.source`: the new whole lines of a growing CSV file or folder;
- :mod:`.state`: the state on disk, committed atomically;
- :mod:`.settings`: the settings learned once and pinned (settings.toml);
- :mod:`.engine` and :mod:`.update`: one call, from new lines to outputs;
- :mod:`.alerts`: critical values and alert rules;
- :mod:`.history`: the last hours for the page (:mod:`stationflow.report.now`).
"""

from .engine import Follow, StepResult, follow_step

__all__ = ["Follow", "StepResult", "follow_step"]
