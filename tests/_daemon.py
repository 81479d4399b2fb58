"""Helpers for tests that run the real daemon as a subprocess."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import yaml

from strayline.status import scan_status


def write_config(folder: Path, **sections: Any) -> Path:
    """Write a daemon config for ``folder`` (watch ``incoming``, write ``output``)."""
    data: dict[str, Any] = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "watch": {
            "mode": "native",
            "settle_s": 0.2,
            "poll_interval_s": 0.25,
            "reconcile_interval_s": 2.0,
            "give_up_s": 20.0,
        },
        "logging": {"console": "json", "json_file": "output/strayline.log.jsonl"},
        "service": {"status_interval_s": 5.0},
    }
    for key, value in sections.items():
        data.setdefault(key, {}).update(value)
    (folder / "incoming").mkdir(parents=True, exist_ok=True)
    path = folder / "strayline.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    return path


def start_daemon(config: Path, log: Path) -> subprocess.Popen[bytes]:
    """Start ``strayline run`` in the background, its console output going to ``log``."""
    env = dict(os.environ)
    env.pop("NOTIFY_SOCKET", None)
    with log.open("ab") as out:
        return subprocess.Popen(
            [sys.executable, "-m", "strayline", "run", "--config", str(config)],
            stdout=out,
            stderr=subprocess.STDOUT,
            env=env,
        )


def committed_lines(store: Path) -> int:
    """Lines committed in a store so far (0 when it does not exist yet)."""
    if not (store / "zarr.json").exists():
        return 0
    try:
        status = scan_status(store)
    except (FileNotFoundError, KeyError):
        return 0
    return sum(status.lines_done.values())


def wait_committed(store: Path, n: int, proc: subprocess.Popen[bytes], timeout_s: float) -> int:
    """Wait until ``n`` lines are committed; return what was committed at the end."""
    deadline = time.monotonic() + timeout_s
    done = committed_lines(store)
    while done < n and time.monotonic() < deadline:
        if proc.poll() is not None:
            raise AssertionError(f"daemon exited early with code {proc.returncode}")
        time.sleep(0.1)
        done = committed_lines(store)
    return done


def stop_daemon(proc: subprocess.Popen[bytes], timeout_s: float = 60.0) -> int:
    """SIGTERM, then wait for the exit code."""
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
    return proc.wait(timeout=timeout_s)


# --------------------------------------------------------------------------- service tests


class NotifyListener:
    """A fake systemd notify socket: a real AF_UNIX datagram socket that records every
    message with its arrival time (monotonic seconds) on a background thread."""

    def __init__(self, folder: Path) -> None:
        import socket
        import tempfile
        import threading

        path = folder / "notify.sock"
        if len(os.fsencode(path)) > 100:  # sun_path holds 108 bytes
            path = Path(tempfile.mkdtemp(prefix="sl-")) / "notify.sock"
        self.path = path
        self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self._sock.bind(str(path))
        self._sock.settimeout(0.1)
        self.messages: list[tuple[float, str]] = []
        self._lock = threading.Lock()
        self._closed = threading.Event()
        self._thread = threading.Thread(target=self._receive, daemon=True)
        self._thread.start()

    def _receive(self) -> None:
        while not self._closed.is_set():
            try:
                data = self._sock.recv(65536)
            except TimeoutError:
                continue
            except OSError:
                return
            with self._lock:
                self.messages.append((time.monotonic(), data.decode()))

    def snapshot(self) -> list[tuple[float, str]]:
        """The messages received so far, oldest first."""
        with self._lock:
            return list(self.messages)

    def states(self, key: str) -> list[tuple[float, str]]:
        """(time, value) of every ``key=value`` state received so far."""
        out = []
        for when, message in self.snapshot():
            for state in message.split("\n"):
                name, _, value = state.partition("=")
                if name == key:
                    out.append((when, value))
        return out

    def wait_for(self, key: str, value: str | None, timeout_s: float) -> float:
        """Wait for a ``key`` state (with ``value`` if given); return its arrival time."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            for when, got in self.states(key):
                if value is None or got == value:
                    return when
            time.sleep(0.02)
        raise AssertionError(f"no {key}={value} within {timeout_s} s: {self.snapshot()[-5:]}")

    def close(self) -> None:
        self._closed.set()
        self._sock.close()
        self._thread.join(timeout=2)


def start_daemon_with(
    config: Path,
    *,
    stdout: Any,
    stderr: Any,
    env: dict[str, str] | None = None,
    pass_fds: tuple[int, ...] = (),
) -> subprocess.Popen[bytes]:
    """Start ``strayline run`` with chosen output streams and extra environment."""
    full_env = dict(os.environ)
    for key in ("NOTIFY_SOCKET", "WATCHDOG_USEC", "WATCHDOG_PID", "JOURNAL_STREAM"):
        full_env.pop(key, None)
    full_env.update(env or {})
    return subprocess.Popen(
        [sys.executable, "-m", "strayline", "run", "--config", str(config)],
        stdout=stdout,
        stderr=stderr,
        env=full_env,
        pass_fds=pass_fds,
    )


def json_records(path: Path) -> list[dict[str, Any]]:
    """The complete JSON-lines records of a log file (a partial last line is left out)."""
    import json

    if not path.exists():
        return []
    out = []
    for text in path.read_text(encoding="utf-8").splitlines():
        try:
            out.append(json.loads(text))
        except ValueError:
            continue
    return out


def wait_until(
    predicate: Any, proc: subprocess.Popen[bytes] | None, timeout_s: float, what: str
) -> None:
    """Poll ``predicate()`` every 50 ms until true; fail naming ``what`` on timeout."""
    deadline = time.monotonic() + timeout_s
    while not predicate():
        if proc is not None and proc.poll() is not None:
            raise AssertionError(f"daemon exited with {proc.returncode} waiting for {what}")
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")
        time.sleep(0.05)


def ledger_events(store: Path) -> list[dict[str, Any]]:
    """The ledger records of a store, in order."""
    from strayline.store._layout import LEDGER_FILE
    from strayline.store._ledger import parse_records

    records, _ = parse_records((store / LEDGER_FILE).read_bytes(), "ledger")
    return records


def pending_lines(records: list[dict[str, Any]]) -> set[tuple[int, str]]:
    """Lines whose last ledger event is ``begin`` (half-written, never committed/reset)."""
    last: dict[tuple[int, str], str] = {}
    for record in records:
        last[(record["line_index"], record["direction"])] = record["event"]
    return {key for key, event in last.items() if event == "begin"}


def committed_keys(store: Path) -> set[tuple[int, str]]:
    """(line, direction) committed in a store's ledger (empty while there is none); cheap."""
    from strayline.store._layout import LEDGER_FILE
    from strayline.store._ledger import LedgerState, parse_records

    try:
        data = (store / LEDGER_FILE).read_bytes()
    except (FileNotFoundError, NotADirectoryError):
        return set()
    state = LedgerState()
    for record in parse_records(data, "ledger")[0]:
        state.apply(record)
    return set(state.committed)


def kill_midway(command: list[str], cwd: Path, stores: Path, *, after: int, total: int) -> None:
    """Run ``command`` in a process group of its own and ``kill -9`` the group (workers
    included) once at least ``after`` lines are committed in the stores below ``stores``,
    checking that it was still short of ``total`` then; then run it again to the end."""

    def committed() -> int:
        return sum(
            ledger.read_text().count('"event":"commit"')
            for ledger in stores.glob("*.zarr/ledger/records.jsonl")
        )

    proc = subprocess.Popen(
        command,
        cwd=cwd,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,  # its own process group: the workers die with it
    )
    deadline = time.monotonic() + 120
    while committed() < after:
        assert proc.poll() is None, "the run ended before it could be killed"
        assert time.monotonic() < deadline, "no line was committed"
        time.sleep(0.02)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait(timeout=30)
    assert committed() < total, "every line was done before the kill"
    again = subprocess.run(
        command, cwd=cwd, capture_output=True, text=True, timeout=300, check=False
    )
    assert again.returncode == 0, again.stderr
