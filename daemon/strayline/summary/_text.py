"""Words and numbers of the summary, shared by its HTML and its Markdown (pure)."""

from __future__ import annotations

from collections.abc import Mapping
from datetime import datetime, tzinfo

from strayline._numbers import duration_text, percent_text, plain_number, signed_text
from strayline.alerts import AlertEvent
from strayline.summary.page import ScanSummary

__all__ = [
    "alert_where",
    "confidence",
    "fit_yield",
    "moment",
    "pace",
    "progress",
    "traces",
]


def moment(when: datetime | None, tz: tzinfo | None) -> str:
    """ISO 8601 to the second with its offset, in ``tz`` (None: this machine's zone)."""
    return "n/a" if when is None else when.astimezone(tz).isoformat(timespec="seconds")


def progress(scan: ScanSummary) -> str:
    """``48 of 48 lines (complete)``, ``30 of 48 lines, +12 backward``."""
    fwd, bwd = scan.lines_done.get("forward", 0), scan.lines_done.get("backward", 0)
    text = f"{fwd} of {scan.n_lines_planned} lines"
    if bwd:
        text += f", +{bwd} backward"
    return text + (" (complete)" if scan.complete else "")


def pace(scan: ScanSummary) -> str:
    """``2 h 5 min, 23 lines/h`` (first line to last, average rate)."""
    if scan.duration_s is None:
        return "no line yet"
    rate = (
        f", {plain_number(scan.rate_lines_per_h)} lines/h"
        if scan.rate_lines_per_h is not None
        else ", rate n/a (one line)"
    )
    return duration_text(scan.duration_s) + rate


def fit_yield(fractions: Mapping[str, float]) -> str:
    """``OK 97.3 %, merged 1.2 %, no resonance 1.5 %``: OK first, then the other statuses
    that occur, largest first (to 0.1 %)."""
    ok = fractions.get("ok", 0.0)
    others = sorted(
        ((name, value) for name, value in fractions.items() if name != "ok" and value > 0),
        key=lambda item: -item[1],
    )
    parts = [f"OK {_share(ok)}"]
    parts += [f"{name.replace('_', ' ')} {_share(v)}" for name, v in others]
    return ", ".join(parts)


def _share(fraction: float) -> str:
    """A fraction to 0.1 %, never rounded to 0 or to 100 when it is not: ``< 0.1 %``."""
    if 0.0 < fraction < 0.0005:
        return "< 0.1 %"
    if 0.9995 <= fraction < 1.0:
        return "> 99.9 %"
    return percent_text(fraction, digits=1)


def traces(scan: ScanSummary) -> list[tuple[str, str]]:
    """(direction, fit yield) per trace with committed lines."""
    return [(d, fit_yield(f)) for d, f in scan.fit_fractions.items()]


def alert_where(event: AlertEvent) -> tuple[str, str]:
    """(line, pixels) of an alert: ``27`` or ``27 bwd``, ``32–63``; empty when none."""
    line = ""
    if event.line_index is not None:
        line = str(event.line_index) + (" bwd" if event.direction == "backward" else "")
    pixels = ""
    if event.pixel_range is not None:
        first, last = event.pixel_range[0], event.pixel_range[1] - 1
        pixels = str(first) if last <= first else f"{first}–{last}"
    return line, pixels


def confidence(event: AlertEvent) -> str:
    """The robust z against the baseline, as the alert line gives it (empty: none)."""
    z = event.confidence_z
    if z is None:
        return ""
    return signed_text(z, 1 if abs(z) < 100 else 0)
