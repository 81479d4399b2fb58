"""What is settled once per scan when its first line arrives: the profile-resolved config,
the fit model, how D is found for each line, the store, the metrics memory.

Pure functions of the config (and the scan's first line) plus :class:`ScanContext`, the
record the pipeline keeps per open scan, so the per-line path never branches on
configuration.
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, Literal

from strayline import __version__
from strayline.alerts import AlertEvent
from strayline.config import Config
from strayline.errors import ConfigError
from strayline.fit import FitModel
from strayline.lines import ScanLine
from strayline.physics import D_ROOM_HZ, zfs_hz
from strayline.rules import MetricsTracker
from strayline.store import ScanStore

__all__ = [
    "MAX_OPEN_SCANS",
    "PROFILE_RULE",
    "ScanContext",
    "fit_model_from_config",
    "no_products",
    "profile_event",
    "progress_of",
    "scan_complete",
    "store_config",
    "zfs_rule",
]


#: Rule name of the warning raised when a scan's profile cannot be used.
PROFILE_RULE = "profile_unusable"


#: Scans kept open at once: each holds its ledger's descriptor and lock. Older ones are
#: closed (a late line reopens its scan), so a daemon running for weeks does not collect
#: one descriptor per scan.
MAX_OPEN_SCANS = 4


def progress_of(store: ScanStore) -> tuple[int, int]:
    stats = store.statistics()
    return stats.committed_forward + stats.committed_backward, stats.n_lines_planned


def scan_complete(store: ScanStore) -> bool:
    """Whether a scan's last planned line is committed: the last forward line and, if
    the scan has a backward trace at all, its last line too (an instrument writing trace
    and retrace finishes with the retrace of the last line)."""
    committed = store.committed()
    last = store.n_lines_planned - 1
    if (last, "forward") not in committed:
        return False
    return (last, "backward") in committed or all(d != "backward" for _, d in committed)


def fit_model_from_config(config: Config) -> FitModel:
    """The :class:`FitModel` that ``config.fit`` asks for (SI units).

    A one-sided centre window (only ``fit.center_min_mhz`` or only ``center_max_mhz``)
    gets an infinite other side. :func:`~strayline.fit.fit_line` intersects the window with
    each line's frequency grid, so the open side becomes that line's grid edge, line by
    line, and the model stays one constant per scan (no per-line work, no branching).
    """
    fit = config.fit
    lo, hi = fit.center_min_hz, fit.center_max_hz
    centers = (
        None
        if lo is None and hi is None
        else (-math.inf if lo is None else lo, math.inf if hi is None else hi)
    )
    return FitModel(
        n_dips=fit.n_dips,
        shared_width=fit.shared_width,
        hyperfine=fit.hyperfine,
        fit_slope=fit.fit_slope,
        fwhm_bounds_hz=(fit.fwhm_min_hz, fit.fwhm_max_hz),
        contrast_bounds=(0.0, fit.contrast_max),
        center_bounds_hz=centers,
        weighting=fit.weighting,
        max_iter=fit.max_iter,
        min_counts=fit.min_counts,
        transverse_field_max_t=fit.transverse_field_max_mt * 1e-3,
    )


@dataclass
class ScanContext:
    """Everything settled once for one scan: config, fit model, store, metrics memory."""

    scan_id: str
    profile: str | None
    config: Config
    fit_model: FitModel
    zfs_for: Callable[[ScanLine], float]
    sign: float
    branch: Literal["upper", "lower"]
    store: ScanStore
    tracker: MetricsTracker
    reopen: Callable[[bool], ScanStore]
    after_commit: Callable[[ScanContext, ScanLine], None]
    lines_written: int = 0
    products_done: bool = False


def zfs_rule(config: Config) -> Callable[[ScanLine], float]:
    """How a scan gets D for each line, settled once from ``config.field``.

    ``field.zfs_hz`` set: that value. Else ``field.temperature_k`` set: D(T) of that
    temperature, computed once. Else D(T) of each line file's temperature, and the room
    value :data:`~strayline.physics.constants.D_ROOM_HZ` for a file without one.
    """
    if config.field.zfs_hz is not None:
        fixed = float(config.field.zfs_hz)
    elif config.field.temperature_k is not None:
        fixed = float(zfs_hz(config.field.temperature_k))
    else:
        return _zfs_of_line
    return lambda _line: fixed


def no_products(scan: ScanContext, line: ScanLine) -> None:
    """Products are turned off for this scan (``products.enabled: false``)."""


def _zfs_of_line(line: ScanLine) -> float:
    return D_ROOM_HZ if line.temperature_k is None else float(zfs_hz(line.temperature_k))


def profile_event(
    line: ScanLine,
    profile: str,
    error: ConfigError,
    available: tuple[str, ...],
    now: datetime,
) -> AlertEvent:
    """The warning alert for a scan whose profile cannot be used (base config instead).

    Parameters
    ----------
    line : ScanLine
        The scan's first line seen by this daemon.
    profile : str
        The profile the line file or the folder rules asked for.
    error : ConfigError
        Why it cannot be used (unknown, invalid overlay).
    available : tuple of str
        The profiles that exist.
    now : datetime
        Aware time of the decision.
    """
    listing = ", ".join(available) if available else "none"
    return AlertEvent(
        time=now.astimezone(UTC).isoformat(timespec="milliseconds"),
        scan_id=line.scan_id,
        rule=PROFILE_RULE,
        severity="warning",
        state="raised",
        line_index=line.line_index,
        direction=line.direction,
        message=(
            f"profile {profile!r} cannot be used ({error}); the scan is processed with the "
            f"base config; available profiles: {listing}"
        ),
        advice=(
            "fix the profile name in the acquisition software or the profile file, then "
            "reprocess the scan if its settings matter"
        ),
    )


def store_config(config: Config, profile: str | None) -> dict[str, Any]:
    data = config.as_json_dict()
    data["_profile"] = profile
    data["_software_version"] = __version__
    data["_host_pid"] = os.getpid()
    return data
