"""``strayline process`` over an archive of scans: one task per scan folder, in this
process or on an embedded Dask cluster; the stores do not depend on the number of workers,
and a pass killed at any instant is finished by the next one."""

from __future__ import annotations

import io
import json
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml
import zarr

import demo_stream as ds
from strayline.config import Config, config_from_mapping
from strayline.pipeline import process_folder
from strayline.pipeline.folder import (
    ProcessProgress,
    ProcessSummary,
    rule_state_file,
    run_scan_tasks,
    scan_tasks,
)
from strayline.store import MAP_NAMES
from tests._daemon import kill_midway

N_SCANS, N_LINES, N_PIXELS = 3, 8, 24


def _archive(root: Path, n_scans: int = N_SCANS, n_lines: int = N_LINES) -> Path:
    """Demo scans, one folder each, under ``root/incoming`` (fixed seeds)."""
    for i in range(n_scans):
        scan = ds.DemoConfig(n_lines=n_lines, n_pixels=N_PIXELS, seed=i, scan_id=f"arch{i}")
        ds.run_scan(scan, root / "incoming", root / "truth", pace_s=0.0)
    return root / "incoming"


def _config_data(root: Path) -> dict[str, object]:
    return {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "logging": {"console": "off"},
        "products": {"enabled": False},
        "alerts": {"console": False},
    }


def _config(root: Path) -> Config:
    return config_from_mapping(_config_data(root), base_dir=root)


def _maps(output: Path, scan_id: str) -> dict[str, np.ndarray]:
    group = zarr.open_group(output / f"{scan_id}.zarr", mode="r")
    return {f"{d}/{n}": group[f"{d}/{n}"][:] for d in ("forward", "backward") for n in MAP_NAMES}


def _ledger(output: Path, scan_id: str) -> list[dict[str, object]]:
    text = (output / f"{scan_id}.zarr" / "ledger" / "records.jsonl").read_text()
    return [json.loads(r) for r in text.splitlines()]


def test_scan_tasks_group_files_by_scan_folder_in_acquisition_order(tmp_path: Path) -> None:
    """Each scan folder is one task holding its files in acquisition order; each task's
    rule state has a file of its own named after its folder."""
    incoming = _archive(tmp_path, n_scans=2, n_lines=3)
    config = _config(tmp_path)
    tasks = scan_tasks(config, incoming)
    assert [folder.name for folder, _ in tasks] == ["arch0", "arch1"]
    for folder, files in tasks:
        assert [f.name for f in files] == [f"line_0000{i}_fwd.h5" for i in range(3)]
        assert all(f.parent == folder for f in files)
    states = {rule_state_file(config, incoming, folder) for folder, _ in tasks}
    assert states == {config.paths.state_dir / "process" / f"arch{i}.json" for i in (0, 1)}
    odd = rule_state_file(config, incoming, incoming / "a b" / "c")
    assert odd.name == "a_b_c.json"


def test_progress_counts_scans_and_lines() -> None:
    """The progress line counts scans and lines done against the totals."""
    out = io.StringIO()
    meter = ProcessProgress(scans_total=2, lines_total=10, stream=out)
    meter.add(ProcessSummary(4, 4, 0, 0, 0, 0, 0, scans=1))
    assert out.getvalue().startswith("scans 1/2 · lines 4/10 · ")
    assert out.getvalue().rstrip().endswith(" left")


@pytest.mark.slow
def test_two_workers_store_what_one_stores_bit_for_bit(tmp_path: Path) -> None:
    """The same archive processed by one worker and by an embedded cluster of two gives
    the same maps in every store, bit for bit, and the same alert events (the scans are
    independent tasks; reprocessing must not depend on how it was spread)."""
    results = {}
    for workers in (1, 2):
        root = tmp_path / f"w{workers}"
        _archive(root)
        summary = process_folder(_config(root), root / "incoming", workers=workers)
        assert (summary.files, summary.written, summary.scans) == (N_SCANS * N_LINES,) * 2 + (
            N_SCANS,
        )
        assert summary.workers == workers
        alerts = root / ".strayline" / "alerts.jsonl"
        events = []
        if alerts.exists():
            events = sorted(
                (r["scan_id"], r["rule"], r["state"], r["line_index"])
                for r in map(json.loads, alerts.read_text().splitlines())
            )
        results[workers] = (
            {f"arch{i}": _maps(root / "output", f"arch{i}") for i in range(N_SCANS)},
            events,
        )
    (one, one_events), (two, two_events) = results[1], results[2]
    for scan_id, maps in one.items():
        for name, values in maps.items():
            np.testing.assert_array_equal(values, two[scan_id][name], err_msg=f"{scan_id} {name}")
    assert one_events == two_events


@pytest.mark.slow
def test_a_pass_killed_with_sigkill_is_finished_by_the_next(tmp_path: Path) -> None:
    """kill -9 of ``strayline process --workers 2`` and all its workers while lines are
    being committed loses nothing: a second pass commits every line, no line is left
    begun without its commit or reset, and the maps equal those of a pass never
    interrupted (the write-ahead ledger's promise)."""
    n_scans, n_lines = 4, 24
    incoming = _archive(tmp_path, n_scans=n_scans, n_lines=n_lines)
    config = tmp_path / "strayline.yaml"
    config.write_text(yaml.safe_dump(_config_data(tmp_path)), encoding="utf-8")
    output = tmp_path / "output"
    command = [sys.executable, "-m", "strayline", "process", str(incoming)]
    command += ["--config", str(config), "--workers", "2"]
    kill_midway(command, tmp_path, output, after=8, total=n_scans * n_lines)
    clean_root = tmp_path / "clean"
    _archive(clean_root, n_scans=n_scans, n_lines=n_lines)
    process_folder(_config(clean_root), clean_root / "incoming", workers=1)
    for i in range(n_scans):
        records = _ledger(output, f"arch{i}")
        last = {}
        for record in records:
            last[(record["line_index"], record["direction"])] = record["event"]
        assert sorted(k for k, v in last.items() if v == "commit") == [
            (j, "forward") for j in range(n_lines)
        ]
        clean = _maps(clean_root / "output", f"arch{i}")
        for name, values in _maps(output, f"arch{i}").items():
            np.testing.assert_array_equal(values, clean[name], err_msg=f"arch{i} {name}")


def _threads_seen(config: Config, *args: object) -> ProcessSummary:
    import numba

    return ProcessSummary(int(numba.get_num_threads()), 0, 0, 0, 0, 0, 0, scans=1)


def test_workers_are_cores_in_this_process_too(tmp_path: Path) -> None:
    """``--workers 1`` runs the scans here on one core (the fit kernels on one thread), a
    single scan given two workers gets both cores for its fit, and the fit threads are
    given back afterwards (common practice: a worker count is a count of cores)."""
    import numba

    if numba.config.NUMBA_NUM_THREADS < 2:  # type: ignore[attr-defined]
        pytest.skip("one core here")
    before = numba.get_num_threads()
    config = _config(tmp_path)
    meter = ProcessProgress(1, 1)
    one = run_scan_tasks(_threads_seen, config, [()], workers=1, scheduler=None, meter=meter)
    two = run_scan_tasks(_threads_seen, config, [()], workers=2, scheduler=None, meter=meter)
    assert (one.files, two.files, one.workers, two.workers) == (1, 2, 1, 1)
    assert numba.get_num_threads() == before
