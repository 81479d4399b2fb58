"""The service's heartbeat: a small JSON file saying that the daemon is alive and what it
has done.

The service rewrites ``<state_dir>/heartbeat.json`` atomically every few seconds and once
more when it stops; ``strayline status`` reads it, so that "is it still running?" has an
answer at 3 am without ``systemctl``: running since when, last seen how long ago, lines
written, files waiting, or stopped at what time.
"""

from __future__ import annotations

import json
import os
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Literal

from strayline._atomic import write_text_atomic
from strayline._numbers import duration_text

__all__ = [
    "HEARTBEAT_FILE",
    "HEARTBEAT_INTERVAL_S",
    "Heartbeat",
    "describe_heartbeat",
    "pid_alive",
    "read_heartbeat",
    "write_heartbeat",
]

HEARTBEAT_FILE = "heartbeat.json"
#: How often a running service rewrites its heartbeat, s.
HEARTBEAT_INTERVAL_S = 10.0
#: A running service not seen for longer than this is reported as silent, s (three
#: missed beats: a loop blocked on a stuck disk, or a process killed without a word).
_SILENT_AFTER_S = 3 * HEARTBEAT_INTERVAL_S


@dataclass(frozen=True)
class Heartbeat:
    """What the service last said about itself.

    Attributes
    ----------
    pid : int
    state : {"running", "stopped"}
    started, seen : datetime
        When the service started, and when it wrote this record (aware UTC).
    lines_written : int
        Lines committed since the service started (reloads included).
    waiting : int
        Line files seen but not yet processed.
    last_scan_id : str or None
    output_failing : bool
        The output could not be written when the record was made.
    version : str
        strayline's version.
    """

    pid: int
    state: Literal["running", "stopped"]
    started: datetime
    seen: datetime
    lines_written: int
    waiting: int
    last_scan_id: str | None
    output_failing: bool
    version: str

    def as_json_dict(self) -> dict[str, Any]:
        data = asdict(self)
        data["started"] = self.started.isoformat()
        data["seen"] = self.seen.isoformat()
        return data


def write_heartbeat(state_dir: Path, beat: Heartbeat) -> None:
    """Replace ``<state_dir>/heartbeat.json`` atomically.

    Raises
    ------
    OSError
        If it cannot be written (the caller logs it and carries on).
    """
    Path(state_dir).mkdir(parents=True, exist_ok=True)
    write_text_atomic(Path(state_dir) / HEARTBEAT_FILE, json.dumps(beat.as_json_dict()))


def read_heartbeat(state_dir: Path) -> Heartbeat | None:
    """The last heartbeat written under ``state_dir``; None if there is none, or it cannot
    be read as one (a record from another version, a damaged file)."""
    try:
        data = json.loads((Path(state_dir) / HEARTBEAT_FILE).read_text(encoding="utf-8"))
        return Heartbeat(
            pid=int(data["pid"]),
            state="stopped" if data["state"] == "stopped" else "running",
            started=datetime.fromisoformat(data["started"]),
            seen=datetime.fromisoformat(data["seen"]),
            lines_written=int(data["lines_written"]),
            waiting=int(data["waiting"]),
            last_scan_id=None if data["last_scan_id"] is None else str(data["last_scan_id"]),
            output_failing=bool(data["output_failing"]),
            version=str(data["version"]),
        )
    except (OSError, ValueError, KeyError, TypeError):
        return None


def pid_alive(pid: int) -> bool:
    """Whether a process with this id exists on this machine (signal 0, kill(2))."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # it exists, under another user
        return True
    return True


def describe_heartbeat(beat: Heartbeat, now: datetime | None = None, *, alive: Any = None) -> str:
    """One line about the daemon for ``strayline status``.

    ``alive(pid) -> bool`` (default :func:`pid_alive`) tells a silent daemon whose process
    is still there (blocked) from one that is gone (killed, crashed).
    """
    now = now if now is not None else datetime.now(UTC)
    alive = alive if alive is not None else pid_alive
    since = f"{beat.started:%Y-%m-%d %H:%M} UTC"
    work = f"{beat.lines_written} line(s) written"
    if beat.state == "stopped":
        return f"daemon: stopped at {beat.seen:%Y-%m-%d %H:%M} UTC ({work} in that run)"
    silent_s = (now - beat.seen).total_seconds()
    if silent_s > _SILENT_AFTER_S:
        there = "still there: blocked?" if alive(beat.pid) else "gone: killed or crashed?"
        return (
            f"daemon: not seen for {duration_text(silent_s)} (pid {beat.pid} {there}); check "
            "`systemctl status strayline` and its journal"
        )
    failing = "; the output is failing" if beat.output_failing else ""
    return (
        f"daemon: running (pid {beat.pid}) since {since}, last seen {duration_text(silent_s)} ago; "
        f"{work}, {beat.waiting} waiting{failing}"
    )
