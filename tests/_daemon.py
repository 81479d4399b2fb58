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
