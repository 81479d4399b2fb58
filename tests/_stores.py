"""Helper for tests that need a scan store holding a known field map (no spectra fitted)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

from strayline.field import LineField
from strayline.fit import FitStatus, LineFit
from strayline.lines import ScanLine
from strayline.store import ScanStore

T0 = datetime(2031, 5, 4, 12, 0, tzinfo=UTC)


def write_map_store(
    output_root: Path,
    scan_id: str,
    b_nv_t: np.ndarray,
    sigma_t: np.ndarray,
    *,
    x_m: np.ndarray,
    y_m: np.ndarray,
    nv_axis_rad: tuple[float, float],
    tip_id: str | None = None,
    config_json: dict[str, Any] | None = None,
) -> Path:
    """A store whose forward trace holds ``b_nv_t`` ± ``sigma_t`` (NaN: no resonance)."""
    n_lines, n_pixels = b_nv_t.shape
    with ScanStore.open(
        output_root,
        scan_id,
        n_lines_planned=n_lines,
        n_pixels=n_pixels,
        x_m=x_m,
        config_json=config_json or {"note": "synthetic"},
        config_digest="c0ffee",
        nv_axis_rad=nv_axis_rad,
        tip_id=tip_id,
        compression_level=1,
        chunk_lines=n_lines,  # one chunk per map: quick to read back
        durable=False,
    ) as store:
        for i in range(n_lines):
            row = b_nv_t[i]
            status = np.where(np.isfinite(row), FitStatus.OK, FitStatus.NO_RESONANCE).astype(
                np.uint8
            )
            line = ScanLine(
                source=Path(f"/nonexistent/{scan_id}/line_{i:05d}_fwd.h5"),
                scan_id=scan_id,
                line_index=i,
                n_lines_planned=n_lines,
                direction="forward",
                start_time=T0 + timedelta(seconds=i),
                end_time=T0 + timedelta(seconds=i + 1),
                dwell_s=1e-3,
                nv_theta_rad=nv_axis_rad[0],
                nv_phi_rad=nv_axis_rad[1],
                freq_hz=np.linspace(2.8e9, 2.94e9, 10),
                counts=np.full((n_pixels, 10), 200, dtype=np.int32),
                x_m=x_m,
                y_m=float(y_m[i]),
                sha256=f"{i:064x}",
                tip_id=tip_id,
            )
            pair = np.full((n_pixels, 2), 2.87e9)
            fit = LineFit(
                center_hz=pair,
                center_sigma_hz=np.full((n_pixels, 2), 3e4),
                contrast=np.full((n_pixels, 2), 0.15),
                contrast_sigma=np.full((n_pixels, 2), 0.005),
                fwhm_hz=np.full((n_pixels, 2), 9e6),
                fwhm_sigma_hz=np.full((n_pixels, 2), 2e5),
                baseline=np.full(n_pixels, 200.0),
                baseline_sigma=np.full(n_pixels, 1.0),
                slope=np.zeros(n_pixels),
                chi2_red=np.ones(n_pixels),
                status=status,
                n_iter=np.full(n_pixels, 6, dtype=np.int32),
            )
            field = LineField(
                field_nv_t=row.copy(),
                field_nv_sigma_t=np.where(np.isfinite(row), sigma_t[i], np.nan),
                field_nv_bound_t=np.full(n_pixels, np.nan),
                field_abs_t=np.abs(row),
                field_abs_sigma_t=sigma_t[i].copy(),
                angle_rad=np.zeros(n_pixels),
                angle_sigma_rad=np.zeros(n_pixels),
                center_mean_hz=np.full(n_pixels, 2.87e9),
                center_mean_sigma_hz=np.full(n_pixels, 2e4),
                status=status,
            )
            store.write_line(line, fit, field)
    return output_root / f"{scan_id}.zarr"
