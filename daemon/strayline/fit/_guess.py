"""Starting points for the batched ODMR fit, compiled (numba, one thread per spectrum).

Steps for each spectrum, in the scaled frequency ``x`` of :mod:`strayline.fit._kernel`:

1. smooth lightly (5-point binomial kernel along the grid index, mirrored ends); with a
   hyperfine pattern, correlate with the pattern's comb so that the deepest point is the
   pattern's centre, not one of its components;
2. baseline from the 80th percentile of the smoothed spectrum, noise from the mean
   absolute first difference of the raw counts (dips barely change it), floored at half
   the Poisson noise √b;
3. the deepest dip: depth, centre (midpoint of the half-depth crossings) and FWHM
   (distance between them); found when deeper than ``guess_sigmas`` smoothed-noise units;
4. divide that dip's Lorentzian out of the raw counts, blank a FWHM around it and scan a
   box filter one typical FWHM wide over every grid point (a near-matched filter for a
   Lorentzian: the mean of a unit dip over ±FWHM/2 is π/4). The second dip is the best
   box inside the *mirror window* (within ``mirror_tol`` of 2·pair_centre − c₁, where the
   partner of a Zeeman pair must lie) when its score reaches ``partner_sigmas``, else the
   best box anywhere when its score reaches ``guess_sigmas``; its centre is then refined
   to the deepest smoothed point inside the box.

The typical FWHM of step 4 is the median first-dip FWHM of the batch, the only quantity
shared between spectra; it is computed serially between two parallel passes, so the
result does not depend on the number of threads (bit-for-bit deterministic).

Only the ordering and rough size matter: the fit refines everything.
"""

# Compiled kernels take their arrays positionally (numba calls them so from prange bodies).
# ruff: noqa: PLR0917

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit, prange

__all__ = ["DipGuess", "guess_dips"]

_SMOOTH = np.array([1.0, 4.0, 6.0, 4.0, 1.0]) / 16.0
_SMOOTH_NOISE = float(np.sqrt(np.sum(_SMOOTH**2)))  # noise factor of the smoothed data
_BASELINE_PERCENTILE = 80.0
_FASTMATH = {"contract", "arcp", "reassoc", "nsz", "afn"}


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
    n_found : ndarray of int64
        Number of dips found (0, 1 or 2).
    """

    center: np.ndarray
    contrast: np.ndarray
    fwhm: np.ndarray
    baseline: np.ndarray
    noise: np.ndarray
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
def _unit_depth(fwhm, hf_off, hf_w):
    """Depth of a unit-contrast dip at its centre, including its hyperfine components."""
    h2 = 0.25 * fwhm * fwhm
    acc = 0.0
    for m in range(hf_off.shape[0]):
        acc += hf_w[m] * h2 / (hf_off[m] * hf_off[m] + h2)
    return acc


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH, parallel=True)
def _first_dip(
    x, y, comb_j, comb_t, hf_off, hf_w, use_comb, k_base, lo_w, hi_w, contrast_max, guess_sigmas
):
    """Steps 1-3 for every row of ``y``; returns smoothed rows and the first dip."""
    n_spec, n = y.shape
    s_all = np.empty((n_spec, n))
    base = np.empty(n_spec)
    noise = np.empty(n_spec)
    c1 = np.empty(n_spec)
    w1 = np.empty(n_spec)
    k1 = np.empty(n_spec)
    found = np.empty(n_spec, dtype=np.int64)
    span = x[n - 1] - x[0]
    hf_spread = np.max(hf_off) - np.min(hf_off)
    for r in prange(n_spec):
        yr = y[r]
        s = s_all[r]
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
        # a comb-correlated pattern has side lobes that make the crossings asymmetric
        cen = xm if use_comb or not (has_l and has_r) else 0.5 * (xl + xr)
        width = span if not (has_l or has_r) else xr - xl
        width = min(max(width - hf_spread, lo_w), hi_w)
        safe_b = b if b > 0.0 else 1.0
        con = depth / safe_b / _unit_depth(width, hf_off, hf_w)
        base[r] = b
        noise[r] = nz
        c1[r] = cen
        w1[r] = width
        k1[r] = min(max(con, 1e-3), contrast_max)
        found[r] = 1 if depth > guess_sigmas * nz * _SMOOTH_NOISE else 0
    return s_all, base, noise, c1, w1, k1, found


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH, parallel=True)
def _second_dip(
    x,
    y,
    s_all,
    base,
    noise,
    c1,
    w1,
    k1,
    found1,
    hf_off,
    hf_w,
    box_lo,
    box_hi,
    w_box,
    w_ref,
    contrast_max,
    guess_sigmas,
    pair_x,
    mirror_tol,
    partner_sigmas,
):
    """Step 4 for every row; returns the second dip's centre and contrast and found flags."""
    n_spec, n = y.shape
    c2 = np.empty(n_spec)
    k2 = np.empty(n_spec)
    found2 = np.empty(n_spec, dtype=np.int64)
    span = x[n - 1] - x[0]
    unit2 = _unit_depth(w_ref, hf_off, hf_w)
    for r in prange(n_spec):
        yr = y[r]
        s = s_all[r]
        div = np.empty(n)
        csum = np.empty(n + 1)
        h2 = 0.25 * w1[r] * w1[r]
        blank = max(w1[r], 4.0 * span / n)
        csum[0] = 0.0
        for k in range(n):
            lor = 0.0
            for m in range(hf_off.shape[0]):
                d = x[k] - c1[r] - hf_off[m]
                lor += hf_w[m] * h2 / (d * d + h2)
            div[k] = max(1.0 - k1[r] * lor, 0.05)
            resid = 0.0 if abs(x[k] - c1[r]) < blank else base[r] - yr[k] / div[k]
            csum[k + 1] = csum[k] + resid
        # best box anywhere, and best box in the mirror window of the first dip
        mirror = 2.0 * pair_x - c1[r]
        j_any = 0
        best_any = -np.inf
        j_mir = -1
        best_mir = -np.inf
        for k in range(n):
            cnt = box_hi[k] - box_lo[k]
            score = (csum[box_hi[k]] - csum[box_lo[k]]) / math.sqrt(cnt) / noise[r]
            if score > best_any:
                best_any = score
                j_any = k
            if abs(x[k] - mirror) <= mirror_tol and score > best_mir:
                best_mir = score
                j_mir = k
        if j_mir >= 0 and best_mir > partner_sigmas:
            j2 = j_mir
            ok = True
        else:
            j2 = j_any
            ok = best_any > guess_sigmas
        cnt = box_hi[j2] - box_lo[j2]
        box = (csum[box_hi[j2]] - csum[box_lo[j2]]) / cnt
        # refine: the deepest point of the (comb-correlated) smoothed data inside that box
        i_best = -1
        q_best = np.inf
        for k in range(n):
            if abs(x[k] - x[j2]) <= 0.5 * w_box:
                q = s[k] / div[k]
                if q < q_best:
                    q_best = q
                    i_best = k
        safe_b = base[r] if base[r] > 0.0 else 1.0
        con = box / (math.pi / 4.0) / safe_b / unit2
        c2[r] = x[i_best] if i_best >= 0 else x[j2]
        k2[r] = min(max(con, 1e-3), contrast_max)
        found2[r] = 1 if (found1[r] == 1 and ok) else 0
    return c2, k2, found2


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


def guess_dips(
    x: np.ndarray,
    y: np.ndarray,
    *,
    hf_off: np.ndarray,
    hf_w: np.ndarray,
    fwhm_bounds: tuple[float, float],
    contrast_max: float,
    guess_sigmas: float,
    pair_center: float = np.nan,
    mirror_tol: float = 0.0,
    partner_sigmas: float = np.inf,
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
        A dip counts as found when deeper than this many noise units (of the smoothed data
        for the first dip, of the box filter for a second dip anywhere).
    pair_center : float
        Expected midpoint of the two resonances (scaled); NaN disables the mirror window.
    mirror_tol : float
        Half-width of the mirror window (scaled).
    partner_sigmas : float
        Box-filter score that a second dip inside the mirror window needs.

    Returns
    -------
    DipGuess
    """
    yc = np.ascontiguousarray(y, dtype=np.float64)
    xc = np.ascontiguousarray(x, dtype=np.float64)
    off = np.ascontiguousarray(hf_off, dtype=np.float64)
    wts = np.ascontiguousarray(hf_w, dtype=np.float64)
    n = yc.shape[1]
    comb_j, comb_t = _comb_tables(xc, off)
    use_comb = not (off.shape[0] == 1 and off[0] == 0.0)
    k_base = round(_BASELINE_PERCENTILE / 100.0 * (n - 1))
    lo_w, hi_w = float(fwhm_bounds[0]), float(fwhm_bounds[1])
    s_all, base, noise, c1, w1, k1, found1 = _first_dip(
        xc,
        yc,
        comb_j,
        comb_t,
        off,
        wts,
        use_comb,
        k_base,
        lo_w,
        hi_w,
        float(contrast_max),
        float(guess_sigmas),
    )
    # The one quantity shared between spectra, computed serially: the box width.
    w_ref = float(np.median(w1[found1 == 1])) if np.any(found1 == 1) else float(np.median(w1))
    w_box = w_ref + float(off.max() - off.min())
    box_lo = np.searchsorted(xc, xc - 0.5 * w_box, side="left").astype(np.int64)
    box_hi = np.searchsorted(xc, xc + 0.5 * w_box, side="right").astype(np.int64)
    pair_x = float(pair_center) if np.isfinite(pair_center) else 0.0
    tol = float(mirror_tol) if np.isfinite(pair_center) else -1.0
    c2, k2, found2 = _second_dip(
        xc,
        yc,
        s_all,
        base,
        noise,
        c1,
        w1,
        k1,
        found1,
        off,
        wts,
        box_lo,
        box_hi,
        w_box,
        w_ref,
        float(contrast_max),
        float(guess_sigmas),
        pair_x,
        tol,
        float(partner_sigmas),
    )
    two = found2 == 1
    center = np.stack([c1, np.where(two, c2, np.nan)], axis=1)
    contrast = np.stack([k1, np.where(two, k2, np.nan)], axis=1)
    fwhm = np.stack([w1, np.where(two, w_ref, np.nan)], axis=1)
    return DipGuess(center, contrast, fwhm, base, noise, found1 + found2)
