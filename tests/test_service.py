"""The service: disk guard, resource failures, signals and journald logs of the daemon.

The disk guard is tested alone and inside an in-process :class:`Service` with an injected
free-space function; signals, reload, output failures, a missing watch root and journald
logs are tested against the real daemon process (``strayline run``).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import h5py
import pytest
import yaml

import demo_stream as ds
from strayline.alerts import read_alert_log
from strayline.config import load_config
from strayline.heartbeat import read_heartbeat
from strayline.service import Service
from strayline.service._guards import DiskGuard, free_disk_bytes
from tests._daemon import (
    NotifyListener,
    committed_keys,
    json_records,
    ledger_events,
    pending_lines,
    start_daemon_with,
    wait_until,
    write_config,
)


def _config(folder: Path, **sections: Any) -> Path:
    """The test daemon config without scan products (they are not under test here and
    cost seconds per finished scan)."""
    return write_config(folder, products={"enabled": False, "live_image": False}, **sections)


MIB = 1024 * 1024


def _scan(scan_id: str, n_lines: int, n_pixels: int = 32, seed: int = 11) -> ds.DemoConfig:
    return ds.DemoConfig(n_lines=n_lines, n_pixels=n_pixels, seed=seed, scan_id=scan_id)


def _write_scan(folder: Path, scan_id: str, n_lines: int, truth: Path, **kw: int) -> None:
    ds.run_scan(_scan(scan_id, n_lines, **kw), folder, truth, pace_s=0.0)


def _raw_lines(store: Path) -> set[int]:
    """Line indices with stored raw spectra (forward trace)."""
    raw = store / "raw" / "forward"
    return {int(p.name) for p in raw.iterdir() if p.name.isdigit()} if raw.is_dir() else set()


def _events(log: Path, name: str) -> list[dict[str, object]]:
    return [r for r in json_records(log) if r.get("event") == name]


# ------------------------------------------------------------------ the disk guard alone


class _FakeClock:
    def __init__(self) -> None:
        self.now_s = 1000.0

    def __call__(self) -> float:
        return self.now_s


def test_on_a_small_disk_the_clear_level_stays_within_reach(tmp_path: Path) -> None:
    """On a disk of 1100 MiB with a floor of 1024 MiB the usual band (max(10 %, 64 MiB))
    would put the clear level at 1126 MiB, beyond the disk: the band shrinks to half of
    what lies above the floor (38 MiB), so the guard clears once 1062 MiB are free."""
    free = {"bytes": 900 * MIB}
    guard = DiskGuard(
        tmp_path, 1024 * MIB, free_bytes=lambda _p: free["bytes"], disk_bytes=lambda _p: 1100 * MIB
    )
    assert guard.check() == "raised"
    assert guard.clear_bytes == 1024 * MIB + 38 * MIB
    free["bytes"] = 1070 * MIB
    assert guard.check() == "cleared"


def test_disk_guard_raises_once_and_clears_above_the_hysteresis(tmp_path: Path) -> None:
    """Below the floor the guard turns low once; it stays low (no second event) until free
    space exceeds the floor plus max(10 %, 64 MiB) (hysteresis against flapping: common
    practice)."""
    free = {"bytes": 5000 * MIB}
    guard = DiskGuard(tmp_path, 1024 * MIB, free_bytes=lambda _p: free["bytes"])
    seen = []
    for free_mib in (5000, 1000, 900, 1030, 1100, 1200):
        free["bytes"] = free_mib * MIB
        seen.append(guard.check())
    # clear threshold: 1024 + max(102.4, 64) MiB = 1126.4 MiB
    assert seen == [None, "raised", None, None, None, "cleared"]
    assert guard.clear_bytes == 1024 * MIB + (1024 * MIB) // 10
    assert guard.last_free_bytes == 1200 * MIB


def test_disk_guard_measures_the_nearest_existing_folder_and_ignores_errors(
    tmp_path: Path,
) -> None:
    """A missing output root is measured on its closest existing ancestor (the disk it will
    be created on); a free-space function that fails changes nothing."""
    asked: list[Path] = []

    def free(path: Path) -> int:
        asked.append(path)
        if len(asked) > 1:
            raise PermissionError(13, "Permission denied", str(path))
        return 0

    guard = DiskGuard(tmp_path / "not" / "yet", MIB, free_bytes=free)
    assert guard.check() == "raised"
    assert asked == [tmp_path]
    assert guard.check() is None
    assert guard.low
    assert guard.last_error is not None
    assert "Permission denied" in guard.last_error


def test_free_disk_bytes_agrees_with_shutil_disk_usage(tmp_path: Path) -> None:
    """free_disk_bytes is the space free to unprivileged users, as Python's
    shutil.disk_usage reports it (statvfs f_bavail × f_frsize, Python docs)."""
    reference = shutil.disk_usage(tmp_path).free
    # Other processes write meanwhile: allow 64 MiB of drift between the two reads.
    assert abs(free_disk_bytes(tmp_path) - reference) < 64 * MIB


# ------------------------------------------------------------------ in-process service


def test_low_disk_stops_raw_spectra_then_restores_them(tmp_path: Path) -> None:
    """With free space below service.min_free_disk_mib the service raises one critical
    disk_space_low alert and stores no raw spectra (maps still written); when space
    returns it clears the alert once and stores raw spectra again (injected free-space
    function and clock)."""
    config_path = _config(
        tmp_path,
        store={"raw_spectra": True},
        service={"min_free_disk_mib": 1024.0},
        logging={"console": "off"},
    )
    config = load_config(config_path)
    incoming = tmp_path / "incoming"
    _write_scan(incoming, "disk-a", 3, tmp_path / "truth")
    free = {"bytes": 100 * MIB}
    clock = _FakeClock()
    store_a = tmp_path / "output" / "disk-a.zarr"
    store_b = tmp_path / "output" / "disk-b.zarr"
    phase = {"b_written": False}
    started = time.monotonic()

    def stop_when() -> bool:
        assert time.monotonic() - started < 60, "the service did not get there in 60 s"
        if not phase["b_written"] and len(committed_keys(store_a)) == 3:
            free["bytes"] = 50_000 * MIB
            clock.now_s += 10.0  # the next resource check is due
            _write_scan(incoming, "disk-b", 3, tmp_path / "truth")
            phase["b_written"] = True
        return len(committed_keys(store_b)) == 3

    service = Service(config, stop_when=stop_when, free_bytes=lambda _p: free["bytes"], clock=clock)
    assert service.run() == 0
    assert _raw_lines(store_a) == set()
    assert _raw_lines(store_b) == {0, 1, 2}
    events = [e for e in read_alert_log(config.paths.alert_log) if e.rule == "disk_space_low"]
    assert [(e.state, e.severity) for e in events] == [
        ("raised", "critical"),
        ("cleared", "critical"),
    ]
    assert "100 MiB, below service.min_free_disk_mib = 1024 MiB" in events[0].message
    assert events[0].seen_value == pytest.approx(100.0)
    assert events[0].seen_unit == "MiB"


def test_a_reload_keeps_the_services_counts(tmp_path: Path) -> None:
    """A reload (SIGHUP) builds a new pipeline; the lines written before it still count:
    3 lines, a reload, 2 more lines make 5, not 2. The heartbeat says "running" (this
    process) while the service runs, and "stopped" with the 5 lines once it has stopped."""
    config = load_config(_config(tmp_path, logging={"console": "off"}))
    incoming = tmp_path / "incoming"
    store_a, store_b = tmp_path / "output" / "count-a.zarr", tmp_path / "output" / "count-b.zarr"
    _write_scan(incoming, "count-a", 3, tmp_path / "truth")
    phase: dict[str, Any] = {"reloaded": False}
    started = time.monotonic()
    service: Service

    def stop_when() -> bool:
        assert time.monotonic() - started < 60, "the service did not get there in 60 s"
        if not phase["reloaded"] and len(committed_keys(store_a)) == 3:
            service.request_reload()
            _write_scan(incoming, "count-b", 2, tmp_path / "truth")
            phase["reloaded"] = True
        done = phase["reloaded"] and len(committed_keys(store_b)) == 2
        if done:
            phase["rebuilt"] = service.pipeline is not first
            phase["beat"] = read_heartbeat(config.paths.state_dir)
        return done

    service = Service(config, stop_when=stop_when)
    first = service.pipeline
    assert service.run() == 0
    assert phase["rebuilt"], "the reload did not build a new pipeline"
    assert service._counted is not None
    assert service._counted.lines_written == 5  # the pipeline closed at the stop
    running, stopped = phase["beat"], read_heartbeat(config.paths.state_dir)
    assert (running.state, running.pid) == ("running", os.getpid())
    assert (stopped.state, stopped.lines_written) == ("stopped", 5)


@pytest.mark.slow
def test_chunks_left_in_a_deleted_store_are_set_aside_and_the_scan_rebuilt(
    tmp_path: Path,
) -> None:
    """When a scan's store folder is deleted while open and a folder of stray chunks (no
    zarr.json, no ledger) appears at its path, the service raises output_unavailable,
    renames that folder to a hidden .<name>.orphaned-<time> (never deletes it), creates
    the store afresh and rebuilds the whole scan from the line files (common practice:
    keep what you cannot explain, recompute what you can)."""
    config = load_config(_config(tmp_path, logging={"console": "off"}))
    incoming, output, stage = tmp_path / "incoming", tmp_path / "output", tmp_path / "stage"
    _write_scan(stage, "ghost", 8, tmp_path / "truth")
    _move_lines(stage, incoming, "ghost", range(4))
    store = output / "ghost.zarr"
    started = time.monotonic()
    phase = {"deleted": False}

    def stop_when() -> bool:
        assert time.monotonic() - started < 60, "the service did not get there in 60 s"
        if not phase["deleted"] and len(committed_keys(store)) == 4:
            output.rename(tmp_path / "output.gone")
            stray = store / "forward" / "field_nv_t" / "c"
            stray.mkdir(parents=True)
            (stray / "9").write_bytes(b"chunk written after the store was deleted")
            _move_lines(stage, incoming, "ghost", range(4, 8))
            phase["deleted"] = True
        return phase["deleted"] and len(committed_keys(store)) == 8

    assert Service(config, stop_when=stop_when).run() == 0
    aside = sorted(output.glob(".ghost.zarr.orphaned-*"))
    assert len(aside) == 1
    assert (aside[0] / "forward" / "field_nv_t" / "c" / "9").is_file()
    records = ledger_events(store)
    assert pending_lines(records) == set()
    commits = [(r["line_index"], r["direction"]) for r in records if r["event"] == "commit"]
    assert sorted(commits) == [(i, "forward") for i in range(8)]
    states = [
        e.state for e in read_alert_log(config.paths.alert_log) if e.rule == "output_unavailable"
    ]
    assert states == ["raised", "cleared"]


# ------------------------------------------------------------------ the real daemon


def _start(config: Path, log: Path, **env: str) -> subprocess.Popen[bytes]:
    with log.open("ab") as out:
        return start_daemon_with(config, stdout=out, stderr=out, env=env)


def _stop(proc: subprocess.Popen[bytes], timeout_s: float = 30.0) -> int:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
    return proc.wait(timeout=timeout_s)


def _move_lines(stage: Path, incoming: Path, scan_id: str, lines: range) -> None:
    """Rename staged line files into the watched scan folder (an atomic writer's way)."""
    (incoming / scan_id).mkdir(parents=True, exist_ok=True)
    for i in lines:
        name = f"line_{i:05d}_fwd.h5"
        (stage / scan_id / name).rename(incoming / scan_id / name)


@pytest.mark.slow
def test_sigterm_while_lines_flow_exits_0_with_no_half_written_line(tmp_path: Path) -> None:
    """SIGTERM while lines stream in ends the daemon with exit code 0 within a few seconds,
    the ledger holds no begun-but-uncommitted line, and a restart commits every remaining
    line exactly once (the write-ahead ledger's promise; common practice)."""
    config = _config(tmp_path)
    proc = _start(config, tmp_path / "daemon.log")
    store = tmp_path / "output" / "flow.zarr"
    wait_until(lambda: "service_ready" in (tmp_path / "daemon.log").read_text(), proc, 30, "ready")
    # an instrument writing a line every 0.2 s: lines keep arriving while the daemon stops
    writer = threading.Thread(
        target=ds.run_scan,
        args=(_scan("flow", 20), tmp_path / "incoming", tmp_path / "truth"),
        kwargs={"pace_s": 0.2},
    )
    writer.start()
    wait_until(lambda: len(committed_keys(store)) >= 3, proc, 60, "3 lines")
    sent = time.monotonic()
    code = _stop(proc)
    writer.join()
    stop_s = time.monotonic() - sent
    assert code == 0
    assert stop_s < 10.0  # TimeoutStopSec of the unit is 90 s
    records = ledger_events(store)
    assert pending_lines(records) == set()
    done_at_stop = len(committed_keys(store))
    assert done_at_stop < 20, "all lines were done before SIGTERM: nothing was flowing"
    assert _events(tmp_path / "output" / "strayline.log.jsonl", "service_stopped")

    proc = _start(config, tmp_path / "daemon.log")
    try:
        wait_until(lambda: len(committed_keys(store)) == 20, proc, 90, "all 20 lines")
    finally:
        assert _stop(proc) == 0
    records = ledger_events(store)
    commits = [(r["line_index"], r["direction"]) for r in records if r["event"] == "commit"]
    assert sorted(commits) == [(i, "forward") for i in range(20)]
    assert [r for r in records if r["event"] == "reset"] == []  # nothing was left pending


@pytest.mark.slow
def test_sighup_applies_a_valid_config_reopens_logs_and_refuses_an_invalid_one(
    tmp_path: Path,
) -> None:
    """SIGHUP with a changed valid config makes it take effect (raw spectra stored from
    then on) and reopens the JSON log (records go to a new file at the configured path
    after the old one was renamed); SIGHUP with an invalid config is refused with an
    error naming the key, the previous config stays in force and lines keep flowing."""
    log_file = tmp_path / "logs" / "strayline.jsonl"
    config = _config(tmp_path, logging={"json_file": str(log_file)})
    incoming, output = tmp_path / "incoming", tmp_path / "output"
    proc = _start(config, tmp_path / "daemon.log")
    try:
        _write_scan(incoming, "hup-a", 3, tmp_path / "truth")
        wait_until(lambda: len(committed_keys(output / "hup-a.zarr")) == 3, proc, 60, "scan a")
        # A line is logged just after its commit: rename only once all three are logged.
        wait_until(lambda: len(_events(log_file, "line_processed")) == 3, proc, 20, "a's log")
        rotated = log_file.with_name("strayline.jsonl.1")
        log_file.rename(rotated)
        data = yaml.safe_load(config.read_text())
        data["store"] = {"raw_spectra": True}
        config.write_text(yaml.safe_dump(data), encoding="utf-8")
        proc.send_signal(signal.SIGHUP)
        wait_until(lambda: _events(log_file, "config_reloaded"), proc, 20, "reload")
        _write_scan(incoming, "hup-b", 3, tmp_path / "truth")
        wait_until(lambda: len(committed_keys(output / "hup-b.zarr")) == 3, proc, 60, "scan b")

        data["store"] = {"raw_spectra": "sometimes"}
        config.write_text(yaml.safe_dump(data), encoding="utf-8")
        proc.send_signal(signal.SIGHUP)
        wait_until(lambda: _events(log_file, "config_reload_refused"), proc, 20, "refusal")
        _write_scan(incoming, "hup-c", 3, tmp_path / "truth")
        wait_until(lambda: len(committed_keys(output / "hup-c.zarr")) == 3, proc, 60, "scan c")
    finally:
        code = _stop(proc)
    assert code == 0
    assert _raw_lines(output / "hup-a.zarr") == set()
    assert _raw_lines(output / "hup-b.zarr") == {0, 1, 2}
    assert _raw_lines(output / "hup-c.zarr") == {0, 1, 2}  # the valid config stayed
    old_events = [r["event"] for r in json_records(rotated)]
    assert "line_processed" in old_events
    assert "config_reloaded" not in old_events
    new_scans = {r.get("scan") for r in _events(log_file, "line_processed")}
    assert new_scans == {"hup-b", "hup-c"}
    refused = _events(log_file, "config_reload_refused")[0]
    assert refused["level"] == "error"
    assert "store.raw_spectra" in str(refused["problem"])
    assert str(refused["file"]) == str(config)


@pytest.mark.slow
def test_output_failures_alert_once_hold_the_lines_and_lose_none(tmp_path: Path) -> None:
    """When the output folder is replaced by a file the daemon raises one critical
    output_unavailable alert, keeps the lines and retries with backoff; once the folder
    is back every held line is written; when the output folder is deleted outright the
    daemon recreates it and, listing the watch root again, rebuilds the whole scan. No
    line is lost or committed twice, none is left half-written."""
    log_file = tmp_path / "logs" / "strayline.jsonl"
    config = _config(tmp_path, logging={"json_file": str(log_file)})
    incoming, output, stage = tmp_path / "incoming", tmp_path / "output", tmp_path / "stage"
    _write_scan(stage, "out", 16, tmp_path / "truth")
    store = output / "out.zarr"
    proc = _start(config, tmp_path / "daemon.log")
    try:
        _move_lines(stage, incoming, "out", range(6))
        wait_until(lambda: len(committed_keys(store)) == 6, proc, 60, "6 lines")

        # 1. The output folder is replaced by a plain file: nothing can be written.
        output.rename(tmp_path / "output.away")
        output.write_text("not a folder\n")
        _move_lines(stage, incoming, "out", range(6, 10))
        wait_until(lambda: _events(log_file, "output_unavailable"), proc, 20, "the alert")
        time.sleep(2.0)  # a few retries fail meanwhile
        assert len(committed_keys(tmp_path / "output.away" / "out.zarr")) == 6
        output.unlink()
        (tmp_path / "output.away").rename(output)
        wait_until(lambda: len(committed_keys(store)) == 10, proc, 60, "held lines")
        wait_until(lambda: _events(log_file, "output_recovered"), proc, 20, "recovery 1")

        # 2. The output folder is deleted with everything in it (moved away first, as a
        # recursive delete races the daemon's own writes).
        output.rename(tmp_path / "output.trash")
        shutil.rmtree(tmp_path / "output.trash", ignore_errors=True)
        _move_lines(stage, incoming, "out", range(10, 16))
        wait_until(lambda: len(_events(log_file, "output_recovered")) == 2, proc, 60, "rec. 2")
        wait_until(lambda: len(committed_keys(store)) == 16, proc, 60, "the rebuilt scan")
    finally:
        code = _stop(proc)
    assert code == 0
    records = ledger_events(store)
    assert pending_lines(records) == set()
    commits = [(r["line_index"], r["direction"]) for r in records if r["event"] == "commit"]
    assert sorted(commits) == [(i, "forward") for i in range(16)]
    assert len(_events(log_file, "output_unavailable")) == 2  # one per outage
    retried = _events(log_file, "output_retry_failed")
    assert retried, "no retry was made while the folder was a file"
    # The alert log lives below the output root: the second outage's pair is in it.
    alerts = [e for e in read_alert_log(output / "alerts.jsonl") if e.rule == "output_unavailable"]
    assert [(e.state, e.severity) for e in alerts] == [
        ("raised", "critical"),
        ("cleared", "critical"),
    ]


@pytest.mark.slow
def test_a_missing_then_deleted_watch_root_is_waited_for(tmp_path: Path) -> None:
    """A watch root missing at start is reported in STATUS and waited for; lines written
    once it exists are processed, and so are lines written after it was deleted and
    created again mid-run."""
    config = _config(tmp_path)
    incoming, output = tmp_path / "incoming", tmp_path / "output"
    incoming.rmdir()
    listener = NotifyListener(tmp_path)
    with (tmp_path / "daemon.log").open("wb") as log:
        proc = start_daemon_with(
            config, stdout=log, stderr=log, env={"NOTIFY_SOCKET": str(listener.path)}
        )
    try:
        listener.wait_for("READY", "1", timeout_s=30)
        _write_scan(incoming, "root-a", 3, tmp_path / "truth")
        wait_until(lambda: len(committed_keys(output / "root-a.zarr")) == 3, proc, 60, "a")
        shutil.rmtree(incoming)
        time.sleep(1.0)  # the watcher notices and disarms
        _write_scan(incoming, "root-b", 3, tmp_path / "truth")
        wait_until(lambda: len(committed_keys(output / "root-b.zarr")) == 3, proc, 60, "b")
    finally:
        code = _stop(proc)
        listener.close()
    assert code == 0
    ready = next(m for _, m in listener.snapshot() if m.startswith("READY=1"))
    assert f"waiting for watch root {incoming}" in ready


@pytest.mark.slow
def test_under_journald_console_lines_carry_priority_prefixes(tmp_path: Path) -> None:
    """With $JOURNAL_STREAM naming the daemon's stderr (device:inode) the console log is one
    line per record, each starting with its sd-daemon priority prefix: <6> for info,
    <4> for a quarantined file's warning (sd-daemon(3); systemd.exec(5) for
    $JOURNAL_STREAM)."""
    config = _config(tmp_path, logging={"console": "auto"}, alerts={"console": False})
    incoming = tmp_path / "incoming"
    stderr_path = tmp_path / "stderr.txt"
    with stderr_path.open("wb") as err:
        st = os.fstat(err.fileno())
        proc = start_daemon_with(
            config,
            stdout=subprocess.DEVNULL,
            stderr=err,
            env={"JOURNAL_STREAM": f"{st.st_dev}:{st.st_ino}"},
        )
    try:
        _write_scan(incoming, "jrn", 3, tmp_path / "truth")
        bad = incoming / "jrn" / "line_00007_fwd.h5"
        with h5py.File(bad, "w") as h5:  # opens as HDF5, breaks the line-file contract
            h5.attrs["format"] = "something else"
        store = tmp_path / "output" / "jrn.zarr"
        wait_until(lambda: len(committed_keys(store)) == 3, proc, 60, "3 lines")
        wait_until(lambda: "line_quarantined" in stderr_path.read_text(), proc, 30, "quarantine")
    finally:
        code = _stop(proc)
    assert code == 0
    lines = stderr_path.read_text().splitlines()
    assert lines
    pattern = re.compile(r"^<[0-7]>[a-z_]+( |$)")
    assert [x for x in lines if not pattern.match(x)] == []
    assert any(x.startswith("<6>service_ready ") for x in lines)
    # the fit kernels are made ready before the service is, and the log says so
    events = [x.split(" ")[0] for x in lines]
    assert events.index("<6>fit_kernels_preparing") < events.index("<6>fit_kernels_ready")
    assert events.index("<6>fit_kernels_ready") < events.index("<6>service_ready")
    assert sum(x.startswith("<6>line_processed ") for x in lines) == 3
    assert any(x.startswith("<4>line_quarantined ") for x in lines)
    assert not any(re.search(r"\d{4}-\d\d-\d\dT\d\d:\d\d", x.split(" ")[0]) for x in lines)
    json.dumps(lines)  # plain text, nothing binary


# ------------------------------------------------------------------ retries and backoff


def test_an_unreadable_file_is_retried_later_each_time_then_given_up() -> None:
    """A file that cannot be read waits 4, 16, 64, 256 and 300 s (4^n s, capped at
    5 × the output retry cap) before its retries and is given up at the sixth failure;
    a file read at last is forgotten."""
    from strayline.service._guards import UNREADABLE_ATTEMPTS, UnreadableFiles
    from strayline.watch import ReadyFile

    queue = UnreadableFiles()
    ready = ReadyFile(Path("/w/scan/line_00001_fwd.h5"), 1024, 0, "ready")
    delays = []
    now = 0.0
    while (delay := queue.failed(ready, "EIO", now)) is not None:
        delays.append(delay)
        assert queue.due(now) == []
        assert queue.next_try_s() == now + delay
        now += delay
        assert queue.due(now) == [ready]
    assert delays == [4.0, 16.0, 64.0, 256.0, 300.0]
    assert len(delays) == UNREADABLE_ATTEMPTS - 1
    assert queue.next_try_s() is None
    assert queue.failed(ready, "EIO", now) == 4.0  # given up: a new failure starts afresh
    queue.read(ready.path)
    queue.due(now + 4.0)
    assert queue.failed(ready, "EIO", now) == 4.0


def test_an_outage_backs_off_doubling_up_to_the_cap() -> None:
    """The first retry comes after RETRY_FIRST_S; each failed retry doubles the delay up
    to RETRY_MAX_S (exponential backoff, common practice)."""
    from strayline.service._guards import RETRY_FIRST_S, RETRY_MAX_S, Outage

    outage = Outage.begin("disk gone", 100.0)
    assert outage.next_try_s == 100.0 + RETRY_FIRST_S
    waits = []
    for _ in range(9):
        outage.failed_again(200.0)
        waits.append(outage.next_try_s - 200.0)
    assert waits[:3] == [2 * RETRY_FIRST_S, 4 * RETRY_FIRST_S, 8 * RETRY_FIRST_S]
    assert waits[-1] == RETRY_MAX_S
    assert outage.since_s == 100.0
    assert outage.reason == "disk gone"


# ------------------------------------------------------------------ one daemon per state folder


def test_the_state_lock_is_held_once_and_names_its_owner(tmp_path: Path) -> None:
    """A second lock on the same state folder is refused naming the lock file and the
    holder's PID; once released, the folder can be locked again (flock(2), common
    practice for one-instance daemons)."""
    from strayline.service import AlreadyRunning, StateLock

    first = StateLock(tmp_path / "state")
    try:
        with pytest.raises(AlreadyRunning) as info:
            StateLock(tmp_path / "state")
        assert f"(PID {os.getpid()})" in str(info.value)
        assert str(tmp_path / "state" / "daemon.lock") in str(info.value)
    finally:
        first.release()
    StateLock(tmp_path / "state").release()


@pytest.mark.slow
def test_a_second_daemon_on_the_same_config_exits_75_and_raises_nothing(tmp_path: Path) -> None:
    """`strayline run` with the config a running daemon already uses exits 75 at once,
    saying another daemon holds the state folder, and leaves no alert behind: the first
    daemon goes on writing its scan."""
    config = _config(tmp_path)
    proc = _start(config, tmp_path / "daemon.log")
    try:
        wait_until(
            lambda: "service_ready" in (tmp_path / "daemon.log").read_text(), proc, 30, "ready"
        )
        second = subprocess.run(
            [sys.executable, "-m", "strayline", "run", "--config", str(config)],
            capture_output=True,
            text=True,
            timeout=60,
            check=False,
        )
        assert second.returncode == 75
        assert f"another strayline daemon (PID {proc.pid}) already runs" in second.stderr
        _write_scan(tmp_path / "incoming", "solo", 3, tmp_path / "truth")
        wait_until(
            lambda: len(committed_keys(tmp_path / "output" / "solo.zarr")) == 3, proc, 60, "3"
        )
    finally:
        assert _stop(proc) == 0
    assert read_alert_log(tmp_path / "output" / "alerts.jsonl") == []  # a clean scan: none


@pytest.mark.slow
def test_the_output_down_alert_reaches_the_hook_and_the_stop_file_while_the_output_is_down(
    tmp_path: Path,
) -> None:
    """With the output folder (and so the alert log) unusable, the critical
    output_unavailable raise still runs the hook and writes the stop-request file, while
    the output is still down; once it is back the raise and its clear are in the alert
    log, and the hook has run once for each."""
    calls = tmp_path / "hook.txt"
    script = "import sys; open(sys.argv[1], 'a').write(sys.argv[2] + '\\n')"
    config = _config(
        tmp_path,
        alerts={
            "hook": {"critical": [sys.executable, "-c", script, str(calls), "{rule}:{state}"]},
            "stop_request_file": str(tmp_path / "STOP_REQUEST.json"),
        },
    )
    incoming, output, stage = tmp_path / "incoming", tmp_path / "output", tmp_path / "stage"
    _write_scan(stage, "down", 6, tmp_path / "truth")
    proc = _start(config, tmp_path / "daemon.log")
    try:
        _move_lines(stage, incoming, "down", range(3))
        wait_until(lambda: len(committed_keys(output / "down.zarr")) == 3, proc, 60, "3 lines")
        output.rename(tmp_path / "output.away")
        output.write_text("not a folder\n")
        _move_lines(stage, incoming, "down", range(3, 6))
        wait_until((tmp_path / "STOP_REQUEST.json").exists, proc, 30, "stop file")
        wait_until(calls.exists, proc, 30, "the hook")
        assert output.is_file()  # still down when both arrived
        assert calls.read_text() == "output_unavailable:raised\n"
        output.unlink()
        (tmp_path / "output.away").rename(output)
        wait_until(lambda: len(committed_keys(output / "down.zarr")) == 6, proc, 60, "6 lines")
        wait_until(lambda: calls.read_text().count("\n") == 2, proc, 30, "the clear's hook")
    finally:
        assert _stop(proc) == 0
    assert calls.read_text() == "output_unavailable:raised\noutput_unavailable:cleared\n"
    logged = [
        e.state for e in read_alert_log(output / "alerts.jsonl") if e.rule == "output_unavailable"
    ]
    assert logged == ["raised", "cleared"]
