"""Starting points for the batched ODMR fit: the line's width, then matched-filter dips.

1. *The line's width.* Each spectrum is smoothed lightly (5-point binomial kernel along
   the grid index, mirrored ends; with a hyperfine pattern, correlated with the pattern's
   comb so that the deepest point is the pattern's centre), its baseline taken as the
   80th percentile and its noise from the mean absolute first difference of the raw
   counts (floored at half the Poisson noise √b); the deepest point's half-depth
   crossings give a rough FWHM (corrected for the smoothing). The median rough FWHM of
   the clearly dipped spectra (deeper than ``_CONFIDENT`` noise units) places a matched
   filter, and the line's width is the template width that best matches the clearest
   dips. All this on a subsample of the line.
2. *Dips.* :mod:`strayline.fit._detect` scans a matched filter of that width over the
   sweep, with detection thresholds set by the look-elsewhere effect for the stated
   false-dip rates.

The line's width is the only quantity shared between spectra; it is computed serially
between two parallel passes, so the result does not depend on the number of threads
(bit-for-bit deterministic).
"""

# Compiled kernels take their arrays positionally (numba calls them so from prange bodies).
# ruff: noqa: PLR0917

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit, prange

from strayline._numbers import median
from strayline.fit._detect import (
    detect_dips,
    dip_templates,
    ladder_width,
    matched_width,
    rice_threshold,
)

__all__ = ["DipGuess", "guess_dips"]

_SMOOTH = np.array([1.0, 4.0, 6.0, 4.0, 1.0]) / 16.0
_SMOOTH_NOISE = float(np.sqrt(np.sum(_SMOOTH**2)))  # noise factor of the smoothed data
_BASELINE_PERCENTILE = 80.0
_CONFIDENT = 6.0  # depth, in smoothed-noise units, of a spectrum that shows the line's width
_WIDTH_SAMPLE = 128  # spectra of a line looked at for its width
_FASTMATH = {"contract", "arcp", "reassoc", "nsz", "afn"}


@dataclass(frozen=True, eq=False)
class DipGuess:
    """Starting values for n spectra (scaled units; all arrays shape (n,) unless noted).

    Attributes
    ----------
    center, contrast : ndarray, shape (n, 2)
        Dip 0 is the first (largest) dip, dip 1 its partner (NaN when not found).
    fwhm : float
        The line's width, the same for every dip.
    fwhm_trusted : bool
        The width was measured on separate pairs (else it may be merged pairs').
    baseline : ndarray
        Off-resonance counts per sample.
    n_found : ndarray of int64
        Number of dips found (0, 1 or 2).
    """

    center: np.ndarray
    contrast: np.ndarray
    fwhm: float
    fwhm_trusted: bool
    baseline: np.ndarray
    n_found: np.ndarray


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _smooth_row(y, comb_j, comb_t, hf_w, use_comb, s, tmp):
    """Binomial smoothing (mirrored ends), then the hyperfine comb if ``use_comb``."""
    n = y.shape[0]
    w0, w1, w2 = _SMOOTH[0], _SMOOTH[1], _SMOOTH[2]
    for k in range(2, n - 2):
        s[k] = w0 * (y[k - 2] + y[k + 2]) + w1 * (y[k - 1] + y[k + 1]) + w2 * y[k]
    # mirrored ends: y[-1] = y[1], y[-2] = y[2], y[n] = y[n-2], y[n+1] = y[n-3]
    s[0] = w0 * (y[2] + y[2]) + w1 * (y[1] + y[1]) + w2 * y[0]
    s[1] = w0 * (y[1] + y[3]) + w1 * (y[0] + y[2]) + w2 * y[1]
    s[n - 2] = w0 * (y[n - 4] + y[n - 2]) + w1 * (y[n - 3] + y[n - 1]) + w2 * y[n - 2]
    s[n - 1] = w0 * (y[n - 3] + y[n - 3]) + w1 * (y[n - 2] + y[n - 2]) + w2 * y[n - 1]
    if use_comb:
        wsum = 0.0
        for m in range(hf_w.shape[0]):
            wsum += hf_w[m]
        for k in range(n):
            acc = 0.0
            for m in range(hf_w.shape[0]):
                j = comb_j[m, k]
                t = comb_t[m, k]
                acc += hf_w[m] * ((1.0 - t) * s[j] + t * s[j + 1])
            tmp[k] = acc / wsum
        for k in range(n):
            s[k] = tmp[k]


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _kth_smallest(a, k):
    """The k-th smallest value of ``a`` (0-based), by quickselect; reorders ``a`` in place."""
    lo = 0
    hi = a.shape[0] - 1
    while lo < hi:
        pivot = a[(lo + hi) // 2]
        i = lo
        j = hi
        while i <= j:
            while a[i] < pivot:
                i += 1
            while a[j] > pivot:
                j -= 1
            if i <= j:
                a[i], a[j] = a[j], a[i]
                i += 1
                j -= 1
        if k <= j:
            hi = j
        elif k >= i:
            lo = i
        else:
            break
    return a[k]


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _unsmoothed(fwhm_v, step):
    """Lorentzian FWHM whose convolution with the smoothing kernel has FWHM ``fwhm_v``.

    The binomial kernel is close to a Gaussian of σ = 1 sample (FWHM 2.355 ``step``); the
    Voigt FWHM f_V ≈ 0.5346 f_L + √(0.2166 f_L² + f_G²) (J. J. Olivero and R. L.
    Longbothum, J. Quant. Spectrosc. Radiat. Transfer 17, 233 (1977); from memory) is
    solved for the Lorentzian f_L.
    """
    f_g = 2.3548 * step
    if fwhm_v <= f_g:
        return 0.0
    disc = 1.0692 * 1.0692 * fwhm_v * fwhm_v - 4.0 * 0.0692 * (fwhm_v * fwhm_v - f_g * f_g)
    return (1.0692 * fwhm_v - math.sqrt(max(disc, 0.0))) / (2.0 * 0.0692)


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH, parallel=True)
def _rough_widths(x, y, comb_j, comb_t, hf_off, hf_w, use_comb, k_base, lo_w, hi_w):
    """The deepest dip's FWHM and depth (in noise units of the smoothed data) per row."""
    n_spec, n = y.shape
    w1 = np.empty(n_spec)
    z1 = np.empty(n_spec)
    span = x[n - 1] - x[0]
    hf_spread = np.max(hf_off) - np.min(hf_off)
    for r in prange(n_spec):
        yr = y[r]
        s = np.empty(n)
        tmp = np.empty(n)
        _smooth_row(yr, comb_j, comb_t, hf_w, use_comb, s, tmp)
        for k in range(n):
            tmp[k] = s[k]
        b = _kth_smallest(tmp, k_base)
        acc = 0.0
        for k in range(n - 1):
            acc += abs(yr[k + 1] - yr[k])
        # mean |Δy| = 2σ/√π for independent Gaussian samples; Poisson floor √b / 2
        nz = max(acc / (n - 1) * (math.sqrt(math.pi) / 2.0), math.sqrt(max(b, 1.0)) * 0.5)
        imin = 0
        for k in range(1, n):
            if s[k] < s[imin]:
                imin = k
        depth = b - s[imin]
        level = b - 0.5 * depth
        left = -1
        for k in range(imin, -1, -1):
            if s[k] > level:
                left = k
                break
        right = n
        for k in range(imin, n):
            if s[k] > level:
                right = k
                break
        xm = x[imin]
        has_l = left >= 0
        has_r = right < n
        xl = 0.0
        xr = 0.0
        if has_l:
            t = min(max((s[left] - level) / (s[left] - s[left + 1]), 0.0), 1.0)
            xl = x[left] + (x[left + 1] - x[left]) * t
        if has_r:
            t = min(max((level - s[right - 1]) / (s[right] - s[right - 1]), 0.0), 1.0)
            xr = x[right - 1] + (x[right] - x[right - 1]) * t
        if has_l and not has_r:
            xr = 2.0 * xm - xl
        elif has_r and not has_l:
            xl = 2.0 * xm - xr
        width = span if not (has_l or has_r) else xr - xl
        k_hi = min(imin + 1, n - 1)
        k_lo = max(imin - 1, 0)
        step = (x[k_hi] - x[k_lo]) / (k_hi - k_lo)
        w1[r] = min(max(_unsmoothed(width - hf_spread, step), lo_w), hi_w)
        z1[r] = depth / (nz * _SMOOTH_NOISE)
    return w1, z1


def _comb_tables(x: np.ndarray, hf_off: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Interpolation indices and weights of the hyperfine comb, shape (n_hf, n_freq) each.

    Sample m of grid point k is ``(1 - t) s[j] + t s[j + 1]`` at x + o_m (clamped to the
    window), with ``j = comb_j[m, k]`` and ``t = comb_t[m, k]``.
    """
    n = x.shape[0]
    xs = np.clip(x[None, :] + hf_off[:, None], x[0], x[-1])
    j = np.clip(np.searchsorted(x, xs, side="right") - 1, 0, n - 2)
    t = (xs - x[j]) / (x[j + 1] - x[j])
    return np.ascontiguousarray(j, dtype=np.int64), np.ascontiguousarray(t, dtype=np.float64)


def line_width(
    x: np.ndarray,
    y: np.ndarray,
    hf_off: np.ndarray,
    hf_w: np.ndarray,
    fwhm_bounds: tuple[float, float],
    center_range: tuple[float, float],
    *,
    pair_center: float = np.nan,
    mirror_tol: float = -1.0,
) -> tuple[float, bool]:
    """The line's FWHM (scaled), from a subsample of its spectra, and whether it was
    measured on separate pairs (:func:`strayline.fit._detect.matched_width`).

    The median half-depth width of the clearly dipped spectra of the subsample
    (:func:`_rough_widths`) places the matched filter; the width is then the one that
    best explains the clearest dips (:func:`strayline.fit._detect.matched_width`).
    """
    sub = y[:: max(1, y.shape[0] // _WIDTH_SAMPLE)]
    n = sub.shape[1]
    comb_j, comb_t = _comb_tables(x, hf_off)
    use_comb = not (hf_off.shape[0] == 1 and hf_off[0] == 0.0)
    k_base = round(_BASELINE_PERCENTILE / 100.0 * (n - 1))
    w1, z1 = _rough_widths(
        x, sub, comb_j, comb_t, hf_off, hf_w, use_comb, k_base, fwhm_bounds[0], fwhm_bounds[1]
    )
    rough = median(w1)
    for floor in (_CONFIDENT, 0.5 * _CONFIDENT):
        if np.count_nonzero(z1 > floor) >= 3:
            rough = median(w1[z1 > floor])
            break
    return matched_width(
        x, sub, rough, hf_off, hf_w, fwhm_bounds, center_range, pair_center, mirror_tol
    )


def guess_dips(
    x: np.ndarray,
    y: np.ndarray,
    *,
    hf_off: np.ndarray,
    hf_w: np.ndarray,
    fwhm_bounds: tuple[float, float],
    contrast_max: float,
    poisson: bool,
    false_dip_rate: float,
    false_partner_rate: float,
    center_range: tuple[float, float] = (-np.inf, np.inf),
    pair_center: float = np.nan,
    mirror_tol: float = -1.0,
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
    poisson : bool
        Noise of Poisson counts (σ² = mean) or estimated from the data.
    false_dip_rate : float
        Chance that a spectrum of pure noise shows a dip anywhere in the sweep.
    false_partner_rate : float
        Chance that noise fakes a partner inside the mirror window of a real dip.
    center_range : (float, float)
        Where dip centres may lie (scaled).
    pair_center : float
        Expected midpoint of the two resonances (scaled); NaN disables the mirror window.
    mirror_tol : float
        Half-width of the mirror window (scaled); negative disables it.
    """
    yc = np.ascontiguousarray(y, dtype=np.float64)
    xc = np.ascontiguousarray(x, dtype=np.float64)
    off = np.ascontiguousarray(hf_off, dtype=np.float64)
    wts = np.ascontiguousarray(hf_w, dtype=np.float64)
    lo_w, hi_w = float(fwhm_bounds[0]), float(fwhm_bounds[1])
    width, trusted = line_width(
        xc,
        yc,
        off,
        wts,
        (lo_w, hi_w),
        center_range,
        pair_center=pair_center,
        mirror_tol=mirror_tol,
    )
    templates = dip_templates(xc, ladder_width(width), off, wts, *center_range)
    u_single = rice_threshold(templates.arc, false_dip_rate)
    window_arc = min(templates.arc, templates.arc_per_x * 2.0 * max(mirror_tol, 0.0))
    u_partner = rice_threshold(window_arc, false_partner_rate)
    found = detect_dips(
        xc,
        yc,
        templates,
        poisson=poisson,
        u_single=u_single,
        u_partner=u_partner,
        pair_center=pair_center,
        mirror_tol=mirror_tol,
    )
    contrast = np.clip(found.depth, 1e-3, contrast_max)
    return DipGuess(
        center=found.center,
        contrast=contrast,
        fwhm=width,
        fwhm_trusted=trusted,
        baseline=found.baseline,
        n_found=found.n_found,
    )
