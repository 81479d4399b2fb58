"""The alerts the service raises itself (output unavailable, disk space low), as pure
builders: what is said, and the event that says it. The service decides when."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from strayline._numbers import duration_text
from strayline.alerts import AlertEvent

__all__ = [
    "ServiceAlert",
    "disk_low_cleared",
    "disk_low_raised",
    "output_unavailable_cleared",
    "output_unavailable_raised",
    "service_event",
]


@dataclass(frozen=True)
class ServiceAlert:
    """What one service alert says; ``seen`` is (value, limit, unit) where one applies."""

    rule: str
    state: Literal["raised", "cleared"]
    message: str
    advice: str
    seen: tuple[float, float, str] | None = None


def output_unavailable_raised(output_root: Path, reason: str) -> ServiceAlert:
    return ServiceAlert(
        "output_unavailable",
        "raised",
        message=(
            f"cannot write results: {reason}"
            if str(output_root) in reason  # the reason names the folder already
            else f"cannot write below {output_root}: {reason}"
        ),
        advice=(
            "live maps and fault alerts are paused, line files are kept and retried; "
            "check that the output folder exists, is writable and its disk is mounted "
            "and not full; processing resumes by itself"
        ),
    )


def output_unavailable_cleared(output_root: Path, down_s: float) -> ServiceAlert:
    return ServiceAlert(
        "output_unavailable",
        "cleared",
        message=(f"writing below {output_root} again after {duration_text(down_s)}; catching up"),
        advice="",
    )


def disk_low_raised(
    output_root: Path, free_mib: float, floor_mib: float, clear_mib: float
) -> ServiceAlert:
    return ServiceAlert(
        "disk_space_low",
        "raised",
        message=(
            f"free space for {output_root} is {free_mib:.0f} MiB, below "
            f"service.min_free_disk_mib = {floor_mib:.0f} MiB"
        ),
        advice=(
            "raw spectra are no longer stored (field maps still are); free space on that "
            f"disk or move finished scans away; raw spectra are stored again above "
            f"{clear_mib:.0f} MiB free"
        ),
        seen=(free_mib, floor_mib, "MiB"),
    )


def disk_low_cleared(output_root: Path, free_mib: float, floor_mib: float) -> ServiceAlert:
    return ServiceAlert(
        "disk_space_low",
        "cleared",
        message=(
            f"free space for {output_root} is {free_mib:.0f} MiB again; raw spectra are "
            "stored as configured"
        ),
        advice="",
        seen=(free_mib, floor_mib, "MiB"),
    )


def service_event(alert: ServiceAlert, *, scan_id: str, time_text: str) -> AlertEvent:
    """The critical :class:`AlertEvent` of a service alert, for ``scan_id`` at ``time_text``."""
    seen = alert.seen
    return AlertEvent(
        time=time_text,
        scan_id=scan_id,
        rule=alert.rule,
        severity="critical",
        state=alert.state,
        seen_value=None if seen is None else seen[0],
        seen_unit="" if seen is None else seen[2],
        baseline_value=None if seen is None else seen[1],
        message=alert.message,
        advice=alert.advice,
    )
