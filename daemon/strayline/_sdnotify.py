"""sd_notify(3) without extra dependencies: one datagram to $NOTIFY_SOCKET.

Used only by :mod:`strayline.service`. Outside systemd (no ``NOTIFY_SOCKET``) every call
is a no-op, so the daemon runs the same by hand.
"""

from __future__ import annotations

import os
import socket

__all__ = ["Notifier"]


class Notifier:
    """Send state strings ("READY=1", "STATUS=...", "WATCHDOG=1", "STOPPING=1")."""

    def __init__(self, address: str | None = None) -> None:
        address = address if address is not None else os.environ.get("NOTIFY_SOCKET")
        self._address: str | None = None
        self._sock: socket.socket | None = None
        if address:
            # An abstract socket is announced with a leading '@' (sd_notify(3)).
            self._address = "\0" + address[1:] if address.startswith("@") else address
            self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
        usec = os.environ.get("WATCHDOG_USEC")
        pid = os.environ.get("WATCHDOG_PID")
        self.watchdog_interval_s: float | None = None
        if usec and (pid is None or pid == str(os.getpid())):
            self.watchdog_interval_s = int(usec) / 1e6

    @property
    def enabled(self) -> bool:
        return self._sock is not None

    def notify(self, *states: str) -> bool:
        """Send the states in one datagram; return False (never raise) if it failed."""
        if self._sock is None or self._address is None:
            return False
        try:
            self._sock.sendto("\n".join(states).encode(), self._address)
        except OSError:
            return False
        return True

    def close(self) -> None:
        if self._sock is not None:
            self._sock.close()
            self._sock = None
