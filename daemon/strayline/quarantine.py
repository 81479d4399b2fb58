"""Quarantine: move a file that breaks the contract out of the way, never delete it.

The file goes to ``<scan folder>/_quarantine/`` with a JSON sidecar that says exactly what
was wrong (file, field, expected, found, when). Names never collide: a second file of the
same name gets a numbered suffix, so nothing is overwritten.
"""

from __future__ import annotations

import json
import os
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from pathlib import Path

__all__ = ["QUARANTINE_DIR", "QuarantineRecord", "quarantine_file"]

QUARANTINE_DIR = "_quarantine"


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
    while target.exists() or target.with_name(target.name + ".error.json").exists():
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
    sidecar = target.with_name(target.name + ".error.json")
    tmp = sidecar.with_name("." + sidecar.name + ".tmp")
    tmp.write_text(json.dumps(asdict(record), indent=2) + "\n", encoding="utf-8")
    os.replace(tmp, sidecar)
    return record
