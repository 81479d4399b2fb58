"""sd_notify: the Notifier alone, then the real daemon talking to a fake notify socket.

The fake socket is a real AF_UNIX datagram socket bound in the test's folder; the daemon
finds it through ``$NOTIFY_SOCKET`` exactly as under systemd (sd_notify(3)), and
``$WATCHDOG_USEC`` asks it for watchdog pings (sd_watchdog_enabled(3)).
"""

from __future__ import annotations

import fcntl
import itertools
import os
import signal
import socket
import subprocess
import threading
import time
from pathlib import Path
from typing import Any

import pytest

import demo_stream as ds
from strayline.service._sdnotify import Notifier, _watchdog_interval_s
from strayline.service.loop import BATCH_FILES
from tests._daemon import (
    NotifyListener,
    committed_lines,
    start_daemon_with,
    wait_committed,
    write_config,
)


def _config(folder: Path, **sections: Any) -> Path:
    """The test daemon config without scan products (they are not under test here and
    cost seconds per finished scan)."""
    return write_config(folder, products={"enabled": False}, **sections)


# ------------------------------------------------------------------ the Notifier alone


def _bound_socket(path: str) -> socket.socket:
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(path)
    sock.settimeout(2.0)
    return sock


def test_states_go_in_one_datagram_separated_by_newlines(tmp_path: Path) -> None:
    """Several states passed together arrive as one datagram, newline-separated
    (sd_notify(3): "a newline-separated list of variable assignments")."""
    sock = _bound_socket(str(tmp_path / "n.sock"))
    notifier = Notifier(str(tmp_path / "n.sock"))
    try:
        assert notifier.enabled
        assert notifier.notify("READY=1", "STATUS=watching 3 scans")
        assert sock.recv(4096) == b"READY=1\nSTATUS=watching 3 scans"
    finally:
        notifier.close()
        sock.close()


def test_at_sign_addresses_an_abstract_socket() -> None:
    """A leading '@' in the address means an abstract socket: the name is sent to with a
    leading NUL byte (sd_notify(3) and unix(7), "abstract socket address")."""
    name = f"strayline-test-{os.getpid()}-{time.monotonic_ns()}"
    sock = _bound_socket("\0" + name)
    notifier = Notifier("@" + name)
    try:
        assert notifier.notify("WATCHDOG=1")
        assert sock.recv(4096) == b"WATCHDOG=1"
    finally:
        notifier.close()
        sock.close()


def test_without_notify_socket_every_call_is_a_no_op(monkeypatch: pytest.MonkeyPatch) -> None:
    """Outside systemd (no $NOTIFY_SOCKET) notify() does nothing and returns False."""
    monkeypatch.delenv("NOTIFY_SOCKET", raising=False)
    notifier = Notifier()
    assert not notifier.enabled
    assert notifier.notify("READY=1") is False
    notifier.close()


def test_a_vanished_socket_makes_notify_return_false_not_raise(tmp_path: Path) -> None:
    """A notify socket that went away (systemd restarted) yields False, never an exception."""
    notifier = Notifier(str(tmp_path / "gone.sock"))
    assert notifier.notify("STATUS=still here") is False
    notifier.close()
    assert notifier.notify("STATUS=after close") is False


@pytest.mark.parametrize(
    ("usec", "pid", "expected"),
    [
        ("30000000", None, 30.0),
        ("30000000", "OWN", 30.0),
        ("30000000", "1", None),
        ("0", None, None),
        ("soon", None, None),
        (None, None, None),
    ],
)
def test_watchdog_interval_follows_usec_and_pid(
    usec: str | None, pid: str | None, expected: float | None
) -> None:
    """$WATCHDOG_USEC gives the interval in µs, only for the process $WATCHDOG_PID names
    when set; zero or unparsable values mean no watchdog (sd_watchdog_enabled(3))."""
    own = 4242
    pid_value = str(own) if pid == "OWN" else pid
    assert _watchdog_interval_s(usec, pid_value, own) == expected


def test_notifier_reads_watchdog_usec_from_the_environment(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """The Notifier takes its watchdog interval from the environment of this process."""
    monkeypatch.setenv("WATCHDOG_USEC", "2500000")
    monkeypatch.setenv("WATCHDOG_PID", str(os.getpid()))
    assert Notifier("").watchdog_interval_s == 2.5


# ------------------------------------------------------------------ the real daemon

SCAN_A = "notify-a"
SCAN_B = "notify-b"


def _write_scan(folder: Path, scan_id: str, n_lines: int, truth: Path) -> None:
    config = ds.DemoConfig(n_lines=n_lines, n_pixels=32, seed=5, scan_id=scan_id)
    ds.run_scan(config, folder, truth, pace_s=0.0)


def _notify_env(listener: NotifyListener, watchdog_usec: int = 1_000_000) -> dict[str, str]:
    return {"NOTIFY_SOCKET": str(listener.path), "WATCHDOG_USEC": str(watchdog_usec)}


@pytest.mark.slow
def test_ready_status_pings_and_stopping_from_the_real_daemon(tmp_path: Path) -> None:
    """READY=1 comes once the watcher is armed and the catch-up listing has found the
    files already there (its STATUS counts them in the queue); a file written just after
    READY is processed; STATUS reports scan, line and progress; WATCHDOG=1 arrives every
    half $WATCHDOG_USEC while idle; STOPPING=1 is the last message on SIGTERM
    (sd_notify(3), sd_watchdog_enabled(3))."""
    config = _config(tmp_path)
    incoming = tmp_path / "incoming"
    _write_scan(incoming, SCAN_A, 6, tmp_path / "truth")  # before start: catch-up
    listener = NotifyListener(tmp_path)
    with (tmp_path / "daemon.log").open("wb") as log:
        proc = start_daemon_with(config, stdout=log, stderr=log, env=_notify_env(listener))
    try:
        listener.wait_for("READY", "1", timeout_s=30)
        ready_message = next(m for _, m in listener.snapshot() if "READY=1" in m)
        assert "queue 6" in ready_message, ready_message
        _write_scan(incoming, SCAN_B, 3, tmp_path / "truth")  # after READY: events
        assert wait_committed(tmp_path / "output" / f"{SCAN_B}.zarr", 3, proc, 30) == 3
        assert wait_committed(tmp_path / "output" / f"{SCAN_A}.zarr", 6, proc, 30) == 6
        time.sleep(1.2)  # let the final STATUS go out
        idle_from = time.monotonic()
        time.sleep(2.0)
        idle_to = time.monotonic()
    finally:
        proc.send_signal(signal.SIGTERM)
        code = proc.wait(timeout=30)
    listener.close()
    assert code == 0
    statuses = [v for _, v in listener.states("STATUS")]
    want = f"scan {SCAN_B}: line 2, 3/3 done, 1 more scans open, queue 0, no alerts"
    assert want in statuses, statuses[-5:]
    pings = [t for t, _ in listener.states("WATCHDOG") if idle_from <= t <= idle_to]
    # 1 s watchdog → a ping every 0.5 s; the loop turns at least once a second.
    assert len(pings) >= 3, pings
    assert max(b - a for a, b in itertools.pairwise(pings)) < 1.2
    assert listener.snapshot()[-1][1].startswith("STOPPING=1")


N_BLOCKED = BATCH_FILES + 16


@pytest.mark.slow
def test_a_loop_blocked_in_a_write_stops_the_watchdog_pings(tmp_path: Path) -> None:
    """While the main loop is blocked (its console log goes to a pipe nobody reads, the
    kind of stall a stuck journal or share causes) WATCHDOG=1 stops, so systemd would
    kill and restart the daemon; once the pipe is read again pings resume and every
    line is committed. The pings come from the loop itself, not a timer thread (common
    practice for watchdogs, sd_watchdog_enabled(3))."""
    # Hang honestly, without a test hook in the daemon: a 4 KiB pipe (F_SETPIPE_SZ,
    # fcntl(2)) fills after a few log records and the next write(2) blocks the loop.
    config = _config(tmp_path)
    read_fd, write_fd = os.pipe()
    fcntl.fcntl(write_fd, 1031, 4096)  # F_SETPIPE_SZ
    listener = NotifyListener(tmp_path)
    proc = start_daemon_with(
        config, stdout=subprocess.DEVNULL, stderr=write_fd, env=_notify_env(listener)
    )
    os.close(write_fd)
    drained = bytearray()
    reader: threading.Thread | None = None
    store = tmp_path / "output" / f"{SCAN_A}.zarr"
    try:
        listener.wait_for("READY", "1", timeout_s=30)
        # more lines than the loop takes at once (service.loop.BATCH_FILES): the loop blocks
        # on the log records of the first group, with lines still waiting
        _write_scan(tmp_path / "incoming", SCAN_A, N_BLOCKED, tmp_path / "truth")
        # Wait for a 2.5 s silence (5 missed pings) of the watchdog while the process is alive.
        deadline = time.monotonic() + 40
        while True:
            pings = listener.states("WATCHDOG")
            if pings and time.monotonic() - pings[-1][0] > 2.5:
                break
            assert proc.poll() is None, "the daemon exited"
            assert time.monotonic() < deadline, "the pings never stopped"
            time.sleep(0.1)
        assert proc.poll() is None
        stuck_at = committed_lines(store)
        assert stuck_at < N_BLOCKED, "every line went through: the loop never blocked"

        def drain() -> None:
            while chunk := os.read(read_fd, 65536):
                drained.extend(chunk)

        reader = threading.Thread(target=drain, daemon=True)
        reader.start()
        released = time.monotonic()
        assert wait_committed(store, N_BLOCKED, proc, timeout_s=60) == N_BLOCKED
        resumed = [t for t, _ in listener.states("WATCHDOG") if t > released]
        assert resumed, "no ping after the loop was released"
    finally:
        proc.send_signal(signal.SIGTERM)
        if reader is None:  # let the daemon finish its last writes, then exit
            reader = threading.Thread(
                target=lambda: [None for _ in iter(lambda: os.read(read_fd, 65536), b"")],
                daemon=True,
            )
            reader.start()
        code = proc.wait(timeout=30)
        reader.join(timeout=5)
        os.close(read_fd)
        listener.close()
    assert code == 0
    assert b"line_processed" in drained


@pytest.mark.slow
def test_reload_is_bracketed_by_reloading_and_ready(tmp_path: Path) -> None:
    """SIGHUP sends RELOADING=1 with MONOTONIC_USEC (CLOCK_MONOTONIC now, µs), then READY=1
    once the new config is in force; a refused config is bracketed the same way
    (sd_notify(3), "RELOADING=1")."""
    config = _config(tmp_path)
    listener = NotifyListener(tmp_path)
    with (tmp_path / "daemon.log").open("wb") as log:
        proc = start_daemon_with(config, stdout=log, stderr=log, env=_notify_env(listener))
    try:
        listener.wait_for("READY", "1", timeout_s=30)
        before = time.monotonic_ns() // 1000
        proc.send_signal(signal.SIGHUP)
        listener.wait_for("RELOADING", "1", timeout_s=10)
        config.write_text(config.read_text() + "\nnot_a_section: 1\n", encoding="utf-8")
        proc.send_signal(signal.SIGHUP)
        time.sleep(0.2)
        deadline = time.monotonic() + 10
        while len(listener.states("RELOADING")) < 2 or len(listener.states("READY")) < 3:
            assert time.monotonic() < deadline, listener.snapshot()[-6:]
            time.sleep(0.05)
    finally:
        proc.send_signal(signal.SIGTERM)
        code = proc.wait(timeout=30)
        listener.close()
    assert code == 0
    messages = [m for _, m in listener.snapshot()]
    kinds = [m.split("\n")[0] for m in messages if m.startswith(("RELOADING=1", "READY=1"))]
    assert kinds == ["READY=1", "RELOADING=1", "READY=1", "RELOADING=1", "READY=1"]
    reload_message = next(m for m in messages if m.startswith("RELOADING=1"))
    usec = int(reload_message.split("MONOTONIC_USEC=")[1].split("\n")[0])
    assert before <= usec <= time.monotonic_ns() // 1000
    log_text = (tmp_path / "daemon.log").read_text()
    assert "config_reloaded" in log_text
    assert "config_reload_refused" in log_text
