"""Resource guards of the service: free disk space, output outages, unreadable inputs.

Private helpers of :mod:`strayline.service` (plain state and checks; the service decides
what to alert and when to retry).
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from strayline._numbers import MIB
from strayline.watch import ReadyFile

__all__ = [
    "RESOURCE_CHECK_INTERVAL_S",
    "RETRY_FIRST_S",
    "RETRY_MAX_S",
    "SERVICE_RULES",
    "UNREADABLE_ATTEMPTS",
    "DiskGuard",
    "Outage",
    "Unreadable",
    "UnreadableFiles",
    "free_disk_bytes",
    "total_disk_bytes",
]

#: Output folder and free space are looked at no more often than this, s.
RESOURCE_CHECK_INTERVAL_S = 5.0
#: First retry after an output failure, s; doubled after each failed retry up to the cap.
RETRY_FIRST_S = 1.0
RETRY_MAX_S = 60.0
#: A line file that cannot be read (not a store failure) is retried this many times.
UNREADABLE_ATTEMPTS = 6
#: Rules of the alerts the service raises itself (the rule engine raises the others).
SERVICE_RULES = ("disk_space_low", "output_unavailable")

# --------------------------------------------------------------------------- disk space


def free_disk_bytes(folder: Path) -> int:
    """Bytes an unprivileged writer may still use on the file system of ``folder``.

    ``f_bavail * f_frsize`` from statvfs(3) (blocks free to non-root users times the
    fundamental block size). Raises OSError if ``folder`` cannot be looked at.
    """
    st = os.statvfs(folder)
    return st.f_bavail * st.f_frsize


def total_disk_bytes(folder: Path) -> int:
    """Size of the file system of ``folder``, bytes (``f_blocks * f_frsize``, statvfs(3))."""
    st = os.statvfs(folder)
    return st.f_blocks * st.f_frsize


def _nearest_existing(folder: Path) -> Path:
    """``folder`` or its closest existing ancestor (the disk it will be created on)."""
    for candidate in (folder, *folder.parents):
        if candidate.is_dir():
            return candidate
    return folder


class DiskGuard:
    """Free space of the output root against a floor, with hysteresis.

    Parameters
    ----------
    folder : Path
        The output root (measured on its closest existing ancestor while it is missing).
    min_free_bytes : int
        Below this the guard turns low.
    free_bytes : callable, optional
        ``free_bytes(folder) -> int`` (default :func:`free_disk_bytes`); tests inject one.
    disk_bytes : callable, optional
        ``disk_bytes(folder) -> int``, the disk's size (default :func:`total_disk_bytes`).
    low : bool
        Start in the low state (a guard rebuilt on reload keeps its predecessor's state).

    Notes
    -----
    Hysteresis (common practice against flapping): once low, the guard clears only when
    free space is back above ``min_free_bytes`` plus a tenth of it (at least 64 MiB).
    """

    def __init__(
        self,
        folder: Path,
        min_free_bytes: int,
        *,
        free_bytes: Callable[[Path], int] = free_disk_bytes,
        disk_bytes: Callable[[Path], int] = total_disk_bytes,
        low: bool = False,
    ) -> None:
        self.folder = Path(folder)
        self.min_free_bytes = int(min_free_bytes)
        self._band = max(self.min_free_bytes // 10, 64 * MIB)
        self.clear_bytes = self.min_free_bytes + self._band
        self._disk_bytes = disk_bytes
        self._free_bytes = free_bytes
        self.low = low
        self.last_free_bytes: int | None = None
        self.last_error: str | None = None

    def check(self) -> Literal["raised", "cleared"] | None:
        """Look at the disk; return a change of state, else None.

        A disk that cannot be looked at changes nothing (the folder check reports it).
        The service calls this at most every :data:`RESOURCE_CHECK_INTERVAL_S`.
        """
        try:
            where = _nearest_existing(self.folder)
            free = int(self._free_bytes(where))
        except OSError as exc:
            self.last_error = f"{self.folder}: cannot read free space: {exc}"
            return None
        self.last_error = None
        self.last_free_bytes = free
        self._fit_band_to_the_disk(where)
        if not self.low and free < self.min_free_bytes:
            self.low = True
            return "raised"
        if self.low and free >= self.clear_bytes:
            self.low = False
            return "cleared"
        return None

    def _fit_band_to_the_disk(self, where: Path) -> None:
        """Keep the clear level within reach: on a disk smaller than the floor plus the
        band, the band shrinks to half of what lies above the floor (a disk that cannot
        be looked at keeps the band)."""
        try:
            size = int(self._disk_bytes(where))
        except OSError:
            return
        band = self._band
        if size > self.min_free_bytes:
            band = min(band, (size - self.min_free_bytes) // 2)
        self.clear_bytes = self.min_free_bytes + band


@dataclass
class Outage:
    """The output cannot be written: since when, why, and when to try again.

    The retry delay starts at :data:`RETRY_FIRST_S` and doubles after each failed retry
    up to :data:`RETRY_MAX_S` (exponential backoff, common practice).
    """

    reason: str
    since_s: float
    next_try_s: float
    backoff_s: float
    attempts: int = 0

    @classmethod
    def begin(cls, reason: str, now_s: float) -> Outage:
        """An outage starting now, first retry after :data:`RETRY_FIRST_S`."""
        return cls(reason, now_s, now_s + RETRY_FIRST_S, RETRY_FIRST_S)

    def failed_again(self, now_s: float) -> None:
        """A retry failed: double the delay (up to the cap) and set the next try."""
        self.backoff_s = min(self.backoff_s * 2, RETRY_MAX_S)
        self.next_try_s = now_s + self.backoff_s


@dataclass
class Unreadable:
    """A line file that could not be read (not a store failure), waiting for a retry."""

    ready: ReadyFile
    error: str
    attempts: int
    next_try_s: float


class UnreadableFiles:
    """Line files that could not be read (not a store failure), each retried after a
    growing delay (4^attempts s, capped) and given up after :data:`UNREADABLE_ATTEMPTS`."""

    def __init__(self) -> None:
        self._waiting: list[Unreadable] = []
        self._attempts: dict[Path, int] = {}

    def failed(self, ready: ReadyFile, error: str, now_s: float) -> float | None:
        """Note a failed read; return the delay before its retry, s, or None when this
        was the last attempt (the file is then forgotten: give it up)."""
        attempts = self._attempts.get(ready.path, 0) + 1
        if attempts >= UNREADABLE_ATTEMPTS:
            self._attempts.pop(ready.path, None)
            return None
        self._attempts[ready.path] = attempts
        delay_s = min(RETRY_FIRST_S * 4**attempts, RETRY_MAX_S * 5)
        self._waiting.append(Unreadable(ready, error, attempts, now_s + delay_s))
        return delay_s

    def read(self, path: Path) -> None:
        """The file was read at last: forget its failed attempts."""
        self._attempts.pop(path, None)

    def due(self, now_s: float) -> list[ReadyFile]:
        """The files whose retry is due, taken out of the waiting list."""
        due = [u for u in self._waiting if u.next_try_s <= now_s]
        for u in due:
            self._waiting.remove(u)
        return [u.ready for u in due]

    def next_try_s(self) -> float | None:
        """When the soonest retry is due, or None with nothing waiting."""
        return min((u.next_try_s for u in self._waiting), default=None)
