"""Tests of demo_stream.calibration: calibration scans of a known film edge, and the whole
chain from their spectra to a calibrated stand-off."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

import demo_stream as ds
from strayline.config import config_from_mapping
from strayline.lines import read_line_file
from strayline.physics import MU0
from strayline.pipeline import LinePipeline
from strayline.products import calibrate_store


def test_calibration_scans_draw_standoff_edge_and_a_field_in_the_sweep() -> None:
    """Over seeds, the stand-off lies in 30–120 nm, the edge's peak field μ0 I_s/(2π d)
    (PHYSICS.md §5) in 1.5–3.5 mT, the edge is sharp, the tip is named; a seed gives the
    same scan twice."""
    standoffs = []
    for seed in range(40):
        scan = ds.calibration_scan(seed)
        d = scan.tip.standoff_m
        standoffs.append(d)
        assert 30e-9 <= d <= 120e-9
        peak = MU0 * scan.scene.params["sheet_moment_a"] / (2 * math.pi * d)
        assert 1.5e-3 <= peak <= 3.5e-3
        assert scan.scene.name == "film_edge"
        assert scan.scene.params["wall_width_m"] <= 1e-9
        assert scan.tip.tip_id == "demo-tip"
    assert max(standoffs) - min(standoffs) > 60e-9
    again = ds.calibration_scan(7)
    assert again.tip == ds.calibration_scan(7).tip
    assert dict(again.scene.params) == dict(ds.calibration_scan(7).scene.params)


def test_a_given_tip_keeps_its_standoff_and_the_files_name_it(tmp_path: Path) -> None:
    """Calibrating a given tip scans with its stand-off; every line file carries tip_id."""
    tip = ds.TipModel(standoff_m=72e-9)
    scan = ds.calibration_scan(3, tip=tip, n_lines=2, n_pixels=8, tip_id="bench-7")
    assert scan.tip.standoff_m == 72e-9
    ds.run_scan(scan, tmp_path / "in", tmp_path / "truth")
    files = sorted((tmp_path / "in" / scan.scan_id).glob("line_*.h5"))
    assert len(files) == 2
    assert {read_line_file(f).tip_id for f in files} == {"bench-7"}


@pytest.mark.slow
def test_the_pipeline_and_calibration_recover_the_drawn_standoff(tmp_path: Path) -> None:
    """Three demo calibration scans through the real pipeline (ODMR fits, field, store)
    and ``calibrate_store``: d and M_s t within 3σ of the drawn truth (the coverage over
    many seeds is benchmarks/calibration_coverage.py)."""
    config = config_from_mapping(
        {
            "paths": {"watch_root": "in", "output_root": "out"},
            "logging": {"console": "off"},
            "alerts": {"console": False},
            "products": {"enabled": False},
        },
        base_dir=tmp_path,
    )
    pipeline = LinePipeline(config)
    try:
        for seed in range(3):
            scan = ds.calibration_scan(seed, n_lines=16, n_pixels=40, scan_id=f"cal-{seed}")
            ds.run_scan(scan, tmp_path / "in", tmp_path / "truth")
            for path in sorted((tmp_path / "in" / scan.scan_id).glob("line_*.h5")):
                pipeline.process(path)
            record = calibrate_store(
                tmp_path / "out" / f"{scan.scan_id}.zarr", model="film-edge"
            ).record
            z_d = (record.standoff_m - scan.tip.standoff_m) / record.standoff_sigma_m
            truth = scan.scene.params["sheet_moment_a"]
            z_m = (record.values["sheet_moment_a"] - truth) / record.sigmas["sheet_moment_a"]
            assert abs(z_d) < 3, (seed, z_d)
            assert abs(z_m) < 3, (seed, z_m)
            assert np.isfinite(record.fit["chi2_red"])
    finally:
        pipeline.close()
