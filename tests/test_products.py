"""Tests of strayline.products: images, vector field, sheet moment, report, hook and CLI."""

from __future__ import annotations

import dataclasses
import json
import math
import shutil
import struct
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import magpylib as magpy
import numpy as np
import pytest
import xarray as xr
import zarr
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import constants
from structlog.testing import capture_logs

import demo_stream as ds
import strayline
from strayline.alerts import AlertEvent
from strayline.cli import main
from strayline.config import config_from_mapping
from strayline.errors import ConfigError, StoreError
from strayline.field import LineField
from strayline.fit import FitStatus, LineFit
from strayline.lines import ScanLine
from strayline.physics import nv_axis
from strayline.pipeline import LinePipeline
from strayline.products import (
    REPORT_JSON,
    REPORT_MD,
    VECTOR_ZARR,
    make_products,
    products_dir,
    remake_products,
)
from strayline.products._maps import assemble_trace, fill_nearest, reconstruct_vector
from strayline.store import ScanStore

# Forward-modelled sample: a square film patch, sheet moment 1 mA, magnetised along +z,
# seen by a (100) tip: θ = arccos(1/√3), φ = 45° (PHYSICS.md §6).
N = 64
PITCH_M = 20e-9
STANDOFF_M = 50e-9
SIDE_M = 400e-9
THICKNESS_M = 1e-9
SHEET_A = 1e-3
THETA = math.acos(1.0 / math.sqrt(3.0))
PHI = math.radians(45.0)
HOLE = (slice(2, 5), slice(50, 53))  # 3 x 3 pixels with no resonance, far from the patch
ONE_RES = ((40, 5), (41, 5), (42, 5), (43, 5), (44, 5))  # one-resonance pixels, field kept
SCAN = "patch-01"
DWELL_S = 1e-3
T0 = datetime(2031, 5, 4, 12, 0, tzinfo=UTC)


def axis_m(n: int, pitch_m: float) -> np.ndarray:
    """Pixel centres symmetric about 0, m."""
    return (np.arange(n) - n / 2 + 0.5) * pitch_m


def patch_field_t(n: int, pitch_m: float, side_m: float) -> np.ndarray:
    """Field (ny, nx, 3) of the patch at the standoff, from magpylib's analytic cuboid."""
    x = axis_m(n, pitch_m)
    gx, gy = np.meshgrid(x, x)
    cuboid = magpy.magnet.Cuboid(
        polarization=(0.0, 0.0, constants.mu_0 * SHEET_A / THICKNESS_M),
        dimension=(side_m, side_m, THICKNESS_M),
        position=(0.0, 0.0, -THICKNESS_M / 2),
    )
    return np.asarray(cuboid.getB(np.stack([gx, gy, np.full_like(gx, STANDOFF_M)], axis=-1)))


def line_records(
    index: int,
    field_row_t: np.ndarray,
    status_row: np.ndarray,
    rng: np.random.Generator,
    *,
    scan_id: str = SCAN,
    n_lines: int = N,
    x_m: np.ndarray | None = None,
    pitch_m: float = PITCH_M,
) -> tuple[ScanLine, LineFit, LineField]:
    """Synthetic line, fit and field records carrying one row of a known field map."""
    n = field_row_t.size
    x = axis_m(n, pitch_m) if x_m is None else x_m
    line = ScanLine(
        source=Path(f"/nonexistent/{scan_id}/line_{index:05d}_fwd.h5"),
        scan_id=scan_id,
        line_index=index,
        n_lines_planned=n_lines,
        direction="forward",
        start_time=T0 + timedelta(seconds=index),
        end_time=T0 + timedelta(seconds=index + 1),
        dwell_s=DWELL_S,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        freq_hz=np.array([2.80e9, 2.87e9, 2.94e9]),
        counts=np.full((n, 3), 200, dtype=np.int32),
        x_m=x,
        y_m=float(axis_m(n_lines, pitch_m)[index]),
        sha256=f"{index:064x}",
    )
    contrast = np.column_stack([rng.uniform(0.10, 0.14, n), rng.uniform(0.16, 0.20, n)])
    pair = np.full((n, 2), 2.87e9)
    fit = LineFit(
        center_hz=pair,
        center_sigma_hz=np.full((n, 2), 3e4),
        contrast=contrast,
        contrast_sigma=np.full((n, 2), 0.005),
        fwhm_hz=np.full((n, 2), 9e6),
        fwhm_sigma_hz=np.full((n, 2), 2e5),
        baseline=rng.normal(200.0, 5.0, n),
        baseline_sigma=np.full(n, 1.0),
        slope=np.zeros(n),
        chi2_red=rng.uniform(0.9, 1.1, n),
        status=status_row.astype(np.uint8),
        n_iter=np.full(n, 6, dtype=np.int32),
    )
    field = LineField(
        field_nv_t=field_row_t.copy(),
        field_nv_sigma_t=np.full(n, 2e-6),
        field_nv_bound_t=np.where(status_row == FitStatus.MERGED, 1.5e-4, np.nan),
        field_abs_t=np.abs(field_row_t),
        field_abs_sigma_t=np.full(n, 2e-6),
        angle_rad=np.zeros(n),
        angle_sigma_rad=np.zeros(n),
        center_mean_hz=np.full(n, 2.87e9),
        center_mean_sigma_hz=np.full(n, 2e4),
        status=status_row.astype(np.uint8),
    )
    return line, fit, field


def write_store(
    root: Path,
    b_nv_t: np.ndarray,
    status: np.ndarray,
    *,
    scan_id: str = SCAN,
    lines: range | None = None,
    raw_spectra: bool = False,
    config_json: dict[str, Any] | None = None,
    seed: int = 5,
    nv_axis_rad: tuple[float, float] | None = None,
) -> tuple[Path, dict[str, np.ndarray]]:
    """A scan store holding ``b_nv_t`` row by row; returns its path and the written maps."""
    n_lines, n_pixels = b_nv_t.shape
    rng = np.random.default_rng(seed)
    written: dict[str, list[np.ndarray]] = {"pl": [], "contrast_lo": [], "contrast_hi": []}
    x = axis_m(n_pixels, PITCH_M)
    with ScanStore.open(
        root,
        scan_id,
        n_lines_planned=n_lines,
        n_pixels=n_pixels,
        x_m=x,
        config_json=config_json or {"note": "synthetic"},
        config_digest="feedface",
        nv_axis_rad=nv_axis_rad,
        raw_spectra=raw_spectra,
        compression_level=1,
        durable=False,
    ) as store:
        for i in lines if lines is not None else range(n_lines):
            line, fit, field = line_records(
                i, b_nv_t[i], status[i], rng, scan_id=scan_id, n_lines=n_lines
            )
            store.write_line(line, fit, field)
            written["pl"].append(fit.baseline / DWELL_S)
            written["contrast_lo"].append(fit.contrast[:, 0])
            written["contrast_hi"].append(fit.contrast[:, 1])
    return root / f"{scan_id}.zarr", {k: np.concatenate(v) for k, v in written.items()}


def alert(scan_id: str, rule: str, state: str, severity: str = "warning") -> AlertEvent:
    """An alert event of a scan (only the fields the report reads matter)."""
    return AlertEvent(
        time="2031-05-04T12:00:30.000+00:00",
        scan_id=scan_id,
        rule=rule,
        severity=severity,
        state=state,  # type: ignore[arg-type]
        line_index=12,
        direction="forward",
        pixel_range=None,
        seen_value=None,
        seen_unit="",
        baseline_value=None,
        baseline_spread=None,
        confidence_z=None,
        message=f"{rule} {state}",
        advice="look at the scan",
    )


@pytest.fixture(scope="module")
def patch_truth() -> np.ndarray:
    """Field (ny, nx, 3), T, of the 1 mA patch on the 64 x 64 grid (magpylib)."""
    return patch_field_t(N, PITCH_M, SIDE_M)


@pytest.fixture(scope="module")
def patch_scan(tmp_path_factory: pytest.TempPathFactory, patch_truth: np.ndarray) -> dict[str, Any]:
    """The patch scan in a store, with a hole and an alert log, and its products made once."""
    root = tmp_path_factory.mktemp("patch")
    b_nv = patch_truth @ nv_axis(THETA, PHI)
    status = np.zeros(b_nv.shape, dtype=np.uint8)
    status[HOLE] = FitStatus.NO_RESONANCE
    for iy, ix in ONE_RES:
        status[iy, ix] = FitStatus.ONE_RESONANCE
    measured = np.where(status == FitStatus.NO_RESONANCE, np.nan, b_nv)
    store_path, written = write_store(root / "out", measured, status)
    alert_log = root / "out" / "alerts.jsonl"
    events = [
        alert(SCAN, "contrast_collapsed", "raised"),
        alert(SCAN, "contrast_collapsed", "cleared"),
        alert(SCAN, "resonance_jump", "raised", "critical"),
        alert("another-scan", "fluorescence_lost", "raised", "critical"),
    ]
    alert_log.write_text("".join(e.to_json() + "\n" for e in events), encoding="utf-8")
    out_dir = root / "out" / f"{SCAN}.products"
    report = make_products(
        store_path,
        standoff_m=STANDOFF_M,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        out_dir=out_dir,
        alert_log=alert_log,
        clock=lambda: datetime(2031, 5, 4, 13, 0, tzinfo=UTC),
    )
    data = json.loads((out_dir / REPORT_JSON).read_text(encoding="utf-8"))
    return {
        "root": root,
        "store": store_path,
        "b_nv": measured,
        "status": status,
        "written": written,
        "report": report,
        "json": data,
        "out_dir": out_dir,
        "alert_log": alert_log,
    }


def png_size(path: Path) -> tuple[int, int]:
    """Width and height from a PNG's IHDR chunk (PNG specification, section 11.2.2)."""
    head = path.read_bytes()[:24]
    assert head[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", head[16:24])


# -- images -------------------------------------------------------------------------------


def test_images_are_written_readable_and_leave_no_figure_open(patch_scan: dict[str, Any]) -> None:
    """Both PNGs exist and are real images of a sensible size; no figure stays open."""
    import matplotlib.pyplot as plt
    from matplotlib.image import imread

    report = patch_scan["report"]
    for kind in ("quicklook_image", "vector_image"):
        path = report.path_of(kind, "forward")
        assert path is not None
        assert path.is_file()
        width, height = png_size(path)
        assert width >= 800
        assert height >= 400
        pixels = imread(path)
        assert float(np.std(pixels[..., :3])) > 0.05  # not a blank canvas
    assert plt.get_fignums() == []
    assert not list(patch_scan["out_dir"].glob(".*"))  # no temporary file left behind


def test_images_can_be_turned_off(patch_scan: dict[str, Any], tmp_path: Path) -> None:
    """With images off no PNG is written, stale PNGs of an earlier run are removed, and the
    report says the images were skipped."""
    out = tmp_path / "p"
    out.mkdir()
    (out / "quicklook_forward.png").write_bytes(b"old")
    (out / "notes.txt").write_text("mine", encoding="utf-8")
    report = make_products(
        patch_scan["store"],
        standoff_m=None,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        out_dir=out,
        images=False,
    )
    assert not list(out.glob("*.png"))
    assert (out / "notes.txt").read_text(encoding="utf-8") == "mine"
    assert {f.kind for f in report.files} == {"vector_field", "report_json", "report_md"}
    assert any(s.product == "images" for s in report.skipped)


# -- vector field and sheet moment --------------------------------------------------------


def test_vector_field_matches_magpylib_for_a_magnetised_patch(
    patch_scan: dict[str, Any], patch_truth: np.ndarray
) -> None:
    """Bx, By, Bz reconstructed from B_NV agree with magpylib's analytic field of the patch
    within 2 % of the peak field, each up to its uniform part (Lima & Weiss, J. Geophys.
    Res. 114, B06102 (2009); PHYSICS.md §4)."""
    group = zarr.open_group(patch_scan["out_dir"] / VECTOR_ZARR, mode="r")["forward"]
    peak = float(np.abs(patch_truth).max())
    inner = (slice(8, -8), slice(8, -8))
    for name, k in (("bx_t", 0), ("by_t", 1), ("bz_t", 2)):
        rec = np.asarray(group[name][:])
        true = patch_truth[..., k]
        error = (rec - rec.mean()) - (true - true.mean())
        # Measured 1.1-1.3 % of the peak without the hole: the field beyond the 1.28 µm
        # window is cut off, which no reconstruction from this window can restore.
        assert np.abs(error[inner]).max() < 0.02 * peak, name


def test_sheet_moment_of_the_patch_through_the_store(patch_scan: dict[str, Any]) -> None:
    """m_z written to the vector zarr recovers the 1.000 mA patch within 3 % (centre minus
    the median outside it); PHYSICS.md §4 [num] found 1.006 mA with the same Hann window
    (Beardsley, IEEE Trans. Magn. 25, 671 (1989); Broadway et al., Phys. Rev. Applied 14,
    024076 (2020))."""
    group = zarr.open_group(patch_scan["out_dir"] / VECTOR_ZARR, mode="r")["forward"]
    m_z = np.asarray(group["m_z_a"][:])
    x = axis_m(N, PITCH_M)
    gx, gy = np.meshgrid(x, x)
    outside = (np.abs(gx) > SIDE_M / 2 + 3 * STANDOFF_M) | (
        np.abs(gy) > SIDE_M / 2 + 3 * STANDOFF_M
    )
    recovered = m_z[N // 2, N // 2] - np.median(m_z[outside])
    # Measured 0.974 mA: the 64-pixel window truncates the patch's return field; the
    # deficit shrinks with the window (0.991 at 96 pixels, 0.995 at 128, next test).
    assert recovered == pytest.approx(SHEET_A, rel=0.03)
    assert group.attrs["k_cut_rad_per_m"] == pytest.approx(math.pi / STANDOFF_M)


def test_sheet_moment_converges_in_a_larger_window() -> None:
    """In a 128-pixel window the reconstruction recovers the 1.000 mA patch within 1 %
    (PHYSICS.md §4: 1.006 mA for 1.000 mA with a Hann window cut at π/d [num]; field from
    magpylib's analytic cuboid)."""
    n = 128
    b = patch_field_t(n, PITCH_M, SIDE_M)
    b_nv = b @ nv_axis(THETA, PHI)
    vector = reconstruct_vector(
        b_nv,
        np.ones(b_nv.shape, dtype=bool),
        pixel_m=(PITCH_M, PITCH_M),
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        standoff_m=STANDOFF_M,
    )
    assert vector.m_z_a is not None
    x = axis_m(n, PITCH_M)
    gx, gy = np.meshgrid(x, x)
    outside = (np.abs(gx) > SIDE_M / 2 + 3 * STANDOFF_M) | (
        np.abs(gy) > SIDE_M / 2 + 3 * STANDOFF_M
    )
    recovered = vector.m_z_a[n // 2, n // 2] - np.median(vector.m_z_a[outside])
    assert recovered == pytest.approx(SHEET_A, rel=0.01)  # measured 0.995 mA


def test_filled_pixels_are_flagged_and_the_zarr_is_labelled(patch_scan: dict[str, Any]) -> None:
    """The vector zarr opens as a labelled xarray dataset (dims y, x; coordinates and units
    in SI) and flags exactly the pixels without a measured field as filled."""
    ds_vec = xr.open_zarr(patch_scan["out_dir"] / VECTOR_ZARR, group="forward", consolidated=False)
    try:
        assert ds_vec["bz_t"].dims == ("y", "x")
        assert ds_vec["bz_t"].attrs["units"] == "T"
        assert ds_vec["m_z_a"].attrs["units"] == "A"
        assert ds_vec["x"].attrs["units"] == "m"
        np.testing.assert_allclose(ds_vec["x"].values, axis_m(N, PITCH_M))
        np.testing.assert_allclose(ds_vec["y"].values, axis_m(N, PITCH_M))
        filled = ds_vec["filled"].values.astype(bool)
    finally:
        ds_vec.close()
    expected = np.zeros((N, N), dtype=bool)
    expected[HOLE] = True
    np.testing.assert_array_equal(filled, expected)


def test_sheet_moment_is_skipped_without_a_standoff(
    patch_scan: dict[str, Any], tmp_path: Path
) -> None:
    """Without a standoff the vector field is still made, m_z is not, and the report says why."""
    report = make_products(
        patch_scan["store"],
        standoff_m=None,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        out_dir=tmp_path,
        images=False,
    )
    group = zarr.open_group(tmp_path / VECTOR_ZARR, mode="r")["forward"]
    assert "bz_t" in group
    assert "m_z_a" not in group
    data = json.loads((tmp_path / REPORT_JSON).read_text(encoding="utf-8"))
    assert data["standoff_m"] is None
    reasons = {s["product"]: s["reason"] for s in data["skipped"]}
    assert reasons["sheet moment (forward trace)"] == (
        "the NV-sample standoff is unknown (set products.standoff_nm or "
        "products.calibration, or pass --standoff-nm or --calibration)"
    )
    assert [s.product for s in report.skipped] == ["sheet moment (forward trace)", "images"]


def test_in_plane_nv_axis_skips_the_vector_field(
    patch_scan: dict[str, Any], tmp_path: Path
) -> None:
    """An NV axis in the sample plane cannot give Bz from one projection: no vector zarr,
    and the report names the angle (PHYSICS.md §4: the denominator is at least u_z)."""
    report = make_products(
        patch_scan["store"],
        standoff_m=STANDOFF_M,
        nv_theta_rad=math.pi / 2,
        nv_phi_rad=0.0,
        out_dir=tmp_path,
        images=False,
    )
    assert not (tmp_path / VECTOR_ZARR).exists()
    assert skipped_reasons(report).get("vector field (forward trace)") == (
        "the NV axis lies in the sample plane (θ = 90.00°)"
    )


def skipped_reasons(report: Any) -> dict[str, str]:
    """Reasons of a ProductsReport's skipped products, by product."""
    return {s.product: s.reason for s in report.skipped}


# -- report -------------------------------------------------------------------------------


def test_report_states_scan_fits_field_and_medians(patch_scan: dict[str, Any]) -> None:
    """report.json gives the scan's size, status fractions, field percentiles (T) and the PL
    and contrast medians, equal to numpy's statistics of the written maps."""
    data = patch_scan["json"]
    trace = data["traces"]["forward"]
    written = patch_scan["written"]
    b_nv = patch_scan["b_nv"]
    assert data["scan_id"] == SCAN
    assert (data["n_lines_planned"], data["n_pixels"]) == (N, N)
    assert trace["lines_committed"] == N
    assert trace["pixels_committed"] == N * N
    fractions = trace["fit_status_fractions"]
    assert fractions["no_resonance"] == pytest.approx(9 / N**2)
    assert fractions["one_resonance"] == pytest.approx(5 / N**2)
    assert trace["fit_ok_fraction"] == pytest.approx(1 - 14 / N**2)
    assert sum(fractions.values()) == pytest.approx(1.0)
    finite = b_nv[np.isfinite(b_nv)]
    stats = trace["field_nv_t"]
    assert stats["unit"] == "T"
    assert stats["count"] == finite.size
    assert stats["median"] == pytest.approx(np.median(finite), rel=1e-12)
    assert stats["p95"] == pytest.approx(np.percentile(finite, 95), rel=1e-12)
    assert trace["pl_rate_cps_median"] == pytest.approx(np.median(written["pl"]), rel=1e-12)
    contrast = (written["contrast_lo"] + written["contrast_hi"]) / 2
    assert trace["contrast_median"] == pytest.approx(np.median(contrast), rel=1e-12)
    assert trace["pixel_m"] == {"y": pytest.approx(PITCH_M), "x": pytest.approx(PITCH_M)}


def test_report_carries_versions_alerts_and_product_list(patch_scan: dict[str, Any]) -> None:
    """report.json names versions, the config digest, only this scan's alerts, and every
    product with a path that exists; report.md summarises the same."""
    data = patch_scan["json"]
    out_dir = patch_scan["out_dir"]
    assert data["software_version"] == strayline.__version__
    assert data["store_software_version"] == strayline.__version__
    assert data["config_digest"] == "feedface"
    assert data["made_time"] == "2031-05-04T13:00:00+00:00"
    assert data["standoff_m"] == pytest.approx(STANDOFF_M)
    assert data["nv_axis"]["theta_deg"] == pytest.approx(54.7356, abs=1e-4)
    alerts = data["alerts"]
    assert alerts["problem"] is None
    assert (alerts["raised"], alerts["cleared"]) == (2, 1)
    assert alerts["raised_by_rule"] == {"contrast_collapsed": 1, "resonance_jump": 1}
    assert {e["scan_id"] for e in alerts["events"]} == {SCAN}
    kinds = [p["kind"] for p in data["products"]]
    assert kinds == [
        "quicklook_image",
        "vector_image",
        "vector_field",
        "report_json",
        "report_md",
    ]
    assert all((out_dir / p["path"]).exists() for p in data["products"])
    assert data["skipped"] == []
    markdown = (out_dir / REPORT_MD).read_text(encoding="utf-8")
    assert markdown.startswith(f"# Scan {SCAN} — products")
    assert "2 raised, 1 cleared: contrast_collapsed ×1, resonance_jump ×1" in markdown
    assert "fits OK 99.7 %" in markdown


def test_unreadable_alert_log_is_reported_not_fatal(
    patch_scan: dict[str, Any], tmp_path: Path
) -> None:
    """A corrupt line in the alert log ends up in the report's alerts block, not as an error."""
    log = tmp_path / "alerts.jsonl"
    log.write_text("not json\n{}\n", encoding="utf-8")
    make_products(
        patch_scan["store"],
        standoff_m=None,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        out_dir=tmp_path / "p",
        alert_log=log,
        images=False,
    )
    data = json.loads((tmp_path / "p" / REPORT_JSON).read_text(encoding="utf-8"))
    assert data["alerts"]["problem"].startswith("alerts.jsonl: line 1 must be one alert event")


def test_remade_products_replace_the_old_ones(patch_scan: dict[str, Any], tmp_path: Path) -> None:
    """Making products twice into one folder replaces the vector zarr and leaves no
    temporary folder behind."""
    for standoff in (STANDOFF_M, None):
        make_products(
            patch_scan["store"],
            standoff_m=standoff,
            nv_theta_rad=THETA,
            nv_phi_rad=PHI,
            out_dir=tmp_path,
            images=False,
        )
    group = zarr.open_group(tmp_path / VECTOR_ZARR, mode="r")["forward"]
    assert "m_z_a" not in group  # the second run had no standoff
    assert sorted(p.name for p in tmp_path.iterdir()) == [REPORT_JSON, REPORT_MD, VECTOR_ZARR]


# -- partial scans, grids and inputs ------------------------------------------------------


def test_partial_scan_covers_only_its_committed_lines(tmp_path: Path) -> None:
    """A scan with lines 0-9 of 16 committed gives 10-row products and says so."""
    rng = np.random.default_rng(3)
    b = rng.normal(1e-3, 1e-5, (16, 12))
    store, _ = write_store(
        tmp_path, b, np.zeros(b.shape, np.uint8), scan_id="part", lines=range(10)
    )
    make_products(
        store,
        standoff_m=None,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        out_dir=tmp_path / "p",
        images=False,
    )
    data = json.loads((tmp_path / "p" / REPORT_JSON).read_text(encoding="utf-8"))
    trace = data["traces"]["forward"]
    assert (trace["lines_committed"], trace["line_range"]) == (10, [0, 9])
    group = zarr.open_group(tmp_path / "p" / VECTOR_ZARR, mode="r")["forward"]
    assert group["bz_t"].shape == (10, 12)


def _merged_scan(root: Path, scan_id: str = "low") -> tuple[Path, np.ndarray]:
    """A 12 x 10 scan whose left block of pixels is below resolution (MERGED, no B∥)."""
    rng = np.random.default_rng(8)
    status = np.zeros((12, 10), np.uint8)
    status[2:9, 1:4] = FitStatus.MERGED
    status[0, 9] = FitStatus.NO_RESONANCE
    b = np.where(status == FitStatus.OK, rng.normal(1e-3, 1e-5, status.shape), np.nan)
    store, _ = write_store(root, b, status, scan_id=scan_id)
    return store, status


def test_quicklook_shows_merged_pixels_below_resolution_not_as_failures(tmp_path: Path) -> None:
    """The field panel draws exactly the MERGED pixels in one neutral colour with a legend
    entry "below resolution (|B∥| < bound, …)" giving the median bound; the status legend
    names them below resolution; a scan without them gets no such entry."""
    from strayline.products._figures import (
        BELOW_RESOLUTION_LABEL,
        FigureHeading,
        quicklook_figure,
    )
    from strayline.products._read import read_snapshot

    store, status = _merged_scan(tmp_path)
    trace = read_snapshot(store).traces["forward"]
    heading = FigureHeading("low", None, None, None, T0)
    fig = quicklook_figure(trace, heading)
    field_ax, status_ax = fig.axes[0], fig.axes[3]
    assert BELOW_RESOLUTION_LABEL == "below resolution (|B∥| < bound)"
    labels = [t.get_text() for t in field_ax.get_legend().get_texts()]
    assert labels == ["below resolution (|B∥| < bound, median 150 µT)"]  # bounds of 1.5e-4 T
    overlay = field_ax.get_images()[-1].get_array()
    np.testing.assert_array_equal(~np.ma.getmaskarray(overlay), status == FitStatus.MERGED)
    status_labels = [t.get_text() for t in status_ax.get_legend().get_texts()]
    share = 100 * np.mean(status == FitStatus.MERGED)
    assert f"below resolution (merged dips) ({share:.1f} %)" in status_labels
    assert not any(label.startswith("merged") for label in status_labels)
    plain = dataclasses.replace(trace, maps={**trace.maps, "status": np.zeros_like(status)})
    assert quicklook_figure(plain, heading).axes[0].get_legend() is None


def test_report_lists_merged_pixels_with_their_bound_apart_from_failures(tmp_path: Path) -> None:
    """report.json gives the bound's distribution (T); report.md states the share below
    resolution with the level and median bound, and lists only real failures as not OK."""
    store, status = _merged_scan(tmp_path)
    make_products(
        store,
        standoff_m=None,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        out_dir=tmp_path / "p",
        images=False,
    )
    trace = json.loads((tmp_path / "p" / REPORT_JSON).read_text(encoding="utf-8"))
    bound = trace["traces"]["forward"]["field_nv_bound_t"]
    assert (bound["unit"], bound["count"]) == ("T", np.count_nonzero(status == FitStatus.MERGED))
    assert bound["median"] == pytest.approx(1.5e-4)
    md = (tmp_path / "p" / REPORT_MD).read_text(encoding="utf-8")
    assert (
        "- below resolution (merged dips) 17.5 %: |B∥| < bound (95 %, one-sided), "
        "median bound 150 µT" in md
    )
    assert "- not OK: no resonance 0.8 %\n" in md


# -- what the quick-look says: title, marks, scales, legend --------------------------------

NIGHT = "night-07"
NIGHT_PLANNED = 48
NIGHT_PIXELS = 64
NIGHT_LINES = [i for i in range(36) if i not in (10, 11)]  # lines 10 and 11 never came
DARK = range(20, 23)  # fluorescence lost on these lines


def _night_scan(root: Path) -> tuple[Path, np.ndarray, Path]:
    """A weak field (3.002 mT ± ~70 µT) scanned 36 of 48 lines with two lines missing, a
    dark band (lines 20–22, low counts), one one-resonance pixel, the thin-film profile;
    and an alert log with alerts at lines 12 (warning) and 21 (critical, every trace)."""
    rng = np.random.default_rng(11)
    b = 3.002e-3 + 0.05 * patch_field_t(NIGHT_PIXELS, 30e-9, 600e-9)[:NIGHT_PLANNED, :, 2]
    status = np.zeros(b.shape, np.uint8)
    status[30, 5] = FitStatus.ONE_RESONANCE
    with ScanStore.open(
        root,
        NIGHT,
        n_lines_planned=NIGHT_PLANNED,
        n_pixels=NIGHT_PIXELS,
        x_m=axis_m(NIGHT_PIXELS, 30e-9),
        config_json={"_profile": "thin-film"},
        config_digest="5eed",
        nv_axis_rad=(THETA, PHI),
        raw_spectra=False,
        compression_level=1,
        durable=False,
    ) as store:
        for i in NIGHT_LINES:
            row = status[i].copy()
            if i in DARK:
                row[:] = FitStatus.LOW_COUNTS
            line, fit, field = line_records(
                i,
                np.where(row == FitStatus.OK, b[i], np.nan),
                row,
                rng,
                scan_id=NIGHT,
                n_lines=NIGHT_PLANNED,
                x_m=axis_m(NIGHT_PIXELS, 30e-9),
                pitch_m=30e-9,
            )
            if i in DARK:
                fit = dataclasses.replace(fit, baseline=rng.normal(6.0, 1.0, NIGHT_PIXELS))
            store.write_line(line, fit, field)
            status[i] = row
    events = [
        dataclasses.replace(alert(NIGHT, "contrast_collapsed", "raised"), line_index=12),
        dataclasses.replace(
            alert(NIGHT, "fluorescence_lost", "raised", "critical"), line_index=21, direction=None
        ),
        dataclasses.replace(alert(NIGHT, "fluorescence_lost", "cleared"), line_index=24),
        dataclasses.replace(alert(NIGHT, "acquisition_stalled", "raised"), line_index=None),
        dataclasses.replace(alert("other", "resonance_jump", "raised"), line_index=30),
        dataclasses.replace(
            alert(NIGHT, "resonance_jump", "raised"), line_index=5, direction="backward"
        ),
    ]
    log = root / "alerts.jsonl"
    log.write_text("".join(e.to_json() + "\n" for e in events), encoding="utf-8")
    return root / f"{NIGHT}.zarr", status, log


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """The night scan, its products (report without images) and its quick-look figure."""
    from strayline.products._figures import FigureHeading, quicklook_figure
    from strayline.products._marks import alert_marks
    from strayline.products._read import read_snapshot

    root = tmp_path_factory.mktemp("night")
    store, status, log = _night_scan(root)
    out = root / "p"
    make_products(
        store,
        standoff_m=None,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        out_dir=out,
        alert_log=log,
        images=False,
    )
    snapshot = read_snapshot(store)
    heading = FigureHeading(NIGHT, snapshot.profile, snapshot.lines_planned, snapshot.started, T0)
    marks = alert_marks(read_alert_log_events(log), NIGHT)
    trace = snapshot.traces["forward"]
    return {
        "store": store,
        "status": status,
        "log": log,
        "trace": trace,
        "heading": heading,
        "figure": quicklook_figure(trace, heading, marks),
        "json": json.loads((out / REPORT_JSON).read_text(encoding="utf-8")),
        "md": (out / REPORT_MD).read_text(encoding="utf-8"),
    }


def read_alert_log_events(path: Path) -> list[AlertEvent]:
    """Every event of an alert log, through the package's reader."""
    from strayline.alerts import read_alert_log

    return read_alert_log(path)


def test_percent_text_never_rounds_a_share_to_nothing_or_everything() -> None:
    """A share above 0 reads "< 0.1 %" rather than "0.0 %", one short of all "> 99.9 %"
    rather than "100.0 %"; others have one decimal."""
    from strayline.products._report import percent_text

    assert percent_text(0.0) == "0.0 %"
    assert percent_text(1 / 4096) == "< 0.1 %"
    assert percent_text(0.0005) == "0.1 %"
    assert percent_text(0.898) == "89.8 %"
    assert percent_text(1 - 1 / 4096) == "> 99.9 %"
    assert percent_text(1.0) == "100.0 %"


def test_status_legend_agrees_with_the_report(night: dict[str, Any]) -> None:
    """The status legend gives each status's share of the committed pixels exactly as the
    report does (same fractions, same rounding): a single one-resonance pixel reads
    "< 0.1 %", not "0.0 %"; the two missing lines are counted as lines, not as a share."""
    from strayline.products._report import percent_text

    status_ax = night["figure"].axes[3]
    labels = [t.get_text() for t in status_ax.get_legend().get_texts()]
    fractions = night["json"]["traces"]["forward"]["fit_status_fractions"]
    committed = night["status"][NIGHT_LINES]
    assert fractions["one_resonance"] == pytest.approx(1 / committed.size)
    assert labels == [
        f"ok ({percent_text(fractions['ok'])})",
        f"low counts ({percent_text(fractions['low_counts'])})",
        "one resonance (< 0.1 %)",
        "not written (2 lines)",
    ]
    md = night["md"]
    assert f"fits OK {percent_text(fractions['ok'])}" in md
    assert f"low counts {percent_text(fractions['low_counts'])}, one resonance < 0.1 %" in md


def test_quicklook_title_names_scan_profile_lines_and_local_times(
    night: dict[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    """The title names the scan, trace, profile, lines done of those planned, and when the
    scan started and the picture was drawn in local time, ISO 8601 with the UTC offset."""
    import time as time_module

    monkeypatch.setenv("TZ", "LST-02")  # POSIX zone 2 h east of UTC, no zone database needed
    time_module.tzset()
    try:
        text = night["heading"].lines(night["trace"])
    finally:
        monkeypatch.undo()
        time_module.tzset()
    first, second = text.split("\n")
    assert first == (
        f"{NIGHT} — forward trace — profile thin-film — {len(NIGHT_LINES)} of "
        f"{NIGHT_PLANNED} lines × {NIGHT_PIXELS} pixels"
    )
    assert second.startswith("scan started 20")
    assert second.endswith(", drawn 2031-05-04T14:00:00+02:00")  # T0 is 12:00 UTC
    started = second.removeprefix("scan started ").split(",")[0]
    assert datetime.fromisoformat(started).utcoffset() == timedelta(hours=2)
    assert night["figure"].get_suptitle() == night["heading"].lines(night["trace"])
    live = dataclasses.replace(night["heading"], live=True, profile=None)
    assert "profile none (base config)" in live.lines(night["trace"])
    assert live.lines(night["trace"]).split("\n")[1].startswith("live picture — scan started")


def test_alert_lines_are_marked_at_every_map_edge(night: dict[str, Any]) -> None:
    """Each map carries a marker level with line 12 (warning colour) and line 21 (critical
    colour); a cleared event, an event without a line, another scan's and another trace's
    are not marked; the key below names the lines and rules."""
    trace = night["trace"]
    y_of = {int(i): trace.y_m[row] * 1e6 for row, i in enumerate(trace.line_index)}
    fig = night["figure"]
    for ax in fig.axes[:4]:
        marked = {
            line.get_markerfacecolor(): list(line.get_ydata())
            for line in ax.get_lines()
            if line.get_marker() == "<"
        }
        assert marked == {"#fb8c00": [y_of[12]], "#d50000": [y_of[21]]}
    [key] = fig.legends
    assert key.get_title().get_text() == (
        "◀ at a map's right edge: an alert raised at line 12, 21 "
        "(contrast_collapsed, fluorescence_lost)"
    )
    assert [t.get_text() for t in key.get_texts()] == ["warning", "critical"]


def test_weak_field_panel_shows_delta_b_and_says_so(night: dict[str, Any]) -> None:
    """The field panel of a weak field draws B − median on a scale symmetric about 0 µT,
    with the median named in the colour bar's label and the title."""
    ax = night["figure"].axes[0]
    trace = night["trace"]
    values = trace.maps["field_nv_t"]
    median = float(np.nanmedian(values))
    image = ax.get_images()[0]
    low, high = image.get_clim()
    assert low == pytest.approx(-high)
    assert 10 < high < 500  # µT: the pattern, not the 3 mT bias
    np.testing.assert_allclose(image.get_array().filled(np.nan), (values - median) * 1e6)
    # The median is named to a hundredth of the half-range: 3 decimals in mT here.
    reference = f"{median * 1e3:.3f} mT"
    assert 1.0 <= high / 100 < 10.0  # a step of 1–10 µT = 0.001–0.01 mT
    assert ax.child_axes[0].get_ylabel() == f"ΔB = B along NV − {reference} (µT)"
    assert ax.get_title() == f"B along NV: ΔB from the median {reference}"


def test_pl_panel_scale_comes_from_the_lines_with_fluorescence(night: dict[str, Any]) -> None:
    """The PL panel's scale starts near the lit lines' PL (about 200 kcounts/s), the dark
    band below it; the title counts the three dark lines, the colour bar shows an extension."""
    ax = night["figure"].axes[1]
    low, high = ax.get_images()[0].get_clim()
    assert 150 < low < high < 250
    assert ax.get_title().endswith("3 dark lines below it")
    assert ax.child_axes[0].get_ylabel() == "PL (kcounts/s)"


def test_scan_end_quicklook_gets_the_heading_and_the_logs_marks(
    night: dict[str, Any], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """make_products draws its quick-look with the store's profile, lines planned and start,
    its own time, and the marks of this scan's raised alerts from the alert log."""
    from strayline.products import _figures

    seen: list[tuple[Any, Any]] = []
    draw = _figures.quicklook_figure

    def spy(trace: Any, heading: Any, marks: Any = ()) -> Any:
        seen.append((heading, marks))
        return draw(trace, heading, marks)

    monkeypatch.setattr(_figures, "quicklook_figure", spy)
    made = datetime(2031, 5, 5, 3, 0, tzinfo=UTC)
    make_products(
        night["store"],
        standoff_m=None,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        out_dir=tmp_path,
        alert_log=night["log"],
        clock=lambda: made,
    )
    [(heading, marks)] = seen
    assert (heading.scan_id, heading.profile, heading.lines_planned) == (
        NIGHT,
        "thin-film",
        NIGHT_PLANNED,
    )
    assert (heading.drawn, heading.live) == (made, False)
    assert heading.started is not None
    assert [(m.line_index, m.direction, m.severity) for m in marks] == [
        (5, "backward", "warning"),
        (12, "forward", "warning"),
        (21, None, "critical"),
    ]
    assert (tmp_path / "quicklook_forward.png").is_file()


def test_vector_figure_says_when_no_standoff_is_configured(night: dict[str, Any]) -> None:
    """Without a standoff the vector figure's fourth panel says no stand-off is configured
    and how to give one, instead of standing empty; with one it draws m_z."""
    from strayline.products._figures import NO_STANDOFF_TEXT, vector_figure

    trace = night["trace"]
    without = reconstruct_vector(
        trace.maps["field_nv_t"],
        trace.valid,
        pixel_m=trace.pixel_m,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        standoff_m=None,
    )
    fig = vector_figure(trace, without, night["heading"], None)
    fourth = fig.axes[3]
    assert fourth.get_visible()
    assert not fourth.axison
    assert [t.get_text() for t in fourth.texts] == [NO_STANDOFF_TEXT]
    assert "no NV-sample stand-off is configured" in NO_STANDOFF_TEXT
    assert "products.standoff_nm" in NO_STANDOFF_TEXT
    with_standoff = dataclasses.replace(
        without, m_z_a=np.zeros_like(without.b_xyz_t[0]), k_cut_rad_per_m=1e7
    )
    fig = vector_figure(trace, with_standoff, night["heading"], 60e-9)
    assert fig.axes[3].get_images()
    assert fig.axes[3].get_title().startswith("Sheet moment m_z")


def test_products_of_a_store_written_before_the_bound_existed(tmp_path: Path) -> None:
    """A store without the field_nv_bound_t map (an older version's) still gives products:
    the bound reads as NaN, so the report has no bound distribution."""
    store, _ = _merged_scan(tmp_path)
    shutil.rmtree(store / "forward" / "field_nv_bound_t")
    shutil.rmtree(store / "backward" / "field_nv_bound_t")
    make_products(
        store,
        standoff_m=None,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        out_dir=tmp_path / "p",
    )
    trace = json.loads((tmp_path / "p" / REPORT_JSON).read_text(encoding="utf-8"))
    assert trace["traces"]["forward"]["field_nv_bound_t"] is None
    assert (tmp_path / "p" / "quicklook_forward.png").is_file()


def test_empty_store_gives_a_report_saying_so(tmp_path: Path) -> None:
    """A store without a committed line gives only the report, which says why."""
    with ScanStore.open(
        tmp_path,
        "empty",
        n_lines_planned=4,
        n_pixels=4,
        x_m=np.arange(4) * 1e-8,
        config_json={},
        config_digest="0",
    ):
        pass
    report = make_products(
        tmp_path / "empty.zarr",
        standoff_m=None,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        out_dir=tmp_path / "p",
    )
    assert report.directions == ()
    assert [f.kind for f in report.files] == ["report_json", "report_md"]
    assert skipped_reasons(report) == {"all maps": "no committed line in the store"}


def test_missing_store_and_bad_arguments_raise_named_errors(tmp_path: Path) -> None:
    """A folder that is not a store raises StoreError naming it; a bad standoff ValueError."""
    with pytest.raises(StoreError, match=r"nothing\.zarr: cannot open as a scan store"):
        make_products(
            tmp_path / "nothing.zarr",
            standoff_m=None,
            nv_theta_rad=THETA,
            nv_phi_rad=PHI,
            out_dir=tmp_path / "p",
        )
    with pytest.raises(
        ValueError, match=r"standoff_m must be finite and > 0 or None; found -5e-08"
    ):
        make_products(
            tmp_path / "nothing.zarr",
            standoff_m=-5e-8,
            nv_theta_rad=THETA,
            nv_phi_rad=PHI,
            out_dir=tmp_path / "p",
        )


def test_assemble_trace_orients_axes_and_masks_gaps() -> None:
    """Descending x and y are flipped to ascending, rows of uncommitted lines inside the
    range are NaN, and their positions follow the written lines' straight line."""
    n_lines, n_px = 6, 4
    x = np.array([3e-8, 2e-8, 1e-8, 0.0])
    y = np.array([np.nan, 5e-8, np.nan, 3e-8, 2e-8, np.nan])  # lines 1, 3, 4 written
    field = np.arange(n_lines * n_px, dtype=float).reshape(n_lines, n_px)
    trace = assemble_trace("forward", x, y, np.array([1, 3, 4]), {"field_nv_t": field})
    assert trace is not None
    np.testing.assert_allclose(trace.x_m, [0.0, 1e-8, 2e-8, 3e-8])
    np.testing.assert_allclose(trace.y_m, [2e-8, 3e-8, 4e-8, 5e-8])
    np.testing.assert_array_equal(trace.line_index, [4, 3, 2, 1])
    np.testing.assert_array_equal(trace.committed, [True, True, False, True])
    np.testing.assert_array_equal(trace.maps["field_nv_t"][0], field[4, ::-1])
    assert np.all(np.isnan(trace.maps["field_nv_t"][2]))
    assert trace.pixel_m == pytest.approx((1e-8, 1e-8))


def test_assemble_trace_refuses_a_non_monotonic_axis() -> None:
    """Fast-axis positions that go back and forth cannot form a grid: ValueError names them."""
    with pytest.raises(ValueError, match=r"forward/x must be finite and strictly monotonic"):
        assemble_trace(
            "forward",
            np.array([0.0, 2e-8, 1e-8]),
            np.zeros(2),
            np.array([0]),
            {"field_nv_t": np.zeros((2, 3))},
        )


@settings(max_examples=60, deadline=None)
@given(
    st.integers(min_value=1, max_value=7),
    st.integers(min_value=1, max_value=7),
    st.integers(min_value=0, max_value=2**32 - 1),
)
def test_fill_nearest_keeps_measured_and_copies_a_nearest_one(ny: int, nx: int, seed: int) -> None:
    """Measured pixels keep their value; each filled pixel takes the value of one of the
    measured pixels nearest to it (brute-force distances as the reference)."""
    rng = np.random.default_rng(seed)
    values = rng.normal(size=(ny, nx))
    valid = rng.random((ny, nx)) < 0.4
    valid.flat[rng.integers(ny * nx)] = True
    pitch = (2.0, 1.0)
    filled = fill_nearest(np.where(valid, values, np.nan), valid, pitch)
    np.testing.assert_array_equal(filled[valid], values[valid])
    vy, vx = np.nonzero(valid)
    for iy, ix in zip(*np.nonzero(~valid), strict=True):
        dist = np.hypot((vy - iy) * pitch[0], (vx - ix) * pitch[1])
        nearest = np.isclose(dist, dist.min())
        assert filled[iy, ix] in values[vy[nearest], vx[nearest]]


# -- config -------------------------------------------------------------------------------


def test_products_config_section_and_folder(tmp_path: Path) -> None:
    """The products section has documented defaults, converts nm to m, resolves its folder
    and refuses a non-positive standoff with a message naming the key."""
    base = {"paths": {"watch_root": "in", "output_root": "out"}}
    config = config_from_mapping(base, base_dir=tmp_path)
    assert (config.products.enabled, config.products.images) == (True, True)
    assert config.products.standoff_m is None
    assert products_dir(config.paths.output_root, None, "s1") == tmp_path / "out" / "s1.products"
    custom = config_from_mapping(
        base | {"products": {"standoff_nm": 65, "folder": "prod"}}, base_dir=tmp_path
    )
    assert custom.products.standoff_m == pytest.approx(65e-9)
    assert products_dir(custom.paths.output_root, custom.products.folder, "s1") == (
        tmp_path / "prod" / "s1.products"
    )
    with pytest.raises(
        ConfigError, match=r"products\.standoff_nm: expected a value above 0\.0; found the number 0"
    ):
        config_from_mapping(base | {"products": {"standoff_nm": 0}}, base_dir=tmp_path)


def test_a_profile_may_set_the_standoff_but_not_the_folder(tmp_path: Path) -> None:
    """A sample-type profile may set products.standoff_nm; products.folder is daemon-wide."""
    (tmp_path / "profiles").mkdir()
    (tmp_path / "profiles" / "thin.yaml").write_text(
        "products:\n  standoff_nm: 42.5\n", encoding="utf-8"
    )
    (tmp_path / "profiles" / "moved.yaml").write_text(
        "products:\n  folder: elsewhere\n", encoding="utf-8"
    )
    config = config_from_mapping(
        {"paths": {"watch_root": "in", "output_root": "out"}}, base_dir=tmp_path
    )
    assert config.with_profile("thin").products.standoff_m == pytest.approx(42.5e-9)
    with pytest.raises(
        ConfigError,
        match=r"products\.folder: a profile may set only calibration, enabled, images, "
        r"standoff_nm in products; this key is daemon-wide",
    ):
        config.with_profile("moved")


# -- pipeline hook ------------------------------------------------------------------------

DEMO_LINES = 5
DEMO_PIXELS = 12


@pytest.fixture(scope="module")
def demo_scans(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Two small demo scans (fixed seeds): forward only, and trace/retrace."""
    root = tmp_path_factory.mktemp("demo")
    for scan_id, retrace in (("hook-fwd", False), ("hook-tr", True)):
        scan = ds.DemoConfig(
            scene=ds.labyrinth(),
            n_lines=DEMO_LINES,
            n_pixels=DEMO_PIXELS,
            seed=4,
            scan_id=scan_id,
            trace_retrace=retrace,
        )
        ds.run_scan(scan, root / "incoming", root / "truth")
    return root / "incoming"


def _pipeline(tmp_path: Path, **products: Any) -> LinePipeline:
    data = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "logging": {"console": "off"},
        "alerts": {"console": False},
        "products": {"images": False, "standoff_nm": 60.0, **products},
    }
    return LinePipeline(config_from_mapping(data, base_dir=tmp_path))


def _run(pipeline: LinePipeline, files: list[Path]) -> list[tuple[str, list[dict[str, Any]]]]:
    """Process files one by one; per file, its name and the products log records it caused."""
    out = []
    for path in files:
        with capture_logs() as logs:
            pipeline.process(path)
        out.append((path.name, [e for e in logs if str(e["event"]).startswith("products")]))
    return out


def test_hook_makes_products_once_when_the_last_line_is_committed(
    demo_scans: Path, tmp_path: Path
) -> None:
    """Products appear exactly once, right after the last planned line, and a second pass
    over the same (duplicate) files does not make them again."""
    files = sorted((demo_scans / "hook-fwd").glob("line_*.h5"))
    pipeline = _pipeline(tmp_path)
    report = tmp_path / "output" / "hook-fwd.products" / REPORT_JSON
    try:
        seen = []
        for path in files:
            [(name, records)] = _run(pipeline, [path])
            seen.append((name, [r["event"] for r in records], report.exists()))
        again = _run(pipeline, files)
    finally:
        pipeline.close()
    assert [s[1] for s in seen] == [[]] * (DEMO_LINES - 1) + [["products_written"]]
    assert [s[2] for s in seen] == [False] * (DEMO_LINES - 1) + [True]
    assert all(records == [] for _, records in again)
    data = json.loads(report.read_text(encoding="utf-8"))
    assert data["standoff_m"] == pytest.approx(60e-9)
    assert data["traces"]["forward"]["lines_committed"] == DEMO_LINES


def test_hook_waits_for_the_retrace_of_the_last_line(demo_scans: Path, tmp_path: Path) -> None:
    """With a backward trace, products wait for the last line of both traces and cover both."""
    files = sorted(
        (demo_scans / "hook-tr").glob("line_*.h5"),
        key=lambda p: p.name[:10] + ("0" if p.name.endswith("_fwd.h5") else "1"),
    )  # instrument order: trace, then retrace
    pipeline = _pipeline(tmp_path)
    try:
        results = _run(pipeline, files)
    finally:
        pipeline.close()
    fired = [name for name, records in results if records]
    assert fired == [f"line_{DEMO_LINES - 1:05d}_bwd.h5"]
    record = results[-1][1][0]
    assert record["event"] == "products_written"
    assert record["products_s"] >= 0
    data = json.loads((tmp_path / "output" / "hook-tr.products" / REPORT_JSON).read_text("utf-8"))
    assert sorted(data["traces"]) == ["backward", "forward"]
    # Both traces see the same sample: their medians agree (positions taken per trace).
    fwd = data["traces"]["forward"]["field_nv_t"]["median"]
    bwd = data["traces"]["backward"]["field_nv_t"]["median"]
    assert bwd == pytest.approx(fwd, rel=0.05)


def test_backward_trace_lies_on_the_forward_trace(demo_scans: Path, tmp_path: Path) -> None:
    """The backward trace (written in decreasing x) is placed by its own positions, so its
    Bz map matches the forward one pixel for pixel (common practice: trace and retrace agree)."""
    files = sorted((demo_scans / "hook-tr").glob("line_*.h5"))
    pipeline = _pipeline(tmp_path)
    try:
        _run(pipeline, files)
    finally:
        pipeline.close()
    group = zarr.open_group(tmp_path / "output" / "hook-tr.products" / VECTOR_ZARR, mode="r")
    fwd = np.asarray(group["forward/bz_t"][:])
    bwd = np.asarray(group["backward/bz_t"][:])
    np.testing.assert_allclose(group["forward/x"][:], group["backward/x"][:])
    spread = float(np.ptp(fwd))
    assert np.abs(fwd - bwd).max() < 0.25 * spread  # noise only; mirrored would be ~spread
    assert np.corrcoef(fwd.ravel(), bwd.ravel())[0, 1] > 0.9


def test_hook_failure_is_logged_and_not_fatal(demo_scans: Path, tmp_path: Path) -> None:
    """If the products cannot be written the error is logged and the line still counts."""
    blocker = tmp_path / "blocked"
    blocker.write_text("a file where the products folder should go", encoding="utf-8")
    pipeline = _pipeline(tmp_path, folder=str(blocker))
    files = sorted((demo_scans / "hook-fwd").glob("line_*.h5"))
    try:
        for path in files[:-1]:
            pipeline.process(path)
        with capture_logs() as logs:
            outcome = pipeline.process(files[-1])
    finally:
        pipeline.close()
    assert outcome.kind == "written"
    failed = [e for e in logs if e["event"] == "products_failed"]
    assert len(failed) == 1
    assert failed[0]["log_level"] == "error"
    assert failed[0]["error"].startswith("StoreError: ")
    assert "writing the products failed" in failed[0]["error"]


# -- command line -------------------------------------------------------------------------


@pytest.fixture(scope="module")
def small_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A 12 x 12 patch scan with raw spectra (so the NV axis is recorded) and a standoff
    of 70 nm in its recorded config."""
    root = tmp_path_factory.mktemp("cli")
    b = patch_field_t(12, 40e-9, 200e-9) @ nv_axis(THETA, PHI)
    store, _ = write_store(
        root / "out",
        b,
        np.zeros(b.shape, np.uint8),
        scan_id="cli-scan",
        raw_spectra=True,
        config_json={"products": {"standoff_nm": 70.0, "images": False, "folder": None}},
    )
    return store


def test_cli_products_uses_the_store_records(
    small_store: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``strayline products STORE`` takes the NV axis from the raw spectra and the standoff
    from the recorded config, and writes beside the store."""
    assert main(["products", str(small_store)]) == 0
    out = capsys.readouterr().out
    folder = small_store.parent / "cli-scan.products"
    assert out.startswith(f"cli-scan: 3 products in {folder}")
    data = json.loads((folder / REPORT_JSON).read_text(encoding="utf-8"))
    assert data["standoff_m"] == pytest.approx(70e-9)
    assert data["nv_axis"]["theta_rad"] == pytest.approx(THETA)
    assert data["nv_axis"]["phi_rad"] == pytest.approx(PHI)


def test_cli_products_take_the_nv_axis_the_store_recorded(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A store opened with the scan's NV axis records it in its attributes, so
    ``strayline products`` finds it with neither raw spectra nor source line files."""
    b = patch_field_t(8, 40e-9, 200e-9) @ nv_axis(THETA, PHI)
    store, _ = write_store(
        tmp_path / "out", b, np.zeros(b.shape, np.uint8), scan_id="axis", nv_axis_rad=(THETA, PHI)
    )
    assert main(["products", str(store), "--no-images"]) == 0
    capsys.readouterr()
    data = json.loads((tmp_path / "out" / "axis.products" / REPORT_JSON).read_text("utf-8"))
    assert data["nv_axis"]["theta_rad"] == pytest.approx(THETA)
    assert data["nv_axis"]["phi_rad"] == pytest.approx(PHI)


def test_cli_products_options_override(
    small_store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--standoff-nm, --out and the NV angles override what the store records."""
    code = main(
        [
            "products",
            str(small_store),
            "--standoff-nm",
            "45",
            "--out",
            str(tmp_path / "o"),
            "--nv-theta-deg",
            "30",
            "--nv-phi-deg",
            "0",
            "--no-images",
        ]
    )
    assert code == 0
    data = json.loads((tmp_path / "o" / REPORT_JSON).read_text(encoding="utf-8"))
    assert data["standoff_m"] == pytest.approx(45e-9)
    assert data["nv_axis"]["theta_deg"] == pytest.approx(30.0)
    out = capsys.readouterr().out
    assert "skipped sheet moment" not in out
    assert "skipped images: turned off" in out


def test_cli_products_errors(
    small_store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A missing store exits 1 naming it; one angle without the other exits 2; a store with
    no record of the NV axis exits 1 asking for the angles."""
    assert main(["products", str(tmp_path / "absent.zarr")]) == 1
    assert "absent.zarr: cannot open as a scan store" in capsys.readouterr().err
    assert main(["products", str(small_store), "--nv-theta-deg", "30"]) == 2
    assert "give both --nv-theta-deg and --nv-phi-deg" in capsys.readouterr().err
    b = np.full((4, 4), 1e-3)
    bare, _ = write_store(tmp_path / "bare", b, np.zeros(b.shape, np.uint8), scan_id="bare")
    assert main(["products", str(bare)]) == 1
    assert (
        "bare.zarr: the NV axis is recorded neither in the store nor in a readable source "
        "line file; give it (--nv-theta-deg, --nv-phi-deg)"
    ) in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["products", str(small_store), "--standoff-nm", "-3"])


def test_disabled_hook_and_remake_from_source_files(tmp_path: Path, demo_scans: Path) -> None:
    """With products.enabled false a completed scan gets no products; remaking them later
    finds the NV axis in the committed lines' source files (no raw spectra stored)."""
    folder = tmp_path / "incoming" / "hook-fwd"
    shutil.copytree(demo_scans / "hook-fwd", folder)
    pipeline = _pipeline(tmp_path, enabled=False)
    try:
        results = _run(pipeline, sorted(folder.glob("line_*.h5")))
    finally:
        pipeline.close()
    assert all(records == [] for _, records in results)
    assert not (tmp_path / "output" / "hook-fwd.products").exists()
    report = remake_products(tmp_path / "output" / "hook-fwd.zarr")
    data = json.loads((report.out_dir / REPORT_JSON).read_text(encoding="utf-8"))
    tip = ds.DemoConfig().tip
    assert data["nv_axis"]["theta_rad"] == pytest.approx(tip.nv_theta_rad)
    assert report.out_dir == tmp_path / "output" / "hook-fwd.products"
