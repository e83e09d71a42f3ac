"""The exceptions and the warning class stationflow raises.

Every user mistake (bad input file, bad configuration, unusable network)
raises a subclass of :class:`StationflowError`, which the command line turns
into one ``error:`` line and exit code 2.  Anything else is a bug.
"""

from __future__ import annotations


class StationflowError(ValueError):
    """Base class for problems the user can fix (bad input or configuration)."""


class ConfigError(StationflowError):
    """The TOML configuration is invalid: unknown key, wrong type, bad value."""


class IngestError(StationflowError):
    """A station or observation file cannot be read as a whole."""


class NoUsableRows(IngestError):
    """Every row of the observations was rejected; ``data`` holds what was read (for rejected_rows.csv)."""

    def __init__(self, message: str, data: object) -> None:
        super().__init__(message)
        self.data = data


class GeometryError(StationflowError):
    """The network cannot be used: too few stations, no usable cluster."""


class StationflowWarning(UserWarning):
    """Warnings about the data (poor geometry, rank-deficient fits...)."""
