"""End-to-end: the real daemon (a subprocess) watching a folder the demo instrument fills."""

from __future__ import annotations

import json
import random
import signal
import time
from pathlib import Path

import numpy as np
import pytest
import zarr

import demo_stream as ds
from strayline.config import load_config
from strayline.pipeline import process_folder
from strayline.store._layout import LEDGER_FILE
from strayline.store._ledger import parse_records
from tests._daemon import (
    json_records,
    start_daemon,
    stop_daemon,
    wait_committed,
    wait_until,
    write_config,
)

pytestmark = pytest.mark.slow

SCAN = "e2e-scan"


def _scan(n_lines: int, n_pixels: int, *faults: str, seed: int = 3) -> ds.DemoConfig:
    return ds.DemoConfig(
        scene=ds.labyrinth(),
        n_lines=n_lines,
        n_pixels=n_pixels,
        faults=tuple(ds.parse_fault(f) for f in faults),
        seed=seed,
        scan_id=SCAN,
    )


def _maps(store: Path, name: str) -> np.ndarray:
    return np.asarray(zarr.open_group(store, mode="r")[f"forward/{name}"][:])


def test_live_field_map_matches_truth_within_3_sigma(tmp_path: Path) -> None:
    """The daemon's field map, built live while the instrument writes at pace, lies within
    3σ of the demo's ground truth for at least 99 % of pixels (Gaussian 3σ covers 99.73 %;
    the fitter's σ is checked against repeated noise in test_fit)."""
    config = write_config(tmp_path)
    proc = start_daemon(config, tmp_path / "daemon.log")
    try:
        time.sleep(1.0)  # the scan folder is created after the daemon started
        ds.run_scan(_scan(24, 64), tmp_path / "incoming", tmp_path / "truth", pace_s=0.05)
        store = tmp_path / "output" / f"{SCAN}.zarr"
        assert wait_committed(store, 24, proc, timeout_s=120) == 24
    finally:
        code = stop_daemon(proc)
    assert code == 0, (tmp_path / "daemon.log").read_text()[-3000:]
    truth = ds.load_truth(tmp_path / "truth", SCAN).map("field_nv_t", "forward")
    field = _maps(store, "field_nv_t")
    sigma = _maps(store, "field_nv_sigma_t")
    within = np.abs(field - truth) <= 3 * sigma
    assert within.mean() >= 0.99, f"only {within.mean():.2%} within 3 sigma"
    events = [
        json.loads(x)
        for x in (tmp_path / "daemon.log").read_text().splitlines()
        if x.startswith("{")  # the alert sink's console lines are plain text
    ]
    processed = [e for e in events if e.get("event") == "line_processed"]
    assert len(processed) == 24
    assert {"scan", "line", "pixels", "failures", "fit_s", "write_s"} <= processed[0].keys()


def test_bad_files_are_quarantined_and_the_daemon_carries_on(tmp_path: Path) -> None:
    """A corrupt line file goes to the scan's _quarantine folder with a sidecar naming the
    problem, a slow in-place write is processed once complete, a re-delivered identical file
    is skipped, and files arriving out of order all land (common practice)."""
    # A corrupt file fails the watcher's open probe; it is handed over as given up (and
    # quarantined) once give_up_s has passed since it was first seen.
    config = write_config(tmp_path, watch={"give_up_s": 3.0})
    proc = start_daemon(config, tmp_path / "daemon.log")
    incoming = tmp_path / "incoming"
    store = tmp_path / "output" / f"{SCAN}.zarr"
    try:
        ds.run_scan(
            _scan(10, 32, "corrupt_file@4", "slow_in_place_write@6"),
            incoming,
            tmp_path / "truth",
            pace_s=0.0,
        )
        assert wait_committed(store, 9, proc, timeout_s=60) == 9
        folder = incoming / SCAN
        sidecar_path = folder / "_quarantine" / "line_00004_fwd.h5.error.json"
        deadline = time.monotonic() + 30
        while not sidecar_path.exists() and time.monotonic() < deadline:
            time.sleep(0.1)
        # Re-deliver line 2 unchanged, then line 4 repaired, out of order.
        good = _scan(10, 32)
        ds.run_scan(good, tmp_path / "again", tmp_path / "truth2", pace_s=0.0)
        again = {
            "line_00004_fwd.h5": (tmp_path / "again" / SCAN / "line_00004_fwd.h5").read_bytes(),
            "line_00002_fwd.h5": (folder / "line_00002_fwd.h5").read_bytes(),  # same bytes
        }
        for name, data in again.items():
            tmp = folder / f".{name}.tmp"
            tmp.write_bytes(data)
            tmp.rename(folder / name)
        assert wait_committed(store, 10, proc, timeout_s=60) == 10
        time.sleep(1.0)  # give the duplicate time to be seen and skipped
    finally:
        code = stop_daemon(proc)
    assert code == 0
    quarantined = sorted(p.name for p in (folder / "_quarantine").iterdir())
    assert quarantined == ["line_00004_fwd.h5", "line_00004_fwd.h5.error.json"]
    sidecar = json.loads(sidecar_path.read_text())
    assert sidecar["file"].endswith("line_00004_fwd.h5")
    assert sidecar["expected"]
    assert sidecar["found"]
    log = (tmp_path / "daemon.log").read_text()
    assert "line_skipped_duplicate" in log
    records, _ = parse_records((store / LEDGER_FILE).read_bytes(), "ledger")
    commits = [(r["line_index"], r["direction"]) for r in records if r["event"] == "commit"]
    assert sorted(commits) == [(i, "forward") for i in range(10)]


def test_kill_9_at_random_instants_loses_nothing(tmp_path: Path) -> None:
    """Killing the daemon with SIGKILL at random instants (5 times, fixed seed) and
    restarting it gives the same store as one uninterrupted pass: same values, every line
    committed exactly once (the write-ahead ledger's promise; common practice for
    crash-safety tests)."""
    n_lines = 16
    ds.run_scan(_scan(n_lines, 48), tmp_path / "incoming", tmp_path / "truth", pace_s=0.0)
    # The reference: one uninterrupted pass of the same pipeline over the same files.
    ref_dir = tmp_path / "ref"
    ref_dir.mkdir()
    ref_cfg = write_config(ref_dir)
    ref_cfg_loaded = load_config(ref_cfg)
    process_folder(ref_cfg_loaded, tmp_path / "incoming")
    ref_store = ref_dir / "output" / f"{SCAN}.zarr"

    config = write_config(tmp_path)
    store = tmp_path / "output" / f"{SCAN}.zarr"
    rng = random.Random(20261202)
    for _ in range(5):
        proc = start_daemon(config, tmp_path / "daemon.log")
        time.sleep(rng.uniform(0.8, 3.0))
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    log = tmp_path / "output" / "strayline.log.jsonl"

    def readies() -> int:
        return sum(r.get("event") == "service_ready" for r in json_records(log))

    before = readies()
    proc = start_daemon(config, tmp_path / "daemon.log")
    try:
        assert wait_committed(store, n_lines, proc, timeout_s=120) == n_lines
        # (the killed runs may have committed every line: let this one come up first)
        wait_until(lambda: readies() > before, proc, 60.0, "the last start")
    finally:
        assert stop_daemon(proc) == 0
    for name in ("field_nv_t", "field_nv_sigma_t", "freq_lo_hz", "status", "y"):
        if name == "y":
            got = np.asarray(zarr.open_group(store, mode="r")["forward/y"][:])
            want = np.asarray(zarr.open_group(ref_store, mode="r")["forward/y"][:])
        else:
            got, want = _maps(store, name), _maps(ref_store, name)
        np.testing.assert_array_equal(got, want, err_msg=name)
    records, _ = parse_records((store / LEDGER_FILE).read_bytes(), "ledger")
    commits = [(r["line_index"], r["direction"]) for r in records if r["event"] == "commit"]
    assert sorted(commits) == [(i, "forward") for i in range(n_lines)], "a line committed twice"


@pytest.mark.parametrize("delay_s", [0.3, 1.0])
def test_a_stop_request_while_starting_exits_cleanly(tmp_path: Path, delay_s: float) -> None:
    """SIGTERM while the daemon is still importing and arming (before the service takes
    the signals over) ends it with exit code 0, as systemd expects of a stop (common
    practice: a unit stopped mid-start is not a failed unit)."""
    config = write_config(tmp_path)
    proc = start_daemon(config, tmp_path / "daemon.log")
    try:
        time.sleep(delay_s)
        assert stop_daemon(proc) == 0
    finally:
        if proc.poll() is None:  # never leave a daemon behind a failed assertion
            proc.kill()
            proc.wait(timeout=30)
