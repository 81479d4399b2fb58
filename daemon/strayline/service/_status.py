"""The one-line status the service sends to systemd (``systemctl status``), as a pure
function of what the service knows."""

from __future__ import annotations

from pathlib import Path

from strayline._numbers import MIB
from strayline.alerts import AlertEvent
from strayline.pipeline import PipelineStatistics
from strayline.service._guards import DiskGuard, Outage
from strayline.watch import WatchStatistics

__all__ = ["status_text"]


def status_text(
    *,
    outage: Outage | None,
    held: int,
    disk: DiskGuard,
    watch: WatchStatistics,
    watch_root: Path,
    progress: dict[str, tuple[int, int]],
    stats: PipelineStatistics | None,
    last_alert: AlertEvent | None,
) -> str:
    """Scan, line, queue, last alert and troubles, comma-separated, troubles first."""
    parts = []
    if outage is not None:
        parts.append(
            f"OUTPUT FAILING ({outage.reason}); {held} files held, retry {outage.attempts + 1}"
        )
    if disk.low:
        free_mib = (disk.last_free_bytes or 0) / MIB
        parts.append(f"DISK LOW ({free_mib:.0f} MiB free): raw spectra off")
    if not watch.watch_root_present:
        parts.append(f"waiting for watch root {watch_root}")
    if stats is not None and stats.last_scan_id in progress:
        done, planned = progress[stats.last_scan_id]
        parts.append(
            f"scan {stats.last_scan_id}: line {stats.last_line_index}, {done}/{planned} done"
        )
        if len(progress) > 1:
            parts.append(f"{len(progress) - 1} more scans open")
    elif progress:
        parts.append(f"{len(progress)} scans open")
    else:
        parts.append("waiting for lines")
    parts.append(f"queue {watch.candidates_pending + held}")
    if last_alert is not None:
        a = last_alert
        where = a.scan_id if a.line_index is None else f"{a.scan_id} line {a.line_index}"
        parts.append(f"last alert {a.time[11:19]} {a.rule} {a.state} ({where})")
    else:
        parts.append("no alerts")
    return ", ".join(parts)
