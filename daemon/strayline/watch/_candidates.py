"""Readiness of candidate line files: pure logic over observations and an injected time.

Private core of :mod:`strayline.watch`. It never touches the disk or reads a clock: the
shell feeds it what it saw (path, size, mtime, when) and what the probe said, and asks
it which files to probe, which are ready and which to give up on. Every time is a
monotonic reading in seconds from the watcher's injected clock.

A file is *ready* when two observations at least ``settle_s`` apart saw the same
signature (size in bytes, mtime in ns) and the probe then found it opens cleanly. A
signature once reported (ready or given up) is not reported again; a new signature at
the same path (the file was rewritten) makes it a candidate again.

A file that has gone quiet but does not open is given up at once, without waiting
``give_up_s``, as soon as a later line of the same scan folder is ready: the instrument
has moved on, so the file will not be finished (a truncated or damaged copy).

A *growing* file (one file per scan, a row appended per line, whose reader takes only the
rows its writer marked complete) need not go quiet: it is probed ``settle_s`` after it
changed even while it goes on changing, reported ready whenever the probe passes, and never
given up as "still changing" (only after its probe failed for ``give_up_s``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from strayline.lines import line_key_from_name

__all__ = ["Candidates", "ReadyFile", "Signature"]

Signature = tuple[int, int]
"""(size in bytes, mtime in ns) of a file as observed."""


@dataclass(frozen=True)
class ReadyFile:
    """A line file the watcher hands to the pipeline.

    Attributes
    ----------
    path : Path
        The file, below the watch root.
    size_bytes : int
        Its size when it was judged, bytes.
    mtime_ns : int
        Its modification time when it was judged, ns since the epoch.
    kind : {"ready", "gave_up"}
        ``"ready"``: quiet for the settle time and opens cleanly. ``"gave_up"``: it did
        not become ready within the give-up time.
    reason : str
        For ``"gave_up"``, what was wrong (still changing, or the last probe error);
        empty for ``"ready"``.
    """

    path: Path
    size_bytes: int
    mtime_ns: int
    kind: Literal["ready", "gave_up"]
    reason: str = ""


@dataclass
class _Pending:
    """Mutable book-keeping for one candidate (never leaves this module)."""

    signature: Signature
    first_seen_s: float
    stable_since_s: float
    last_seen_s: float
    last_error: str | None = None
    next_probe_s: float = -math.inf
    growing: bool = False


class Candidates:
    """Candidate files and the files already reported.

    Parameters
    ----------
    settle_s : float
        How long the signature must stay unchanged, s.
    give_up_s : float
        How long after it was first seen a candidate may stay not-ready, s.
    probe_retry_s : float
        Wait after a failed probe before probing the same signature again, s.
    """

    def __init__(self, *, settle_s: float, give_up_s: float, probe_retry_s: float) -> None:
        self._settle_s = settle_s
        self._give_up_s = give_up_s
        self._probe_retry_s = probe_retry_s
        self._pending: dict[Path, _Pending] = {}
        self._reported: dict[Path, Signature] = {}
        # Per scan folder: the latest line index seen ready, and its file's name.
        self._latest_ready: dict[Path, tuple[int, str]] = {}

    def __len__(self) -> int:
        return len(self._pending)

    def pending_paths(self) -> list[Path]:
        """The candidates not yet reported."""
        return list(self._pending)

    def observe(
        self, path: Path, size_bytes: int, mtime_ns: int, now_s: float, *, growing: bool = False
    ) -> None:
        """Record that ``path`` was seen with this size and mtime at ``now_s`` (``growing``:
        a file that grows a row per line)."""
        signature = (size_bytes, mtime_ns)
        entry = self._pending.get(path)
        if entry is None:
            if self._reported.get(path) == signature:
                return
            self._pending[path] = _Pending(signature, now_s, now_s, now_s, growing=growing)
            return
        if entry.signature != signature:
            entry.signature = signature
            entry.stable_since_s = now_s
            entry.last_error = None
            entry.next_probe_s = -math.inf
        entry.last_seen_s = max(entry.last_seen_s, now_s)

    def vanish(self, path: Path) -> None:
        """Forget ``path``: it was deleted or moved away."""
        self._pending.pop(path, None)
        self._reported.pop(path, None)

    def forget_absent(self, present: set[Path]) -> None:
        """After a complete listing, forget every path it did not contain."""
        for path in [p for p in self._pending if p not in present]:
            del self._pending[path]
        for path in [p for p in self._reported if p not in present]:
            del self._reported[path]
        folders = {p.parent for p in present}
        for folder in [f for f in self._latest_ready if f not in folders]:
            del self._latest_ready[folder]

    def is_growing(self, path: Path) -> bool:
        """Whether a pending candidate is a growing file."""
        entry = self._pending.get(path)
        return entry is not None and entry.growing

    def _settled(self, entry: _Pending) -> bool:
        """Quiet for the settle time (a growing file: changed at least that long ago)."""
        since_s = entry.first_seen_s if entry.growing else entry.stable_since_s
        return entry.last_seen_s - since_s >= self._settle_s

    def due_for_probe(self, now_s: float) -> list[tuple[Path, Signature]]:
        """Candidates that have been quiet for the settle time and may be probed now."""
        return [
            (path, entry.signature)
            for path, entry in self._pending.items()
            if self._settled(entry) and now_s >= entry.next_probe_s
        ]

    def record_probe(
        self, path: Path, signature: Signature, error: str | None, now_s: float
    ) -> ReadyFile | None:
        """Take a probe result; return the ready file if it passed.

        A result for a signature that is no longer current (the file changed while it
        was probed) is ignored.
        """
        entry = self._pending.get(path)
        if entry is None or entry.signature != signature:
            return None
        if error is not None:
            entry.last_error = error
            entry.next_probe_s = now_s + self._probe_retry_s
            return None
        del self._pending[path]
        self._reported[path] = signature
        index, _ = line_key_from_name(path.name)
        latest = self._latest_ready.get(path.parent)
        if index is not None and (latest is None or index > latest[0]):
            self._latest_ready[path.parent] = (index, path.name)
        return ReadyFile(path, signature[0], signature[1], "ready")

    def expire(self, now_s: float) -> list[ReadyFile]:
        """Give up on the candidates first seen ``give_up_s`` or more ago."""
        gave_up: list[ReadyFile] = []
        for path, entry in list(self._pending.items()):
            overtaken = self._overtaken_by(path, entry)
            if overtaken is not None:
                reason = (
                    f"does not open ({entry.last_error}) while a later line of the scan, "
                    f"{overtaken}, is complete: truncated or damaged, it will not be finished"
                )
            elif now_s - entry.first_seen_s < self._give_up_s:
                continue
            elif entry.growing and entry.last_error is None:
                continue  # still growing: it is reported whenever its probe passes
            elif entry.last_error is not None:
                reason = f"does not open cleanly after {self._give_up_s:g} s: {entry.last_error}"
            else:
                reason = f"still changing after {self._give_up_s:g} s"
            del self._pending[path]
            self._reported[path] = entry.signature
            size_bytes, mtime_ns = entry.signature
            gave_up.append(ReadyFile(path, size_bytes, mtime_ns, "gave_up", reason))
        return gave_up

    def _overtaken_by(self, path: Path, entry: _Pending) -> str | None:
        """The name of a later ready line of the same folder, for a quiet file that failed
        its probe; None otherwise."""
        if entry.growing or entry.last_error is None or not self._settled(entry):
            return None
        latest = self._latest_ready.get(path.parent)
        index, _ = line_key_from_name(path.name)
        if latest is None or index is None or index >= latest[0]:
            return None
        return latest[1]

    def next_deadline_s(self) -> float | None:
        """Earliest time at which a look at the candidates can change anything."""
        times: list[float] = []
        for entry in self._pending.values():
            times.append(entry.first_seen_s + self._give_up_s)
            if not self._settled(entry):
                since_s = entry.first_seen_s if entry.growing else entry.stable_since_s
                times.append(since_s + self._settle_s)
            else:
                times.append(entry.next_probe_s)
        return min(times) if times else None
