"""What the pipeline says it did: one record per file (:class:`LineOutcome`) and a
snapshot of its work (:class:`PipelineStatistics`)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from strayline.alerts import AlertEvent

__all__ = ["LineOutcome", "OutcomeKind", "PipelineStatistics"]

OutcomeKind = Literal[
    "written", "duplicate", "quarantined", "vanished", "unreadable", "held", "no_new_lines"
]


@dataclass(frozen=True)
class LineOutcome:
    """What happened to one file.

    Attributes
    ----------
    path : Path
    kind : {"written", "duplicate", "quarantined", "vanished", "unreadable", "held", \
"no_new_lines"}
        ``unreadable``: the file could not be read (an OSError other than its absence,
        ``problem`` says which); it is left where it is, to be tried again
        (:meth:`LinePipeline.process_many` only; :meth:`LinePipeline.process` raises).
        ``held``: a growing file broke its layout; it stays where it is and its scan is
        held with an alert. ``no_new_lines``: a growing file had no completed line the
        store lacks.
    scan_id, direction : str or None
    line_index : int or None
    read_s, fit_s, write_s, rules_s : float
        Wall time of reading and checking the file, of the fit and field, of the store
        write and of the metrics and rules, s (0 when not done). A group commit's write
        time and the group's rule-state save are shared equally among its lines.
    failures : int
        Pixels whose fit status is not OK.
    events : tuple of AlertEvent
        Alert events raised or cleared by this line.
    problem : str
        Why an ``unreadable`` file could not be read ("" otherwise).
    """

    path: Path
    kind: OutcomeKind
    scan_id: str | None = None
    line_index: int | None = None
    direction: str | None = None
    fit_s: float = 0.0
    write_s: float = 0.0
    failures: int = 0
    events: tuple[AlertEvent, ...] = ()
    read_s: float = 0.0
    rules_s: float = 0.0
    problem: str = ""


@dataclass(frozen=True)
class PipelineStatistics:
    """Snapshot of the pipeline's work since it was built."""

    lines_written: int
    duplicates: int
    quarantined: int
    pixels_failed: int
    scans_open: int
    last_scan_id: str | None
    last_line_index: int | None
    last_line_s: float | None
    active_alerts: int
