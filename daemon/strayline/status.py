"""``strayline status``: per scan, lines done of planned, rate, ETA, failures, last alerts.

Reads the stores and the alert log only (never takes the ledger's lock), so it is safe to
run while the daemon writes. A folder that is not (yet) a readable store is skipped, and an
alert log that cannot be parsed is reported in place of the alerts, never fatal.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import asdict, dataclass, replace
from datetime import UTC, datetime, timedelta, tzinfo
from itertools import pairwise
from pathlib import Path
from typing import Any

from strayline._numbers import duration_text, median
from strayline.alerts import AlertEvent, format_alert, read_alert_log
from strayline.fit import failed_fits
from strayline.lines import DIRECTIONS, NOTE_SUFFIX, QUARANTINE_DIR, line_key_from_name
from strayline.store import STATUS_FILL, LedgerState, NotAScanStore, open_store_reader

__all__ = ["ScanStatus", "format_scan_status", "scan_status", "scan_statuses"]

_RATE_WINDOW = 20  # commits used for the rate estimate (recent pace, not the average)
_ALERTS_SHOWN = 3  # latest alert lines per scan


@dataclass(frozen=True)
class ScanStatus:
    """One scan's progress as read from its store.

    Attributes
    ----------
    scan_id : str
    store : Path
    n_lines_planned : int
    lines_done : dict[str, int]
        Committed lines per direction.
    rate_lines_per_h : float or None
        Recent commit rate of the busiest direction (None with fewer than two commits).
    eta : datetime or None
        When the busiest direction should be complete at that rate.
    last_commit : datetime or None
    pixels_failed : int
        Pixels of committed lines whose fit status is not OK.
    pixels_done : int
    last_alerts : tuple of str
        The scan's latest alert lines, readable.
    last_events : tuple of AlertEvent
        The same alerts as records (what ``status --json`` gives).
    held : tuple of str
        Line files in the scan's folder whose line is not in the store yet (being
        written, waiting to settle, or one that will never open), by name.
    quarantined : int
        Files of the scan's folder set aside in its quarantine.
    first_commit : datetime or None
        When the scan's first line was committed (the start of its duration).
    line_period_s : float or None
        The scan's own pace: the median time between its recent line commits, s (None
        with fewer than two at distinct times).
    """

    scan_id: str
    store: Path
    n_lines_planned: int
    lines_done: dict[str, int]
    rate_lines_per_h: float | None
    eta: datetime | None
    last_commit: datetime | None
    pixels_failed: int
    pixels_done: int
    last_alerts: tuple[str, ...]
    held: tuple[str, ...] = ()
    quarantined: int = 0
    last_events: tuple[AlertEvent, ...] = ()
    first_commit: datetime | None = None
    line_period_s: float | None = None

    def as_json_dict(self) -> dict[str, Any]:
        """Plain JSON-ready values (times as ISO 8601 strings, the store as a string; the
        last alerts as the alert log's records, not as text)."""
        data = asdict(self)
        data["store"] = str(self.store)
        for key in ("eta", "last_commit", "first_commit"):
            value = data[key]
            data[key] = value.isoformat() if value is not None else None
        data["last_alerts"] = [json.loads(event.to_json()) for event in self.last_events]
        del data["last_events"]
        data["held"] = list(self.held)
        return data


def _commit_times(state: LedgerState, direction: str) -> list[datetime]:
    return sorted(e.processed_time for e in state.committed.values() if e.direction == direction)


def scan_status(store_path: Path, alerts: Sequence[AlertEvent] | None = None) -> ScanStatus:
    """Read one store's progress (and the scan's last alerts from ``alerts``).

    The rate counts the last :data:`_RATE_WINDOW` commits of the direction with the most
    commits: (commits − 1) / (time from the first to the last of them). The ETA adds the
    remaining lines of that direction at that rate to the last commit.

    Raises
    ------
    NotAScanStore
        If ``store_path`` is not (yet) a readable scan store.
    StoreError
        If the ledger exists but cannot be read, or a map is missing.
    """
    reader = open_store_reader(store_path)
    scan_id = reader.scan_id
    n_planned = reader.n_lines_planned
    state = reader.ledger
    done: dict[str, int] = {d: sum(1 for (_, dd) in state.committed if dd == d) for d in DIRECTIONS}
    busiest = max(DIRECTIONS, key=lambda d: done[d])
    every = _commit_times(state, busiest)
    # the last _RATE_WINDOW commits, reaching further back while they share one time (a
    # group commit stamps its lines alike)
    start = max(len(every) - _RATE_WINDOW, 0)
    while start > 0 and every[start] == every[-1]:
        start -= 1
    times = every[start:]
    rate = None
    eta = None
    steps = [(b - a).total_seconds() for a, b in pairwise(times) if b > a]
    period_s = median(steps) if steps else None
    if len(times) >= 2 and times[-1] > times[0]:
        span_h = (times[-1] - times[0]).total_seconds() / 3600.0
        rate = (len(times) - 1) / span_h
        remaining = n_planned - done[busiest]
        eta = times[-1] + timedelta(hours=remaining / rate)
    failed = 0
    pixels = 0
    for direction in DIRECTIONS:
        if done[direction] == 0:
            continue
        status = reader.read_array("status", direction)
        written = status != STATUS_FILL
        pixels += int(written.sum())
        failed += int((written & failed_fits(status)).sum())
    events = tuple(e for e in (alerts or ()) if e.scan_id == scan_id)[-_ALERTS_SHOWN:]
    lines = tuple(format_alert(e) for e in events)
    held, quarantined = _scan_folder(state)
    return ScanStatus(
        scan_id=scan_id,
        store=store_path,
        n_lines_planned=n_planned,
        lines_done=done,
        rate_lines_per_h=rate,
        eta=eta,
        last_commit=state.last_commit_time,
        pixels_failed=failed,
        pixels_done=pixels,
        last_alerts=lines,
        held=held,
        quarantined=quarantined,
        last_events=events,
        first_commit=min((e.processed_time for e in state.committed.values()), default=None),
        line_period_s=period_s,
    )


def _scan_folder(state: LedgerState) -> tuple[tuple[str, ...], int]:
    """(line files not yet in the store, files in quarantine) of the folder the scan's
    latest committed line came from; nothing where that folder cannot be listed."""
    entries = sorted(state.committed.values(), key=lambda e: e.processed_time)
    if not entries:
        return (), 0
    folder = Path(entries[-1].source).parent
    try:
        names = sorted(e.name for e in folder.iterdir() if e.is_file())
        quarantine = folder / QUARANTINE_DIR
        quarantined = (  # one note per file set aside, whatever its layout
            sum(1 for e in quarantine.iterdir() if e.name.endswith(NOTE_SUFFIX))
            if quarantine.is_dir()
            else 0
        )
    except OSError:
        return (), 0
    held = []
    for name in names:
        index, direction = line_key_from_name(name)
        if index is not None and (index, direction or "forward") not in state.committed:
            held.append(name)
    return tuple(held), quarantined


def scan_statuses(output_root: Path, alert_log: Path | None = None) -> list[ScanStatus]:
    """Every store under ``output_root``, most recently active first.

    A ``*.zarr`` folder that is not a readable scan store (being created, or something
    else) is skipped. An alert log that cannot be parsed gives every scan one line saying
    so instead of its alerts.
    """
    problem: str | None = None
    alerts: list[AlertEvent] = []
    if alert_log is not None:
        try:
            alerts = read_alert_log(alert_log)
        except ValueError as error:
            problem = f"(alert log {alert_log} unreadable: {error})"
    out = []
    for path in sorted(Path(output_root).glob("*.zarr")):
        if not path.is_dir():
            continue
        try:
            status = scan_status(path, alerts)
        except NotAScanStore:
            continue
        if problem is not None:
            status = replace(status, last_alerts=(problem,))
        out.append(status)
    epoch = datetime.min.replace(tzinfo=UTC)
    out.sort(key=lambda s: s.last_commit or epoch, reverse=True)
    return out


def _period_text(seconds: float) -> str:
    """A line period: ``0.5 s`` below ten seconds, else as :func:`duration_text`."""
    return f"{seconds:.1f} s" if seconds < 10 else duration_text(seconds)


def format_scan_status(
    status: ScanStatus, now: datetime | None = None, *, tz: tzinfo | None = None
) -> str:
    """A few readable lines for one scan; ``now`` (default: the clock) dates the last line
    and tells a scan that stalled or stopped: no line for more than two of its own line
    periods, or (without a pace) its ETA passed without its lines. Times are given in
    ``tz`` (default: this machine's zone) with their offset."""
    now = now if now is not None else datetime.now(UTC)
    fwd, bwd = status.lines_done["forward"], status.lines_done["backward"]
    traces = f"{fwd}/{status.n_lines_planned} lines" + (f" (+{bwd} backward)" if bwd else "")
    rate = f"{status.rate_lines_per_h:.0f} lines/h" if status.rate_lines_per_h else "rate n/a"
    complete = fwd >= status.n_lines_planned
    eta = (
        f"ETA {status.eta.astimezone(tz).isoformat(timespec='minutes')}"
        if status.eta and not complete
        else ("complete" if complete else "ETA n/a")
    )
    last = (
        f"last line {duration_text((now - status.last_commit).total_seconds())} ago"
        if status.last_commit is not None
        else ""
    )
    failed = (
        f"{status.pixels_failed} of {status.pixels_done} pixel fits failed "
        f"({status.pixels_failed / status.pixels_done:.1%})"
        if status.pixels_done
        else ""
    )
    parts = [traces, rate, eta, last, failed]
    out = [f"{status.scan_id}: " + ", ".join(part for part in parts if part)]
    silent_s = (now - status.last_commit).total_seconds() if status.last_commit else 0.0
    if not complete and status.line_period_s and silent_s > 2 * status.line_period_s:
        out.append(
            f"  no line for {duration_text(silent_s)} (lines came every "
            f"{_period_text(status.line_period_s)}): the scan stalled or stopped"
        )
    elif not complete and status.eta is not None and status.eta < now:
        out.append(
            f"  the ETA passed {duration_text((now - status.eta).total_seconds())} ago with "
            f"{status.n_lines_planned - fwd} line(s) to go: the scan stalled or stopped"
        )
    if status.held:
        shown = ", ".join(status.held[:3]) + (" …" if len(status.held) > 3 else "")
        out.append(f"  {len(status.held)} line file(s) not in the store yet: {shown}")
    if status.quarantined:
        out.append(f"  {status.quarantined} file(s) in quarantine")
    alerts = [format_alert(e, tz=tz) for e in status.last_events] or status.last_alerts
    out.extend(f"  {line}" for line in alerts)
    return "\n".join(out)
