"""One daemon per state folder: an exclusive lock held for the daemon's whole life.

Two daemons on one config would share the rule state, the active alerts and the stores,
and raise alerts against each other's scans. The lock is ``flock(2)`` on
``<state_dir>/daemon.lock``: released by the kernel when the process ends, however it
ends, so a crash never leaves a stale lock. The file holds the owner's PID, for the
message a second start prints.
"""

from __future__ import annotations

import fcntl
import os
from pathlib import Path

from strayline.errors import StraylineError

__all__ = ["LOCK_FILE", "AlreadyRunning", "StateLock"]

#: The lock file's name inside ``paths.state_dir``.
LOCK_FILE = "daemon.lock"


class AlreadyRunning(StraylineError):
    """Another strayline daemon holds the state folder's lock."""


class StateLock:
    """The held lock of one state folder; :meth:`release` (or the process's end) frees it.

    Raises
    ------
    AlreadyRunning
        Another process holds it (the message names the file and that process's PID).
    OSError
        The state folder cannot be created or the lock file opened.
    """

    def __init__(self, state_dir: Path) -> None:
        self.path = Path(state_dir) / LOCK_FILE
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            owner = os.pread(fd, 32, 0).decode("ascii", "replace").strip() or "unknown"
            os.close(fd)
            raise AlreadyRunning(
                f"another strayline daemon (PID {owner}) already runs on this state folder: "
                f"{self.path} is locked; stop it first, or give this one its own "
                "paths.state_dir and paths.output_root"
            ) from None
        except BaseException:
            os.close(fd)
            raise
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode("ascii"), 0)
        self._fd = fd

    def release(self) -> None:
        """Free the lock (idempotent)."""
        if self._fd >= 0:
            fd, self._fd = self._fd, -1
            os.close(fd)
