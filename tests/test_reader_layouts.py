"""One demo scan written in each layout the daemon reads (demo_stream ``layout``): the
readers give the same lines, and the pipeline makes the same stores from them."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest

import demo_stream as ds
from strayline.alerts import read_alert_log
from strayline.config import config_from_mapping
from strayline.lines import ScanLine, installed_readers
from strayline.pipeline import process_folder
from strayline.store import MAP_NAMES, open_store_reader

SCAN = "layouts-1"
READER = {"line-files": "line-file", "growing-file": "growing-file", "plain-arrays": "plain-arrays"}


def _clock() -> Callable[[], datetime]:
    """A wall clock that starts at the same instant on every call of this function and
    moves 50 ms per reading: the same scan written twice carries the same times."""
    moments = iter(
        datetime(2025, 3, 14, 9, 0, tzinfo=UTC) + timedelta(seconds=0.05 * i) for i in range(10**6)
    )
    return lambda: next(moments)


def _write(folder: Path, layout: str, demo: ds.DemoConfig) -> Path:
    ds.run_scan(
        demo,
        folder / "incoming",
        folder / "truth",
        sleep=lambda _s: None,
        layout=layout,
        wall_clock=_clock(),
    )
    return folder / "incoming" / demo.scan_id


def _lines(folder: Path, layout: str) -> list[ScanLine]:
    reader = installed_readers().readers[READER[layout]]
    paths = sorted(p for p in folder.iterdir() if p.is_file() and p.suffix in (".h5", ".npz"))
    lines = [line for path in paths for line in reader.read(path)]
    return sorted(lines, key=lambda ln: (ln.line_index, ln.direction))


def _same(a: ScanLine, b: ScanLine) -> None:
    for name in ("freq_hz", "counts", "x_m"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    for name in (
        "scan_id",
        "line_index",
        "n_lines_planned",
        "direction",
        "start_time",
        "end_time",
        "dwell_s",
        "nv_theta_rad",
        "nv_phi_rad",
        "y_m",
        "temperature_k",
        "profile",
    ):
        assert getattr(a, name) == getattr(b, name), name


def test_each_layout_gives_the_same_lines(tmp_path: Path) -> None:
    """The demo scan written as line files, as a growing file and as plain arrays reads
    back as the same lines (all but the source and checksum)."""
    demo = ds.DemoConfig(n_lines=3, n_pixels=6, trace_retrace=True, scan_id=SCAN, seed=9)
    found = {layout: _lines(_write(tmp_path / layout, layout, demo), layout) for layout in READER}
    reference = found["line-files"]
    assert len(reference) == 6
    for layout in ("growing-file", "plain-arrays"):
        assert len(found[layout]) == 6
        for a, b in zip(reference, found[layout], strict=True):
            _same(a, b)


def test_file_faults_need_the_line_files_layout(tmp_path: Path) -> None:
    """A corrupt-file fault cannot be written in the growing-file layout."""
    demo = ds.DemoConfig(n_lines=3, n_pixels=4, faults=(ds.parse_fault("corrupt_file@1"),))
    with pytest.raises(ValueError, match="file faults"):
        ds.run_scan(demo, tmp_path / "in", tmp_path / "truth", layout="growing-file")


@pytest.mark.slow
def test_the_same_scan_in_three_layouts_gives_identical_stores(tmp_path: Path) -> None:
    """Processed by the daemon's pipeline, the scan in each layout gives bit-for-bit the
    same maps in both directions and the same alert events (all but their delivery time);
    the lines' checksums differ between layouts, which the store does not compare."""
    demo = ds.DemoConfig(
        n_lines=16,
        n_pixels=24,
        trace_retrace=True,
        scan_id=SCAN,
        seed=5,
        faults=(ds.parse_fault("fluorescence_lost@11:8"),),
    )
    maps: dict[str, dict[tuple[str, str], np.ndarray]] = {}
    alerts: dict[str, list[object]] = {}
    for layout, reader in READER.items():
        folder = tmp_path / layout
        _write(folder, layout, demo)
        config = config_from_mapping(
            {
                "paths": {"watch_root": "incoming", "output_root": "output"},
                "readers": {"default": reader},
                "alerts": {"console": False},
                "logging": {"console": "off"},
            },
            base_dir=folder,
        )
        summary = process_folder(config, folder / "incoming")
        assert summary.written == 32, layout
        store = open_store_reader(config.paths.output_root / f"{SCAN}.zarr")
        maps[layout] = {
            (name, direction): store.read_array(name, direction)
            for name in MAP_NAMES
            for direction in ("forward", "backward")
        }
        alerts[layout] = [
            replace(event, time="") for event in read_alert_log(config.paths.alert_log)
        ]
    assert alerts["line-files"], "the fault should raise an alert"
    for layout in ("growing-file", "plain-arrays"):
        assert alerts[layout] == alerts["line-files"], layout
        for key, values in maps["line-files"].items():
            other = maps[layout][key]
            assert other.dtype == values.dtype, (layout, key)
            assert other.tobytes() == values.tobytes(), (layout, key)
