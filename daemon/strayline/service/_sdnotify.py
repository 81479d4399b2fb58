"""sd_notify(3) without extra dependencies: one datagram to $NOTIFY_SOCKET.

Used only by :mod:`strayline.service`. Outside systemd (no ``NOTIFY_SOCKET``) every call
is a no-op, so the daemon runs the same by hand.

References
----------
sd_notify(3), systemd manual: the datagram of newline-separated ``KEY=VALUE`` states, the
``@`` prefix of an abstract socket address.
sd_watchdog_enabled(3), systemd manual: ``$WATCHDOG_USEC`` and ``$WATCHDOG_PID``.
"""

from __future__ import annotations

import os
import socket

__all__ = ["Notifier"]


class Notifier:
    """Send state strings ("READY=1", "STATUS=...", "WATCHDOG=1", "STOPPING=1").

    Parameters
    ----------
    address : str, optional
        Socket path, or ``@name`` for an abstract socket (default: ``$NOTIFY_SOCKET``).

    Attributes
    ----------
    watchdog_interval_s : float or None
        The watchdog interval systemd asks this process for (``$WATCHDOG_USEC``), s.
    """

    def __init__(self, address: str | None = None) -> None:
        address = address if address is not None else os.environ.get("NOTIFY_SOCKET")
        self._address: str | None = None
        self._sock: socket.socket | None = None
        if address:
            # An abstract socket is announced with a leading '@' (sd_notify(3)).
            self._address = "\0" + address[1:] if address.startswith("@") else address
            self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
        self.watchdog_interval_s = _watchdog_interval_s(
            os.environ.get("WATCHDOG_USEC"), os.environ.get("WATCHDOG_PID"), os.getpid()
        )

    @property
    def enabled(self) -> bool:
        """Whether there is a socket to notify."""
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
        """Close the socket; later calls to :meth:`notify` are no-ops."""
        if self._sock is not None:
            self._sock.close()
            self._sock = None


def _watchdog_interval_s(usec: str | None, pid: str | None, own_pid: int) -> float | None:
    """The watchdog interval systemd asks for, s; None if none is asked of this process.

    sd_watchdog_enabled(3): ``$WATCHDOG_USEC`` is a positive decimal number of
    microseconds; when ``$WATCHDOG_PID`` is set, the request is only for that process.
    Anything unparsable counts as no request (the daemon must not die of it).
    """
    if not usec or (pid and pid.strip() != str(own_pid)):
        return None
    try:
        value = int(usec.strip())
    except ValueError:
        return None
    return value / 1e6 if value > 0 else None
