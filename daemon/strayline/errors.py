"""Exceptions named by cause.

- :class:`LineFileError` — an instrument file breaks the line-file contract: quarantine
  it, alert, carry on.
- :class:`ConfigError` — a bad configuration: refuse to start (exit code
  :data:`EXIT_CONFIG`).
- :class:`StoreError` — the output store or its disk failed: retry, then stop cleanly.
- :class:`CalibrationError` — a tip calibration asked for is missing or unreadable: the
  products say so and go on without it; the command that asked stops.

Anything else escaping a stage is our own bug.
"""

from __future__ import annotations

from os import PathLike

__all__ = [
    "EXIT_CONFIG",
    "EXIT_LOCKED",
    "EXIT_OK",
    "EXIT_USAGE",
    "CalibrationError",
    "ConfigError",
    "LineFileError",
    "StoreError",
    "StraylineError",
]

EXIT_OK = 0
EXIT_USAGE = 2
EXIT_CONFIG = 78  # sysexits.h EX_CONFIG; systemd's RestartPreventExitStatus names it
#: Another daemon holds the state folder (sysexits.h EX_TEMPFAIL: it may be free later);
#: the unit does not restart on it either.
EXIT_LOCKED = 75


class StraylineError(Exception):
    """Base of every error strayline raises on purpose."""


class LineFileError(StraylineError, ValueError):
    """A scan-line file breaks the contract.

    The message names the file, the field, what was expected and what was found::

        line_00042.h5: dataset 'counts' must be of shape (n_pixels, n_freq) = (256, 201);
        found (256, 200)
    """

    def __init__(self, path: str | PathLike[str], field: str, expected: str, found: str) -> None:
        from pathlib import Path

        self.path = Path(path)
        self.field = field
        self.expected = expected
        self.found = found
        super().__init__(f"{self.path.name}: {field} must be {expected}; found {found}")


class ConfigError(StraylineError, ValueError):
    """A configuration file is invalid; the message names the file and the key path."""

    def __init__(self, path: str | PathLike[str] | None, key_path: str, problem: str) -> None:
        self.path = path
        self.key_path = key_path
        self.problem = problem
        where = f"{path}: " if path is not None else ""
        super().__init__(f"{where}{key_path}: {problem}")


class StoreError(StraylineError, OSError):
    """Writing or reading a scan store failed (disk full, unwritable, vanished)."""


class CalibrationError(StraylineError, ValueError):
    """A tip calibration record is missing, unreadable or not one; the message names the
    calibration (or file) and what was wrong."""
