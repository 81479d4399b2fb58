"""The lines of a scan where an alert was raised, for the markers on its quick-look maps.

:func:`alert_marks` turns alert events into marks (pure); :class:`AlertLogCursor` reads
one scan's marks from the alert log a little at a time — the whole log once, then only
what was appended since — so a live picture refreshed every few lines never rereads a
log that has grown over months.
"""

from __future__ import annotations

import os
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

from strayline.alerts import SEVERITY_ORDER, AlertEvent

__all__ = ["AlertLogCursor", "AlertMark", "alert_marks"]


@dataclass(frozen=True, order=True)
class AlertMark:
    """One alert raised at one line of a scan.

    Attributes
    ----------
    line_index : int
        Store line index.
    direction : str or None
        Trace it concerns; None marks the line in every trace.
    severity : str
        ``info``, ``warning`` or ``critical``.
    rule : str
    """

    line_index: int
    direction: str | None
    severity: str
    rule: str

    def on(self, direction: str) -> bool:
        """Whether the mark belongs on the ``direction`` trace."""
        return self.direction is None or self.direction == direction

    @property
    def rank(self) -> int:
        """Urgency, higher is more urgent (an unknown severity ranks as the least)."""
        return SEVERITY_ORDER.index(self.severity) if self.severity in SEVERITY_ORDER else -1


def alert_marks(events: Iterable[AlertEvent], scan_id: str) -> tuple[AlertMark, ...]:
    """The raised events of ``scan_id`` that name a line, as sorted unique marks."""
    return tuple(
        sorted(
            {
                AlertMark(e.line_index, e.direction, e.severity, e.rule)
                for e in events
                if e.scan_id == scan_id and e.state == "raised" and e.line_index is not None
            }
        )
    )


class AlertLogCursor:
    """One scan's alert marks, read from a JSON-lines alert log incrementally.

    Each :meth:`marks` call reads the complete lines appended since the last call. A log
    replaced (rotated: another file at the path) or truncated is read again from its
    start; the marks found before are kept, and so they are while the log is missing or
    cannot be read. Lines that are not events are skipped (the report, made from the
    whole log, names them). Not thread-safe: one caller.

    Parameters
    ----------
    path : Path or None
        The alert log; None (no log) gives no marks.
    scan_id : str
    """

    def __init__(self, path: Path | None, scan_id: str) -> None:
        self._path = None if path is None else Path(path)
        self._scan_id = scan_id
        self._identity: tuple[int, int] | None = None
        self._offset = 0
        self._marks: set[AlertMark] = set()

    def marks(self) -> tuple[AlertMark, ...]:
        """Every mark seen so far, sorted; reads what the log gained since the last call."""
        if self._path is not None:
            self._read_new(self._path)
        return tuple(sorted(self._marks))

    def _read_new(self, path: Path) -> None:
        try:
            with open(path, "rb") as fh:
                st = os.fstat(fh.fileno())
                identity = (st.st_dev, st.st_ino)
                if identity != self._identity or st.st_size < self._offset:
                    self._identity, self._offset = identity, 0
                fh.seek(self._offset)
                data = fh.read()
        except OSError:  # missing or unreadable now: the marks known so far
            return
        end = data.rfind(b"\n") + 1  # a partial last line waits for its newline
        self._offset += end
        events = []
        for raw in data[:end].split(b"\n"):
            if not raw.strip():
                continue
            try:
                events.append(AlertEvent.from_json(raw.decode("utf-8")))
            except (ValueError, KeyError, TypeError):
                continue
        self._marks.update(alert_marks(events, self._scan_id))
