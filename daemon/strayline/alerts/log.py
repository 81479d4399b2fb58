"""The alert log read back: parse it, format one event, print and follow it (``alerts``)."""

from __future__ import annotations

import math
import re
import sys
import threading
import time
from datetime import UTC, datetime, timedelta, tzinfo
from os import PathLike
from pathlib import Path
from typing import TextIO

from strayline._numbers import signed_text
from strayline.alerts.event import AlertEvent

__all__ = [
    "ALERT_LINE_MAX",
    "SEVERITY_ORDER",
    "active_now",
    "follow_alerts",
    "format_alert",
    "parse_since",
    "printable",
    "read_alert_log",
]

#: Alert severities, least urgent first (``alerts --severity`` keeps this one and above).
SEVERITY_ORDER = ("info", "warning", "critical")
#: The most characters of one readable alert line (:func:`format_alert`).
ALERT_LINE_MAX = 160
_SCAN_ID_MAX = 32  # a longer scan id is cut in the readable line (never in the JSON)
_Z_SHOWN_MAX = 999.5  # |z| shown as a number up to 999
_SEVERITY_MARK = {"info": "INFO", "warning": "WARN", "critical": "CRIT"}

_SPAN = re.compile(r"(\d+(?:\.\d+)?)\s*([smhd])")
_SPAN_WHOLE = re.compile(r"\s*(?:\d+(?:\.\d+)?\s*[smhd]\s*)+")
_UNIT_S = {"s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0}


def active_now(events: list[AlertEvent]) -> list[AlertEvent]:
    """The raise events not cleared since, one per (scan, rule), oldest first: what is
    wrong right now, as far as the alert log knows."""
    last: dict[tuple[str, str], AlertEvent] = {}
    for event in events:
        last[(event.scan_id, event.rule)] = event
    return [e for e in sorted(last.values(), key=lambda e: e.datetime) if e.state == "raised"]


def parse_since(text: str, now: datetime) -> datetime:
    """The time ``--since`` names: an ISO 8601 time (without a zone: UTC), or a span back
    from ``now`` such as ``90s``, ``30m``, ``1h``, ``2d`` or ``1h30m``.

    Raises
    ------
    ValueError
        Naming what was expected and what was found.
    """
    if _SPAN_WHOLE.fullmatch(text):
        seconds = sum(float(n) * _UNIT_S[u] for n, u in _SPAN.findall(text))
        return now - timedelta(seconds=seconds)
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        raise ValueError(
            "--since must be an ISO 8601 time such as 2026-03-01T22:00:00Z or a span back "
            f"from now such as 30m, 1h, 2d or 1h30m; found {text!r}"
        ) from None
    return moment if moment.tzinfo is not None else moment.replace(tzinfo=UTC)


def read_alert_log(
    path: str | PathLike[str],
    *,
    scan_id: str | None = None,
    since: datetime | None = None,
    bad_lines: list[str] | None = None,
) -> list[AlertEvent]:
    """Events from an alert log, oldest first, optionally one scan's or since a time.

    Blank lines and a partial last line (being written) are skipped; any other line that
    is not an event raises ``ValueError`` naming the file and line number, or, when a
    ``bad_lines`` list is given, is skipped with that message appended to it.
    """
    p = Path(path)
    if not p.exists():
        return []
    lines = p.read_text(encoding="utf-8").split("\n")
    out = []
    for number, text in enumerate(lines, start=1):
        if not text.strip():
            continue
        try:
            event = AlertEvent.from_json(text)
        except (ValueError, KeyError, TypeError) as exc:
            if number == len(lines):  # no newline yet: a writer is mid-line
                continue
            problem = (
                f"{p.name}: line {number} must be one alert event as JSON; found "
                f"{text[:60]!r} ({exc.__class__.__name__})"
            )
            if bad_lines is None:
                raise ValueError(problem) from None
            bad_lines.append(problem)
            continue
        if scan_id is not None and event.scan_id != scan_id:
            continue
        if since is not None and event.datetime < since:
            continue
        out.append(event)
    return out


def printable(text: str) -> str:
    """``text`` safe for a terminal: every character that does not print (control codes
    such as ESC, which could recolour or rewrite the screen, line breaks, bidirectional
    overrides) shown as its escape, e.g. ``\\x1b``."""
    if text.isprintable():
        return text
    return "".join(ch if ch.isprintable() else ascii(ch)[1:-1] for ch in text)


def _identity(path: Path) -> tuple[int, int] | None:
    """(device, inode) of the file at ``path``, None when there is none."""
    try:
        st = path.stat()
    except FileNotFoundError:
        return None
    return st.st_dev, st.st_ino


def _clip(text: str, room: int) -> str:
    """``text`` cut to ``room`` characters, the cut marked with an ellipsis."""
    if len(text) <= room:
        return text
    return text[: max(room - 1, 0)].rstrip() + "…" if room > 0 else ""


def format_alert(event: AlertEvent, *, tz: tzinfo | None = None) -> str:
    """One line for a terminal, at most :data:`ALERT_LINE_MAX` characters::

        2026-03-02T00:14:05+01:00 CRIT film-7 line 27 px 32–63 resonance_jump: tip crash
        suspected: PL −30 % since line 26 (z −12.4)

    (one line; wrapped here): the time in ``tz`` (default: this machine's zone) as ISO
    8601 with its offset, the severity (``cleared`` after it when the event clears an
    alert; a raise has no word of its own), where (scan, line, ``bwd`` for
    the backward trace, pixel range) once, the rule, what was seen, and the robust z
    against the baseline when the event has one. A message too long for the line is cut
    with "…" (``alerts --json`` has all of it, and the advice). Safe to print to a
    terminal (:func:`printable`: a scan id may come from a folder name).
    """
    when = event.datetime.astimezone(tz).isoformat(timespec="seconds")
    mark = _SEVERITY_MARK.get(event.severity, event.severity.upper()[:4])
    state = "" if event.state == "raised" else " cleared"
    where = [_clip(printable(event.scan_id), _SCAN_ID_MAX)]
    if event.line_index is not None:
        where.append(f"line {event.line_index}" + (" bwd" if event.direction == "backward" else ""))
    if event.pixel_range is not None:
        first, last = event.pixel_range[0], event.pixel_range[1] - 1
        where.append(f"px {first}" if last <= first else f"px {first}–{last}")
    head = f"{when} {mark}{state} {' '.join(where)} {printable(event.rule)}: "
    tail = ""
    z = event.confidence_z
    if z is not None and math.isfinite(z):
        if abs(z) < _Z_SHOWN_MAX:
            tail = f" (z {signed_text(z, 1 if abs(z) < 100 else 0)})"
        else:  # far beyond any threshold; the exact figure is in --json
            tail = f" (z {'> +' if z > 0 else '< −'}999)"
    room = ALERT_LINE_MAX - len(head) - len(tail)
    return head + _clip(printable(event.message.strip()), room) + tail


def follow_alerts(
    path: str | PathLike[str],
    *,
    scan_id: str | None = None,
    since: str | datetime | None = None,
    severity: str | None = None,
    active: bool = False,
    as_json: bool = False,
    follow: bool = False,
    last: int = 20,
    tz: tzinfo | None = None,
    poll_s: float = 0.5,
    out: TextIO | None = None,
    stop: threading.Event | None = None,
) -> int:
    """Print the last ``last`` alerts (readable, or the stored JSON lines), then optionally
    keep printing new ones until interrupted; returns a process exit code.

    ``since`` is an ISO 8601 time (a time without zone is taken as UTC) or a span back
    from now (:func:`parse_since`); ``severity`` keeps that severity and the more urgent
    ones (:data:`SEVERITY_ORDER`); ``active`` keeps only the alerts raised and not cleared
    since (:func:`active_now`); ``tz`` is the zone of the readable times (default: this
    machine's). ``stop`` ends following (tests); Ctrl-C ends it too. A
    bad ``since`` or ``severity`` prints the problem and returns 2; a ``scan_id`` the log
    has no alert of says so, lists the scans it has, and returns 1 (unless following).
    """
    stream = out if out is not None else sys.stdout
    since_dt: datetime | None
    if isinstance(since, str):
        try:
            since_dt = parse_since(since, datetime.now(UTC))
        except ValueError as error:
            print(str(error), file=sys.stderr)
            return 2
    else:
        since_dt = since
    if since_dt is not None and since_dt.tzinfo is None:
        since_dt = since_dt.replace(tzinfo=UTC)
    if severity is not None and severity not in SEVERITY_ORDER:
        print(
            f"--severity must be one of {', '.join(SEVERITY_ORDER)}; found {severity!r}",
            file=sys.stderr,
        )
        return 2
    wanted = set(SEVERITY_ORDER[SEVERITY_ORDER.index(severity or "info") :])

    def show(event: AlertEvent) -> None:
        stream.write((event.to_json() if as_json else format_alert(event, tz=tz)) + "\n")

    p = Path(path)
    bad: list[str] = []
    everything = read_alert_log(p, since=since_dt, bad_lines=bad)
    for problem in bad:  # a torn or foreign line costs that line, not the whole log
        print(f"strayline: skipped {printable(problem)}", file=sys.stderr)
    events = [
        e
        for e in (active_now(everything) if active else everything)
        if (scan_id is None or e.scan_id == scan_id) and e.severity in wanted
    ]
    if active and not events and not follow:
        print("strayline: no alert is raised now", file=sys.stderr)
    for event in events[-last:] if last > 0 else []:
        show(event)
    stream.flush()
    if scan_id is not None and not any(e.scan_id == scan_id for e in everything) and not follow:
        scans = sorted({e.scan_id for e in everything if e.scan_id != "*"})
        known = ", ".join(scans[-10:]) if scans else "none"
        when = "" if since_dt is None else " in that time"
        print(
            printable(
                f"strayline: no alerts for scan {scan_id!r}{when} in {p} (scans with "
                f"alerts: {known})"
            ),
            file=sys.stderr,
        )
        return 1
    if not follow:
        return 0
    identity = _identity(p)
    offset = p.stat().st_size if identity is not None else 0
    pending = b""
    try:
        while not (stop is not None and stop.is_set()):
            now = _identity(p)
            size = p.stat().st_size if now is not None else 0
            # Rotated (another file at the path, however large it grew meanwhile) or
            # truncated: start again from its beginning.
            if now != identity or size < offset:
                identity, offset, pending = now, 0, b""
            if size > offset:
                with open(p, "rb") as fh:
                    fh.seek(offset)
                    data = fh.read()
                offset += len(data)
                *complete, pending = (pending + data).split(b"\n")
                for raw in complete:
                    text = raw.decode("utf-8", "replace")
                    if not text.strip():
                        continue
                    try:
                        event = AlertEvent.from_json(text)
                    except (ValueError, KeyError, TypeError):
                        continue
                    if scan_id is not None and event.scan_id != scan_id:
                        continue
                    if since_dt is not None and event.datetime < since_dt:
                        continue
                    if event.severity not in wanted:
                        continue
                    show(event)
                stream.flush()
            if stop is not None:
                stop.wait(poll_s)
            else:
                time.sleep(poll_s)
    except KeyboardInterrupt:
        pass
    return 0
