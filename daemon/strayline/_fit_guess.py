"""Vectorised starting points for the batched ODMR fit.

All spectra of a line are handled at once with array operations (no Python loop over
spectra). Steps, in the scaled frequency ``x`` of :mod:`strayline._fit_kernel`:

1. smooth each spectrum lightly (5-point binomial kernel along the grid index); with a
   hyperfine pattern, correlate with the pattern's comb so the deepest point is the
   pattern's centre, not one of its components;
2. baseline from an upper percentile of the smoothed spectrum, noise from the mean
   absolute first difference of the raw counts (dips barely change it);
3. the deepest dip: depth, centre (midpoint of the half-depth crossings) and FWHM (distance
   between them); significant when deeper than ``guess_sigmas`` smoothed-noise units;
4. divide that dip's Lorentzian out of the raw counts, mask a FWHM around it and find the
   second dip with a box filter one FWHM wide (scanned over every grid point; significant
   when its output exceeds ``guess_sigmas`` of its own noise).

Only the ordering and rough size matter: the fit refines everything.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import correlate1d

__all__ = ["DipGuess", "guess_dips"]

_SMOOTH = np.array([1.0, 4.0, 6.0, 4.0, 1.0]) / 16.0
_SMOOTH_NOISE = float(np.sqrt(np.sum(_SMOOTH**2)))  # noise factor of the smoothed data
_BASELINE_PERCENTILE = 80.0


@dataclass(frozen=True, eq=False)
class DipGuess:
    """Starting values for n spectra (scaled units; all arrays shape (n,) unless noted).

    Attributes
    ----------
    center, contrast, fwhm : ndarray, shape (n, 2)
        Dip 0 is the deepest, dip 1 the second (NaN when not found).
    baseline : ndarray
        Off-resonance counts per sample.
    noise : ndarray
        Per-sample noise estimate of the raw counts.
    n_found : ndarray of int
        Number of significant dips found (0, 1 or 2).
    """

    center: np.ndarray
    contrast: np.ndarray
    fwhm: np.ndarray
    baseline: np.ndarray
    noise: np.ndarray
    n_found: np.ndarray


def _smooth(y: np.ndarray) -> np.ndarray:
    """5-point binomial smoothing along the grid index (mirrored ends)."""
    return correlate1d(y, _SMOOTH, axis=1, mode="mirror")


def _comb(x: np.ndarray, s: np.ndarray, hf_off: np.ndarray, hf_w: np.ndarray) -> np.ndarray:
    """Weighted mean of ``s`` sampled at x + o_m (linear interpolation, clamped edges)."""
    if hf_off.shape[0] == 1 and hf_off[0] == 0.0:
        return s
    out = np.zeros_like(s)
    n = x.shape[0]
    for om, wm in zip(hf_off, hf_w, strict=True):
        xs = np.clip(x + om, x[0], x[-1])
        j = np.clip(np.searchsorted(x, xs, side="right") - 1, 0, n - 2)
        t = (xs - x[j]) / (x[j + 1] - x[j])
        out += wm * ((1.0 - t) * s[:, j] + t * s[:, j + 1])
    return out / np.sum(hf_w)


def _dip(
    x: np.ndarray, s: np.ndarray, baseline: np.ndarray, at_minimum: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Depth, centre and FWHM of the deepest point of each row of ``s``.

    The centre is the midpoint of the half-depth crossings (robust for broad or merged
    dips), or the deepest point itself when ``at_minimum`` (a comb-correlated hyperfine
    pattern, whose side lobes make the crossings asymmetric).
    """
    n_spec, n = s.shape
    rows = np.arange(n_spec)
    imin = np.argmin(s, axis=1)
    depth = baseline - s[rows, imin]
    level = baseline - 0.5 * depth
    idx = np.arange(n)
    above = s > level[:, None]
    left = np.where(above & (idx <= imin[:, None]), idx, -1).max(axis=1)
    right = np.where(above & (idx >= imin[:, None]), idx, n).min(axis=1)
    lc = np.clip(left, 0, n - 2)
    rc = np.clip(right, 1, n - 1)
    sl0, sl1 = s[rows, lc], s[rows, lc + 1]
    sr0, sr1 = s[rows, rc - 1], s[rows, rc]
    with np.errstate(divide="ignore", invalid="ignore"):
        xl = x[lc] + (x[lc + 1] - x[lc]) * np.clip((sl0 - level) / (sl0 - sl1), 0.0, 1.0)
        xr = x[rc - 1] + (x[rc] - x[rc - 1]) * np.clip((level - sr0) / (sr1 - sr0), 0.0, 1.0)
    xm = x[imin]
    has_l = left >= 0
    has_r = right < n
    xl = np.where(has_l, xl, 2.0 * xm - xr)
    xr = np.where(has_r, xr, 2.0 * xm - xl)
    both_missing = ~has_l & ~has_r
    center = xm if at_minimum else np.where(has_l & has_r, 0.5 * (xl + xr), xm)
    fwhm = np.where(both_missing, x[-1] - x[0], xr - xl)
    return depth, center, fwhm


def _unit_depth(fwhm: np.ndarray, hf_off: np.ndarray, hf_w: np.ndarray) -> np.ndarray:
    """Depth of a unit-contrast dip at its centre, including its hyperfine components."""
    h = 0.5 * fwhm[:, None]
    return np.sum(hf_w * h**2 / (hf_off**2 + h**2), axis=1)


def _lorentz(
    x: np.ndarray, center: np.ndarray, fwhm: np.ndarray, hf_off: np.ndarray, hf_w: np.ndarray
) -> np.ndarray:
    h2 = (0.5 * fwhm)[:, None, None] ** 2
    d = x[None, :, None] - center[:, None, None] - hf_off[None, None, :]
    return np.sum(hf_w * h2 / (d * d + h2), axis=2)


def guess_dips(
    x: np.ndarray,
    y: np.ndarray,
    *,
    hf_off: np.ndarray,
    hf_w: np.ndarray,
    fwhm_bounds: tuple[float, float],
    contrast_max: float,
    guess_sigmas: float,
) -> DipGuess:
    """Find up to two dips per spectrum.

    Parameters
    ----------
    x : ndarray, shape (n_freq,)
        Scaled frequency grid, increasing.
    y : ndarray, shape (n_spec, n_freq)
        Counts, float64.
    hf_off, hf_w : ndarray, shape (n_hf,)
        Hyperfine component offsets (scaled) and weights.
    fwhm_bounds : (float, float)
        Allowed FWHM range (scaled).
    contrast_max : float
        Upper bound of the contrast.
    guess_sigmas : float
        A dip counts as found when deeper than this many noise units of the smoothed data.

    Returns
    -------
    DipGuess
    """
    n_spec = y.shape[0]
    s = _comb(x, _smooth(y), hf_off, hf_w)
    k_base = round(_BASELINE_PERCENTILE / 100.0 * (s.shape[1] - 1))
    baseline = np.partition(s, k_base, axis=1)[:, k_base]
    # mean |Δy| = 2σ/√π for independent Gaussian samples
    noise = np.mean(np.abs(np.diff(y, axis=1)), axis=1) * (np.sqrt(np.pi) / 2.0)
    # Poisson floor: the MAD of integer counts can be 0 at very low rates
    noise = np.maximum(noise, np.sqrt(np.maximum(baseline, 1.0)) * 0.5)
    noise_s = noise * _SMOOTH_NOISE
    span = x[-1] - x[0]
    lo_w, hi_w = fwhm_bounds
    safe_b = np.where(baseline > 0.0, baseline, 1.0)

    depth1, c1, w1 = _dip(x, s, baseline, at_minimum=hf_off.shape[0] > 1)
    w1 = np.clip(w1 - (hf_off.max() - hf_off.min()), lo_w, hi_w)
    k1 = np.clip(depth1 / safe_b / _unit_depth(w1, hf_off, hf_w), 1e-3, contrast_max)
    found1 = depth1 > guess_sigmas * noise_s

    # Second dip: divide the first out of the raw counts, blank a FWHM around it, and scan
    # a box filter one typical FWHM wide (a near-matched filter for a Lorentzian: the mean
    # of a unit dip over ±FWHM/2 is π/4) over every grid point, via cumulative sums.
    l1 = _lorentz(x, c1, w1, hf_off, hf_w)
    q = y / np.maximum(1.0 - k1[:, None] * l1, 0.05)
    near = np.abs(x[None, :] - c1[:, None]) < np.maximum(w1, 4.0 * span / x.shape[0])[:, None]
    resid = np.where(near, 0.0, baseline[:, None] - q)
    w_ref = float(np.median(w1[found1])) if np.any(found1) else float(np.median(w1))
    w_box = w_ref + (hf_off.max() - hf_off.min())
    lo = np.searchsorted(x, x - 0.5 * w_box, side="left")
    hi = np.searchsorted(x, x + 0.5 * w_box, side="right")
    count = hi - lo
    csum = np.concatenate([np.zeros((n_spec, 1)), np.cumsum(resid, axis=1)], axis=1)
    box = (csum[:, hi] - csum[:, lo]) / count
    score = box * np.sqrt(count) / noise[:, None]
    j2 = np.argmax(score, axis=1)
    rows = np.arange(n_spec)
    # refine: the deepest point of the (comb-correlated) smoothed data inside that box
    qs = s / np.maximum(1.0 - k1[:, None] * l1, 0.05)
    inside = np.abs(x[None, :] - x[j2][:, None]) <= 0.5 * w_box
    c2 = x[np.argmin(np.where(inside, qs, np.inf), axis=1)]
    w2 = np.full(n_spec, w_ref)
    depth2 = box[rows, j2] / (np.pi / 4.0)
    k2 = np.clip(depth2 / safe_b / _unit_depth(w2, hf_off, hf_w), 1e-3, contrast_max)
    found2 = found1 & (score[rows, j2] > guess_sigmas)

    center = np.stack([c1, np.where(found2, c2, np.nan)], axis=1)
    contrast = np.stack([k1, np.where(found2, k2, np.nan)], axis=1)
    fwhm = np.stack([w1, np.where(found2, w2, np.nan)], axis=1)
    n_found = np.where(found1, 1, 0) + np.where(found2, 1, 0)
    return DipGuess(center, contrast, fwhm, baseline, noise, n_found.astype(np.int64))
