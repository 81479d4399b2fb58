"""Quarantine: move a file that breaks the contract out of the way, never delete it.

The file goes to ``<scan folder>/_quarantine/`` with a JSON sidecar that says exactly what
was wrong (file, field, expected, found, when). Names never collide: a second file of the
same name gets a numbered suffix, so nothing is overwritten. :func:`bad_file_event` is the
alert that tells the operator about it.

A file its writer still appends to (a growing scan file) is never moved: its scan is held
instead, :func:`held_scan_event` raising an alert that names the field, and
:func:`held_scan_cleared` clearing it once the file reads cleanly again.
"""

from __future__ import annotations

import json
import os
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from pathlib import Path

from strayline._atomic import write_text_atomic
from strayline.alerts import AlertEvent
from strayline.errors import LineFileError
from strayline.lines.scan_line import line_key_from_name

__all__ = [
    "BAD_FILE_RULE",
    "HELD_SCAN_RULE",
    "NOTE_SUFFIX",
    "QUARANTINE_DIR",
    "QuarantineRecord",
    "bad_file_event",
    "held_scan_cleared",
    "held_scan_event",
    "quarantine_file",
]

QUARANTINE_DIR = "_quarantine"
#: End of the name of a quarantined file's sidecar (``<file name>.error.json``): one per
#: file set aside, whatever its layout, also when the file itself vanished meanwhile.
NOTE_SUFFIX = ".error.json"

#: Rule name of the alert raised for a quarantined file.
BAD_FILE_RULE = "bad_file"

#: Rule name of the alert raised while a growing file holds its scan.
HELD_SCAN_RULE = "scan_held"


def held_scan_event(path: Path, error: LineFileError, now: datetime) -> AlertEvent:
    """The warning raised when a growing scan file cannot be read on (its scan is held).

    The scan is named by its folder (one growing file per scan folder); the file stays
    where it is, its writer may still be appending to it.
    """
    return AlertEvent(
        time=now.astimezone(UTC).isoformat(timespec="milliseconds"),
        scan_id=path.parent.name,
        rule=HELD_SCAN_RULE,
        severity="warning",
        state="raised",
        message=f"scan held: {error}",
        advice=(
            f"{path} is left in place and read again whenever it changes; the lines before "
            "the fault are in the map, the rest wait. Check the acquisition software's writer"
        ),
    )


def held_scan_cleared(path: Path, now: datetime) -> AlertEvent:
    """The clear of :func:`held_scan_event`: the growing file reads cleanly again."""
    return AlertEvent(
        time=now.astimezone(UTC).isoformat(timespec="milliseconds"),
        scan_id=path.parent.name,
        rule=HELD_SCAN_RULE,
        severity="warning",
        state="cleared",
        message=f"scan no longer held: {path.name} reads cleanly again",
        advice="",
    )


def bad_file_event(path: Path, error: LineFileError, moved_to: str, now: datetime) -> AlertEvent:
    """The warning alert for a quarantined line file.

    Parameters
    ----------
    path : Path
        Where the file was (inside its scan folder, whose name is taken as the scan id).
    error : LineFileError
        Why it was rejected.
    moved_to : str
        Where it went; empty if it vanished before it could be moved.
    now : datetime
        Aware time of the decision.

    Returns
    -------
    AlertEvent
        Rule :data:`BAD_FILE_RULE`, state "raised" (a bad file is a one-off, never cleared),
        with the line index and direction when the file name reveals them.
    """
    line_index, direction = line_key_from_name(path.name)
    where = moved_to or "nowhere (it vanished before it could be moved)"
    return AlertEvent(
        time=now.astimezone(UTC).isoformat(timespec="milliseconds"),
        scan_id=path.parent.name,
        rule=BAD_FILE_RULE,
        severity="warning",
        state="raised",
        line_index=line_index,
        direction=direction,
        message=f"line file quarantined: {error}",
        advice=(
            f"the file was moved to {where} with a note beside it; check the acquisition "
            "software's writer; the line is missing from the map until a good file arrives"
        ),
    )


@dataclass(frozen=True)
class QuarantineRecord:
    """What the sidecar says about one quarantined file."""

    file: str
    moved_to: str
    field: str
    expected: str
    found: str
    message: str
    time: str


def _free_name(folder: Path, name: str) -> Path:
    target = folder / name
    n = 1
    while target.exists() or target.with_name(target.name + NOTE_SUFFIX).exists():
        target = folder / f"{name}.{n}"
        n += 1
    return target


def quarantine_file(
    path: Path, *, field: str, expected: str, found: str, message: str
) -> QuarantineRecord:
    """Move ``path`` into its folder's ``_quarantine/`` and write the sidecar.

    Parameters
    ----------
    path : Path
        The offending file (inside a scan folder).
    field, expected, found, message : str
        What was wrong, as named by the error that rejected it.

    Returns
    -------
    QuarantineRecord
        The sidecar's content. If the file vanished meanwhile, ``moved_to`` is empty and
        only the sidecar is written.
    """
    folder = path.parent / QUARANTINE_DIR
    folder.mkdir(exist_ok=True)
    target = _free_name(folder, path.name)
    try:
        os.replace(path, target)
        moved_to = str(target)
    except FileNotFoundError:
        moved_to = ""
    record = QuarantineRecord(
        file=str(path),
        moved_to=moved_to,
        field=field,
        expected=expected,
        found=found,
        message=message,
        time=datetime.now(UTC).isoformat(timespec="seconds"),
    )
    sidecar = target.with_name(target.name + NOTE_SUFFIX)
    write_text_atomic(sidecar, json.dumps(asdict(record), indent=2) + "\n")
    return record
