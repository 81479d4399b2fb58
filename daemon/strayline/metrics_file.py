"""The metrics file: the daemon's state in the Prometheus text exposition format, for the
node exporter's textfile collector (``service.metrics_file``, a ``*.prom`` file in the
collector's folder).

The service rewrites it with its heartbeat (every few seconds, and once more with
``strayline_up 0`` when it stops), atomically: a temporary name in the same folder
(``.<name>.<random>.tmp``, which the collector does not read) renamed over the file.

Metrics, all of our own naming::

    strayline_up                               1 running, 0 stopped cleanly
    strayline_last_seen_timestamp_seconds      when the file was written (a killed
                                               daemon leaves it growing old)
    strayline_lines_written_total              lines committed since the daemon started
    strayline_files_waiting                    line files seen and not yet processed
    strayline_alerts_active{severity}          alerts raised and not cleared
    strayline_scan_lines_done{scan,direction}  lines in the scan's store
    strayline_scan_lines_planned{scan}
    strayline_scan_fit_yield_ratio{scan}       written pixels whose fit did not fail
    strayline_scan_last_line_age_seconds{scan} since its last line was committed

The text is made by a pure function (:func:`metrics_text`) over a frozen snapshot; the
scans' figures come from :func:`strayline.status.scan_status`, each store read again only
when its line count changed (:class:`ScanStatusCache`).

Hand-written rather than prometheus_client's registry and ``write_to_textfile``: the
format needs a dozen lines (HELP, TYPE, samples, label escaping), the values are a
snapshot and not instrumented counters, and the daemon takes no dependency for it; the
tests read the file with prometheus_client's parser.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

from strayline._atomic import write_text_atomic
from strayline.alerts import SEVERITY_ORDER, AlertEvent
from strayline.errors import StoreError
from strayline.lines import DIRECTIONS
from strayline.status import ScanStatus, scan_status
from strayline.store import NotAScanStore, store_path

__all__ = [
    "METRICS_FILE_SUFFIX",
    "MetricsSnapshot",
    "ScanMetrics",
    "ScanStatusCache",
    "alerts_by_severity",
    "escape_label_value",
    "metrics_text",
    "scan_metrics",
    "write_metrics_file",
]

#: The textfile collector reads only files with this suffix.
METRICS_FILE_SUFFIX = ".prom"


@dataclass(frozen=True)
class ScanMetrics:
    """One scan's figures.

    Attributes
    ----------
    scan_id : str
    lines_done : dict[str, int]
        Committed lines per direction.
    lines_planned : int
    fit_yield : float or None
        Fraction of written pixels whose fit did not fail (None before any pixel).
    last_line_age_s : float or None
        Seconds since the last line was committed (None before any line).
    """

    scan_id: str
    lines_done: Mapping[str, int]
    lines_planned: int
    fit_yield: float | None
    last_line_age_s: float | None


@dataclass(frozen=True)
class MetricsSnapshot:
    """What the file says at one moment.

    Attributes
    ----------
    up : bool
        The daemon is running (False in the last file of a clean stop).
    seen : datetime
        When the snapshot was taken (aware).
    lines_written : int
        Lines committed since the daemon started (reloads included).
    files_waiting : int
    alerts_active : dict[str, int]
        Active alerts per severity.
    scans : tuple of ScanMetrics
    """

    up: bool
    seen: datetime
    lines_written: int
    files_waiting: int
    alerts_active: Mapping[str, int] = field(default_factory=dict)
    scans: tuple[ScanMetrics, ...] = ()


def escape_label_value(value: str) -> str:
    """A label value as the text format writes it: backslash, double quote and line feed
    escaped (``\\\\``, ``\\"``, ``\\n``)."""
    return value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


def _help(text: str) -> str:
    return text.replace("\\", "\\\\").replace("\n", "\\n")


def _number(value: float) -> str:
    if math.isnan(value):
        return "NaN"
    if math.isinf(value):
        return "+Inf" if value > 0 else "-Inf"
    return repr(float(value)) if not float(value).is_integer() else str(int(value))


def _labels(pairs: Sequence[tuple[str, str]]) -> str:
    if not pairs:
        return ""
    return "{" + ",".join(f'{k}="{escape_label_value(v)}"' for k, v in pairs) + "}"


def _family(
    name: str, kind: str, help_text: str, samples: Sequence[tuple[Sequence[tuple[str, str]], float]]
) -> list[str]:
    # the text format (0.0.4) names a counter by its sample's name, ``…_total``
    full = f"{name}_total" if kind == "counter" else name
    out = [f"# HELP {full} {_help(help_text)}", f"# TYPE {full} {kind}"]
    out += [f"{full}{_labels(labels)} {_number(value)}" for labels, value in samples]
    return out


def metrics_text(snapshot: MetricsSnapshot) -> str:
    """The file's text: every family with its HELP and TYPE lines, in a fixed order (a
    family with no sample, such as scans before the first line, keeps its two lines)."""
    p = "strayline"
    scans = snapshot.scans
    lines = [
        *_family(
            f"{p}_up",
            "gauge",
            "Whether the daemon is running (1) or stopped cleanly (0).",
            [((), 1.0 if snapshot.up else 0.0)],
        ),
        *_family(
            f"{p}_last_seen_timestamp_seconds",
            "gauge",
            "When the daemon last wrote this file, seconds since the Unix epoch.",
            [((), snapshot.seen.timestamp())],
        ),
        *_family(
            f"{p}_lines_written",
            "counter",
            "Scan lines committed to their stores since the daemon started.",
            [((), float(snapshot.lines_written))],
        ),
        *_family(
            f"{p}_files_waiting",
            "gauge",
            "Line files seen and not yet processed.",
            [((), float(snapshot.files_waiting))],
        ),
        *_family(
            f"{p}_alerts_active",
            "gauge",
            "Alerts raised and not cleared, by severity.",
            [
                ((("severity", s),), float(snapshot.alerts_active.get(s, 0)))
                for s in sorted(set(SEVERITY_ORDER) | set(snapshot.alerts_active))
            ],
        ),
        *_family(
            f"{p}_scan_lines_done",
            "gauge",
            "Lines committed to the scan's store, per trace direction.",
            [
                ((("scan", s.scan_id), ("direction", d)), float(s.lines_done.get(d, 0)))
                for s in scans
                for d in DIRECTIONS
            ],
        ),
        *_family(
            f"{p}_scan_lines_planned",
            "gauge",
            "Lines the scan is planned to have.",
            [((("scan", s.scan_id),), float(s.lines_planned)) for s in scans],
        ),
        *_family(
            f"{p}_scan_fit_yield_ratio",
            "gauge",
            "Fraction of the scan's written pixels whose fit did not fail.",
            [((("scan", s.scan_id),), s.fit_yield) for s in scans if s.fit_yield is not None],
        ),
        *_family(
            f"{p}_scan_last_line_age_seconds",
            "gauge",
            "Seconds since the scan's last line was committed.",
            [
                ((("scan", s.scan_id),), s.last_line_age_s)
                for s in scans
                if s.last_line_age_s is not None
            ],
        ),
    ]
    return "\n".join(lines) + "\n"


def scan_metrics(status: ScanStatus, now: datetime) -> ScanMetrics:
    """A scan's figures from its status, its last line's age at ``now``."""
    done = status.pixels_done
    return ScanMetrics(
        scan_id=status.scan_id,
        lines_done=dict(status.lines_done),
        lines_planned=status.n_lines_planned,
        fit_yield=None if not done else 1.0 - status.pixels_failed / done,
        last_line_age_s=(
            None
            if status.last_commit is None
            else max((now - status.last_commit).total_seconds(), 0.0)
        ),
    )


def alerts_by_severity(events: Sequence[AlertEvent]) -> dict[str, int]:
    """Active (raise) events counted per severity, every severity named."""
    counts = dict.fromkeys(SEVERITY_ORDER, 0)
    for event in events:
        if event.state == "raised":
            counts[event.severity] = counts.get(event.severity, 0) + 1
    return counts


class ScanStatusCache:
    """The status of each scan a daemon has handled, its store read again only when its
    count of committed lines changed (a finished scan is read once).

    Parameters
    ----------
    output_root : Path
        Where the scans' stores are.
    """

    def __init__(self, output_root: Path) -> None:
        self.output_root = Path(output_root)
        self._cache: dict[str, tuple[tuple[int, int], ScanStatus]] = {}

    def statuses(self, progress: Mapping[str, tuple[int, int]]) -> list[ScanStatus]:
        """The status of each scan of ``progress`` (scan id → (lines committed, lines
        planned)), in its order; a store that cannot be read now is left out."""
        out = []
        for scan_id, counts in progress.items():
            cached = self._cache.get(scan_id)
            if cached is None or cached[0] != counts:
                try:
                    status = scan_status(store_path(self.output_root, scan_id))
                except (NotAScanStore, StoreError, OSError):
                    self._cache.pop(scan_id, None)
                    continue
                cached = (counts, status)
                self._cache[scan_id] = cached
            out.append(cached[1])
        return out


def write_metrics_file(path: Path, snapshot: MetricsSnapshot) -> None:
    """Replace ``path`` with the snapshot's text atomically (same folder, then rename).

    Raises
    ------
    OSError
        If it cannot be written (the caller logs it and carries on).
    """
    write_text_atomic(path, metrics_text(snapshot))
