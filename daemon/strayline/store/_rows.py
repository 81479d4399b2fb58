"""Pure mapping from a line's records to the rows of the scan store's maps."""

from __future__ import annotations

import numpy as np

from strayline.field import LineField
from strayline.fit import LineFit, failed_fits
from strayline.lines import ScanLine
from strayline.store._layout import STATUS_FILL

__all__ = ["count_failures", "line_rows", "planned_y"]


def _pair_mean(values: np.ndarray) -> np.ndarray:
    """Row mean over the finite entries of an (n, 2) array; NaN where none is finite."""
    finite = np.isfinite(values)
    count = finite.sum(axis=1)
    total = np.where(finite, values, 0.0).sum(axis=1)
    out = np.full(values.shape[0], np.nan)
    np.divide(total, count, out=out, where=count > 0)
    return out


def line_rows(line: ScanLine, fit: LineFit, field: LineField) -> dict[str, np.ndarray]:
    """Map one line's records to the row each map receives.

    Parameters
    ----------
    line : ScanLine
        The line (only ``dwell_s`` and ``n_pixels`` are used).
    fit : LineFit
        Its fit; dip columns ordered by frequency (column 0 = lower resonance).
    field : LineField
        Its field.

    Returns
    -------
    dict of str to ndarray
        One entry per name in :data:`MAP_NAMES`, each shape (n_pixels,), float64 (``status``
        uint8). ``fwhm_hz`` is the mean of the two dips' FWHM, or the one fitted dip's FWHM
        when the other is NaN; ``pl_rate_cps`` is ``fit.baseline / line.dwell_s`` (counts
        per sample over seconds per sample); ``status`` is ``field.status`` (the field stage
        passes the fit's codes through).

    Raises
    ------
    ValueError
        If the records disagree on n_pixels or a status code equals the "not written" code.
    """
    n = line.n_pixels
    pairs = {"center_hz": fit.center_hz, "center_sigma_hz": fit.center_sigma_hz}
    pairs |= {"contrast": fit.contrast, "fwhm_hz": fit.fwhm_hz}
    for name, value in pairs.items():
        if np.shape(value) != (n, 2):
            raise ValueError(f"LineFit.{name} must have shape ({n}, 2); found {np.shape(value)}")
    singles = {
        "LineFit.baseline": fit.baseline,
        "LineFit.chi2_red": fit.chi2_red,
        "LineField.field_nv_t": field.field_nv_t,
        "LineField.field_nv_sigma_t": field.field_nv_sigma_t,
        "LineField.field_nv_bound_t": field.field_nv_bound_t,
        "LineField.field_abs_t": field.field_abs_t,
        "LineField.angle_rad": field.angle_rad,
        "LineField.center_mean_hz": field.center_mean_hz,
        "LineField.status": field.status,
    }
    for name, value in singles.items():
        if np.shape(value) != (n,):
            raise ValueError(f"{name} must have shape ({n},); found {np.shape(value)}")
    status = np.asarray(field.status)
    if np.any(status == STATUS_FILL):
        raise ValueError(f"LineField.status must not use {STATUS_FILL} (reserved: not written)")

    def f64(a: np.ndarray) -> np.ndarray:
        return np.asarray(a, dtype=np.float64).copy()

    center = np.asarray(fit.center_hz, dtype=np.float64)
    center_sigma = np.asarray(fit.center_sigma_hz, dtype=np.float64)
    contrast = np.asarray(fit.contrast, dtype=np.float64)
    return {
        "field_nv_t": f64(field.field_nv_t),
        "field_nv_sigma_t": f64(field.field_nv_sigma_t),
        "field_nv_bound_t": f64(field.field_nv_bound_t),
        "field_abs_t": f64(field.field_abs_t),
        "angle_rad": f64(field.angle_rad),
        "center_mean_hz": f64(field.center_mean_hz),
        "freq_lo_hz": center[:, 0].copy(),
        "freq_hi_hz": center[:, 1].copy(),
        "freq_lo_sigma_hz": center_sigma[:, 0].copy(),
        "freq_hi_sigma_hz": center_sigma[:, 1].copy(),
        "contrast_lo": contrast[:, 0].copy(),
        "contrast_hi": contrast[:, 1].copy(),
        "fwhm_hz": _pair_mean(np.asarray(fit.fwhm_hz, dtype=np.float64)),
        "pl_rate_cps": f64(fit.baseline) / float(line.dwell_s),
        "chi2_red": f64(fit.chi2_red),
        "status": status.astype(np.uint8),
    }


def count_failures(status_row: np.ndarray) -> int:
    """Pixels of a written row whose fit did not succeed."""
    written = status_row != STATUS_FILL
    return int(np.count_nonzero(written & failed_fits(status_row)))


def planned_y(y_m: np.ndarray, written: np.ndarray, pitch_m: float) -> np.ndarray:
    """The slow-axis coordinate of every planned line, m.

    Written lines keep their own ``y``; a line not yet written gets where the scan will
    put it: between written lines, interpolated; before the first and after the last, the
    written lines' mean step per line carried on (with one written line, or none, the
    fast-axis pitch ``pitch_m`` per line). So the coordinate of a scan that moves
    monotonically along its slow axis is monotonic while the scan runs, and a labelled
    reader (xarray) can index and plot a partial map; ``status`` = 255 marks those lines.

    Parameters
    ----------
    y_m : ndarray, shape (n_lines_planned,)
        Stored coordinate (only the written entries are read).
    written : ndarray of bool, shape (n_lines_planned,)
    pitch_m : float
        Step per line when fewer than two lines are written, m.
    """
    n = y_m.shape[0]
    index = np.arange(n, dtype=np.float64)
    done = np.flatnonzero(written)
    if done.size == 0:
        return index * pitch_m
    first, last = done[0], done[-1]
    y_first, y_last = float(y_m[first]), float(y_m[last])
    step = (y_last - y_first) / (last - first) if last > first else pitch_m
    out = np.interp(index, done.astype(np.float64), y_m[done].astype(np.float64))
    out[:first] = y_first + step * (index[:first] - first)
    out[last + 1 :] = y_last + step * (index[last + 1 :] - last)
    out[done] = y_m[done]
    return out
