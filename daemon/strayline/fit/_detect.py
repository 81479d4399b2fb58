"""Dip detection by a matched filter at the line's width, with a look-elsewhere threshold.

For a dip shape ``t_j`` (a Lorentzian of the line's FWHM, with the hyperfine pattern,
centred on candidate ``j``) the statistic

    T_j = Σ_k (ȳ − y_k) t_jk / (σ ‖t̃_j‖),    t̃_j = t_j − mean(t_j),

is the significance of the best-fitting dip at ``j`` with the baseline fitted alongside
(the projection of the data on the zero-mean template; σ² = ȳ for Poisson counts): on
pure noise every ``T_j`` is a standard normal, and a dip of depth ``k`` on a baseline of
``b`` counts per sample gives ``T ≈ k √b ‖t‖`` (the matched-filter significance of a
known shape, common practice).

Its largest value over the sweep is what pure noise would have to beat to fake a dip, so
the detection threshold ``u`` carries the look-elsewhere effect. For a unit-variance
Gaussian process ``⟨z, t̂(c)⟩`` (``t̂`` the unit-norm template) the expected number of
up-crossings of ``u`` is ``(ℓ / 2π) e^{−u²/2}`` with ``ℓ`` the arc length of the curve
``t̂(c)`` on the unit sphere (Rice's formula: S. O. Rice, Bell Syst. Tech. J. 23, 282
(1944)), which gives the bound

    P(max_c T(c) > u) ≤ Φc(u) + (ℓ / 2π) e^{−u²/2}

used for tests with a nuisance parameter present only under the alternative by R. B.
Davies, Biometrika 74, 33–43 (1987) (both references from memory). ``ℓ`` is measured on
the actual templates and grid, so gaps in the sweep, hyperfine combs and non-uniform
steps are counted as they are; the threshold is the ``u`` at which the bound equals the
stated false-dip rate.

Steps per spectrum (one compiled pass per batch, a thread per spectrum):

1. scan ``T`` over every candidate; the first dip is the largest;
2. with the first dip's least-squares fit removed, score the candidates of the mirror
   window ``2·pair_centre − c₁ ± tol`` (where a Zeeman partner must lie; the whole
   sweep without a pair centre): the partner is the best one that passes the partner
   threshold, or the sweep threshold where it lies within one FWHM of the first dip
   (where a merged pair could find a partner in its own broadening);
3. fit both depths jointly and score the first dip again (a second dip in a short sweep
   lowers the first one's apparent baseline).
"""

# Compiled kernels take their arrays positionally (numba calls them so from prange bodies).
# ruff: noqa: PLR0917

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numba import njit, prange
from scipy.optimize import brentq
from scipy.special import ndtr

__all__ = [
    "Detection",
    "DipTemplates",
    "detect_dips",
    "dip_templates",
    "ladder_width",
    "matched_width",
    "rice_threshold",
]

_FASTMATH = {"contract", "arcp", "reassoc", "nsz", "afn"}
# A template is cut at 4 half-widths, where the Lorentzian is down to 6 %: it keeps
# 99.4 % of the squared norm of the full shape (∫ (1 + u²)⁻² over |u| < 4 against π/2),
# so the filter loses 0.3 % of significance, and scans in half the time of a cut at 10.
_REACH_HALF_WIDTHS = 4.0
# Candidate centres are taken every k-th grid point, k the largest with k steps within a
# quarter of the FWHM (the peak is refined by a parabola through three candidates).
_CANDIDATES_PER_FWHM = 8.0
_WIDTH_STEPS_PER_OCTAVE = 8  # templates are built for widths on this geometric ladder


@dataclass(frozen=True, eq=False)
class DipTemplates:
    """Dip templates of one width on one grid (scaled units).

    Attributes
    ----------
    cand : ndarray of int64, shape (n_cand,)
        Grid index of each candidate centre.
    k0 : ndarray of int64, shape (n_cand,)
        First grid index a candidate's template touches.
    values : ndarray, shape (n_cand, n_taps)
        Template values from ``k0`` on (zero past the template's end).
    n_taps : ndarray of int64, shape (n_cand,)
        Used taps of each row.
    mean : ndarray, shape (n_cand,)
        Template mean over the whole grid.
    inv_norm : ndarray, shape (n_cand,)
        1 / ‖t̃‖ of the zero-mean template.
    arc_per_x : float
        Arc length of the unit templates per unit of scaled frequency, averaged over the
        candidates' span.
    arc : float
        Arc length of the unit templates over all candidates.
    fwhm : float
        The width the templates were built for (scaled).
    """

    cand: np.ndarray
    k0: np.ndarray
    values: np.ndarray
    n_taps: np.ndarray
    mean: np.ndarray
    inv_norm: np.ndarray
    arc_per_x: float
    arc: float
    fwhm: float


def ladder_width(fwhm: float) -> float:
    """``fwhm`` rounded to the geometric ladder the templates are built on (9 % steps)."""
    step = math.log(2.0) / _WIDTH_STEPS_PER_OCTAVE
    return math.exp(round(math.log(fwhm) / step) * step)


def dip_templates(
    x: np.ndarray,
    fwhm: float,
    hf_off: np.ndarray,
    hf_w: np.ndarray,
    lo: float = -np.inf,
    hi: float = np.inf,
) -> DipTemplates:
    """Templates of width ``fwhm`` (scaled) for candidates at the grid points in [lo, hi].

    Cached on the grid, the width, the pattern and the range: the lines of a scan share
    them.
    """
    return _templates_cached(
        np.ascontiguousarray(x, dtype=np.float64).tobytes(),
        float(fwhm),
        np.ascontiguousarray(hf_off, dtype=np.float64).tobytes(),
        np.ascontiguousarray(hf_w, dtype=np.float64).tobytes(),
        float(lo),
        float(hi),
    )


@lru_cache(maxsize=256)
def _templates_cached(
    x_b: bytes, fwhm: float, off_b: bytes, w_b: bytes, lo: float, hi: float
) -> DipTemplates:
    x = np.frombuffer(x_b)
    off = np.frombuffer(off_b)
    w = np.frombuffer(w_b)
    n = x.shape[0]
    cand = np.flatnonzero((x >= lo) & (x <= hi))
    if cand.size == 0:
        cand = np.arange(n)
    stride = max(1, int(fwhm / _CANDIDATES_PER_FWHM / float(np.median(np.diff(x)))))
    cand = cand[::stride]
    h = 0.5 * fwhm
    reach = _REACH_HALF_WIDTHS * h
    c = x[cand]
    k0 = np.searchsorted(x, c + off.min() - reach, side="left")
    k1 = np.searchsorted(x, c + off.max() + reach, side="right")
    n_taps = k1 - k0
    width = int(n_taps.max())
    idx = np.minimum(k0[:, None] + np.arange(width)[None, :], n - 1)
    d = x[idx][:, :, None] - c[:, None, None] - off[None, None, :]
    values = np.sum(w * (h * h) / (d * d + h * h), axis=2)
    values[np.arange(width)[None, :] >= n_taps[:, None]] = 0.0
    total = values.sum(axis=1)
    norm2 = np.sum(values**2, axis=1) - total**2 / n
    inv_norm = 1.0 / np.sqrt(np.maximum(norm2, 1e-300))
    # Arc length of the unit zero-mean templates between neighbouring candidates:
    # |t̂_a − t̂_b|² = 2 − 2⟨t̂_a, t̂_b⟩, ⟨t̃_a, t̃_b⟩ = ⟨t_a, t_b⟩ − Σt_a Σt_b / n.
    dense = np.zeros((cand.size, n))
    rows = np.repeat(np.arange(cand.size), width)
    np.add.at(dense, (rows, idx.ravel()), values.ravel())
    dots = np.einsum("ij,ij->i", dense[:-1], dense[1:]) - total[:-1] * total[1:] / n
    cos = np.clip(dots * inv_norm[:-1] * inv_norm[1:], -1.0, 1.0)
    arc = float(np.sum(np.sqrt(2.0 - 2.0 * cos)))
    span = float(c[-1] - c[0]) if cand.size > 1 else 1.0
    return DipTemplates(
        cand=np.ascontiguousarray(cand, dtype=np.int64),
        k0=np.ascontiguousarray(k0, dtype=np.int64),
        values=np.ascontiguousarray(values),
        n_taps=np.ascontiguousarray(n_taps, dtype=np.int64),
        mean=total / n,
        inv_norm=inv_norm,
        arc_per_x=arc / span,
        arc=arc,
        fwhm=fwhm,
    )


def rice_threshold(arc: float, rate: float) -> float:
    """The ``u`` with Φc(u) + (arc / 2π) e^{−u²/2} = ``rate`` (Rice; Davies 1987)."""
    if not 0.0 < rate < 0.5:
        raise ValueError(f"a false-detection rate must lie in (0, 0.5); found {rate}")

    def excess(u: float) -> float:
        return float(ndtr(-u)) + arc / (2.0 * math.pi) * math.exp(-0.5 * u * u) - rate

    return float(brentq(excess, 0.0, 40.0))


@dataclass(frozen=True, eq=False)
class Detection:
    """Detected dips of n spectra (scaled units; arrays of shape (n,) unless noted).

    Attributes
    ----------
    center, depth, significance : ndarray, shape (n, 2)
        Dip 0 is the first (largest) dip, dip 1 its partner (NaN when not found); depth is
        the fractional contrast, significance the matched-filter statistic T.
    baseline : ndarray
        Off-resonance counts per sample (the mean with the found dips filled in).
    n_found : ndarray of int64
        Number of dips found (0, 1 or 2).
    """

    center: np.ndarray
    depth: np.ndarray
    significance: np.ndarray
    baseline: np.ndarray
    n_found: np.ndarray


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _scan(r, k0, values, n_taps, inv_norm, j_lo, j_hi, out):
    """out[j] = ⟨r, t_j⟩ / ‖t̃_j‖ for candidates j in [j_lo, j_hi); returns the best j."""
    best = -1
    best_v = -np.inf
    for j in range(j_lo, j_hi):
        acc = 0.0
        base = k0[j]
        row = values[j]
        for t in range(n_taps[j]):
            acc += r[base + t] * row[t]
        v = acc * inv_norm[j]
        out[j] = v
        if v > best_v:
            best_v = v
            best = j
    return best


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _overlap(i, j, k0, values, n_taps, mean, n):
    """⟨t̃_i, t̃_j⟩ = ⟨t_i, t_j⟩ − n mean_i mean_j of two candidates' zero-mean templates."""
    lo = max(k0[i], k0[j])
    hi = min(k0[i] + n_taps[i], k0[j] + n_taps[j])
    acc = 0.0
    for k in range(lo, hi):
        acc += values[i, k - k0[i]] * values[j, k - k0[j]]
    return acc - n * mean[i] * mean[j]


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _peak(x, cand, tv, j, n_cand):
    """Centre of the peak of ``tv`` at candidate j, refined by a parabola through 3 points."""
    c = x[cand[j]]
    if j <= 0 or j >= n_cand - 1 or cand[j + 1] - cand[j] != cand[j] - cand[j - 1]:
        return c
    den = tv[j - 1] - 2.0 * tv[j] + tv[j + 1]
    if not den < 0.0:
        return c
    shift = 0.5 * (tv[j - 1] - tv[j + 1]) / den
    shift = min(max(shift, -0.5), 0.5)
    step = x[cand[j + 1]] - x[cand[j]] if shift > 0.0 else x[cand[j]] - x[cand[j - 1]]
    return c + shift * step


_MAX_SHARED = 0.9  # a partner candidate may share at most this much of the first dip's norm²


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH, parallel=True)
def _detect(
    x,
    y,
    cand,
    k0,
    values,
    n_taps,
    mean,
    inv_norm,
    poisson,
    u_single,
    u_partner,
    pair_x,
    mirror_tol,
    fwhm,
):
    """Steps 1-3 of the module docstring for every row of ``y``.

    One scan gives ``p_j = ⟨ȳ − y, t_j⟩``. The first dip's least-squares fit removed,
    the partner's statistic at ``j`` is the projection of the rest on the part of ``t̃_j``
    orthogonal to the first template, ``(p_j − a₁⟨t̃_j, t̃₁⟩) / ‖t̃_j⊥‖`` (again a
    standard normal on noise), so close, overlapping pairs are scored correctly without a
    second scan. The two depths and significances are then those of the joint
    least-squares fit of both templates and the baseline.
    """
    n_spec, n = y.shape
    n_cand = cand.shape[0]
    center = np.full((n_spec, 2), np.nan)
    depth = np.full((n_spec, 2), np.nan)
    signif = np.full((n_spec, 2), np.nan)
    baseline = np.empty(n_spec)
    n_found = np.zeros(n_spec, dtype=np.int64)
    for s in prange(n_spec):
        yr = y[s]
        r = np.empty(n)
        tv = np.empty(n_cand)
        t2 = np.empty(n_cand)
        ybar = 0.0
        for k in range(n):
            ybar += yr[k]
        ybar /= n
        if poisson:
            noise = math.sqrt(max(ybar, 1.0))
        else:
            acc = 0.0
            for k in range(n - 1):
                acc += abs(yr[k + 1] - yr[k])
            # mean |Δy| = 2σ/√π for independent Gaussian samples
            noise = max(acc / (n - 1) * (math.sqrt(math.pi) / 2.0), 1e-12)
        for k in range(n):
            r[k] = ybar - yr[k]
        j1 = _scan(r, k0, values, n_taps, inv_norm, 0, n_cand, tv)
        n11 = 1.0 / (inv_norm[j1] * inv_norm[j1])
        a1 = tv[j1] * inv_norm[j1]  # least-squares depth in counts
        z1 = tv[j1] / noise
        c1 = _peak(x, cand, tv, j1, n_cand)
        reach = k0[j1] + n_taps[j1]
        mirror = 2.0 * pair_x - c1
        far = fwhm
        j2 = -1
        for j in range(n_cand):
            xj = x[cand[j]]
            if mirror_tol >= 0.0 and abs(xj - mirror) > mirror_tol:
                t2[j] = -np.inf
                continue
            njj = 1.0 / (inv_norm[j] * inv_norm[j])
            if k0[j] < reach and k0[j] + n_taps[j] > k0[j1]:
                n1j = _overlap(j1, j, k0, values, n_taps, mean, n)
            else:
                n1j = -n * mean[j1] * mean[j]
            perp = njj - n1j * n1j / n11
            if perp < (1.0 - _MAX_SHARED) * njj:
                t2[j] = -np.inf
                continue
            t2[j] = (tv[j] / inv_norm[j] - a1 * n1j) / math.sqrt(perp) / noise
            # the mirror allowance holds where the window cannot hold the first dip
            need = u_partner if mirror_tol >= 0.0 and abs(xj - c1) >= far else u_single
            if t2[j] >= need and (j2 < 0 or t2[j] > t2[j2]):
                j2 = j
        b = ybar + a1 * mean[j1]
        if j2 >= 0:
            # joint least squares of both templates (the baseline is projected out)
            n22 = 1.0 / (inv_norm[j2] * inv_norm[j2])
            n12 = _overlap(j1, j2, k0, values, n_taps, mean, n)
            p1 = tv[j1] / inv_norm[j1]
            p2 = tv[j2] / inv_norm[j2]
            det = n11 * n22 - n12 * n12
            a1 = (n22 * p1 - n12 * p2) / det
            a2 = (n11 * p2 - n12 * p1) / det
            # z of each depth: a / (noise √(G⁻¹)_ii)
            z1 = max(z1, a1 / (noise * math.sqrt(n22 / det)))
            z2 = a2 / (noise * math.sqrt(n11 / det))
            b = ybar + a1 * mean[j1] + a2 * mean[j2]
            center[s, 1] = _peak(x, cand, t2, j2, n_cand)
            depth[s, 1] = a2 / max(b, 1e-12)
            signif[s, 1] = z2
        center[s, 0] = c1
        depth[s, 0] = a1 / max(b, 1e-12)
        signif[s, 0] = z1
        baseline[s] = b
        if z1 >= u_single:
            n_found[s] = 2 if j2 >= 0 else 1
    return center, depth, signif, baseline, n_found


def detect_dips(
    x: np.ndarray,
    y: np.ndarray,
    templates: DipTemplates,
    *,
    poisson: bool,
    u_single: float,
    u_partner: float,
    pair_center: float = np.nan,
    mirror_tol: float = -1.0,
) -> Detection:
    """Detect up to two dips per row of ``y`` (counts, float64, shape (n, n_freq)).

    ``u_single``: threshold on T for a dip anywhere in the sweep; ``u_partner``: for the
    partner inside the mirror window (``mirror_tol`` < 0 or a NaN ``pair_center``
    disables the window). A first dip below ``u_single`` means no dip at all.
    """
    window = mirror_tol if np.isfinite(pair_center) else -1.0
    center, depth, signif, baseline, n_found = _detect(
        np.ascontiguousarray(x, dtype=np.float64),
        np.ascontiguousarray(y, dtype=np.float64),
        templates.cand,
        templates.k0,
        templates.values,
        templates.n_taps,
        templates.mean,
        templates.inv_norm,
        bool(poisson),
        float(u_single),
        float(u_partner),
        float(pair_center) if np.isfinite(pair_center) else 0.0,
        float(window),
        float(templates.fwhm),
    )
    return Detection(center, depth, signif, baseline, n_found)


_WIDTH_SPAN_OCTAVES = 2  # the width search runs from a quarter to four times the rough width
_WIDTH_STEPS = 4  # widths per octave of that search (a parabola refines the best)
_WIDTH_SPECTRA = 32  # clearest dips whose best widths are pooled
_MIN_PAIRED = 8  # fewest separate pairs from which the width is taken
_PAIR_GAP = 3.0  # rough widths between the dips of a separate pair
_WIDTH_FALSE_DIPS = 0.005  # false-dip rate of the dips the width is measured on


def _zero_mean_dips(
    x: np.ndarray, centre: np.ndarray, fwhm: np.ndarray, hf_off: np.ndarray, hf_w: np.ndarray
) -> np.ndarray:
    """Dips of each width at each centre on the whole grid, minus their means.

    Shape (n_widths, n_centres, n_x)."""
    h2 = (0.25 * fwhm * fwhm)[:, None, None, None]
    d = x[None, None, :, None] - centre[None, :, None, None] - hf_off[None, None, None, :]
    dips = np.sum(hf_w * h2 / (d * d + h2), axis=3)
    return dips - dips.mean(axis=2, keepdims=True)


def matched_width(
    x: np.ndarray,
    y: np.ndarray,
    rough: float,
    hf_off: np.ndarray,
    hf_w: np.ndarray,
    bounds: tuple[float, float],
    center_range: tuple[float, float],
    pair_center: float = np.nan,
    mirror_tol: float = -1.0,
) -> tuple[float, bool]:
    """The dip width (scaled) that best explains the clearest spectra of ``y``.

    The dips of each row are found with the ``rough`` width (the first, and its partner
    where there is one). For the ``_WIDTH_SPECTRA`` clearest rows (of those with a partner
    at least ``_PAIR_GAP`` rough widths away, when there are ``_MIN_PAIRED``: a lone dip may
    be a merged pair, broader than the line) and every width of the ladder from a quarter to
    four times ``rough``, templates of that width at those centres are fitted to the row by
    least squares with the baseline (the χ² they explain, ``pᵀ G⁻¹ p``; the dips at the
    centres found, between grid points, since a template off its dip's centre matches better
    when wider). The width that explains most summed over the rows (one width for the line:
    each row's own best width is noisy, and at low signal the noise favours narrow
    templates) is refined by a parabola in log-width and returned (``rough`` when no row
    shows a dip that noise would fake in fewer than 0.5 % of spectra). Also returned:
    whether the width was measured on separate pairs (at least ``_MIN_PAIRED``), the
    only dips that show the line's own width; a width from lone dips may be that of
    merged pairs, too wide to serve as a prior. Fitting the partner
    alongside matters: alone, a wide template would pay for the other dip's share of the
    mean and the width would come out low.
    """
    rough = min(max(rough, bounds[0]), bounds[1])
    tmpl = dip_templates(x, ladder_width(rough), hf_off, hf_w, *center_range)
    u_partner = rice_threshold(min(tmpl.arc, tmpl.arc_per_x * 2.0 * max(mirror_tol, 0.0)), 0.01)
    first = detect_dips(
        x,
        y,
        tmpl,
        poisson=True,
        u_single=-np.inf,
        u_partner=u_partner,
        pair_center=pair_center,
        mirror_tol=mirror_tol,
    )
    t1 = first.significance[:, 0]
    clear = np.flatnonzero(t1 > rice_threshold(tmpl.arc, _WIDTH_FALSE_DIPS))
    if clear.size == 0:
        return rough, False
    # Separate pairs show the line's own width; a dip without a partner may be a merged
    # pair, broader than the line (and deeper, so it would top a list of clear dips), and
    # the centres of a close pair found at the rough width are off, which widens the best
    # template.
    gap = np.abs(first.center[clear, 1] - first.center[clear, 0])
    paired = clear[np.isfinite(gap) & (gap >= _PAIR_GAP * rough)]
    trusted = paired.size >= _MIN_PAIRED
    if trusted:
        clear = paired
    clear = clear[np.argsort(t1[clear])[::-1][:_WIDTH_SPECTRA]]
    c1 = first.center[clear, 0]
    c2 = first.center[clear, 1]
    two = np.isfinite(c2)
    r = y[clear].mean(axis=1, keepdims=True) - y[clear]
    n_steps = _WIDTH_STEPS * _WIDTH_SPAN_OCTAVES
    widths = ladder_width(rough) * 2.0 ** (np.arange(-n_steps, n_steps + 1) / _WIDTH_STEPS)
    widths = widths[(widths >= bounds[0] * 0.999) & (widths <= bounds[1] * 1.001)]
    c2 = np.where(two, c2, c1)
    a = _zero_mean_dips(x, c1, widths, hf_off, hf_w)  # (width, row, x)
    b = _zero_mean_dips(x, c2, widths, hf_off, hf_w) * two[None, :, None]
    pa, pb = np.einsum("sk,wsk->ws", r, a), np.einsum("sk,wsk->ws", r, b)
    gaa, gbb, gab = (a * a).sum(2), (b * b).sum(2), (a * b).sum(2)
    det = gaa * gbb - gab * gab
    joint = (gbb * pa * pa - 2.0 * gab * pa * pb + gaa * pb * pb) / np.where(two, det, 1.0)
    explained = np.where(two & (det > 1e-12 * gaa * gbb), joint, pa * pa / gaa)
    total = explained.sum(axis=1)
    best = int(np.argmax(total))
    log_w = math.log(widths[best])
    if 0 < best < widths.size - 1:
        s0, s1, s2 = total[best - 1], total[best], total[best + 1]
        den = s0 - 2.0 * s1 + s2
        if den < 0.0:
            shift = min(max(0.5 * (s0 - s2) / den, -0.5), 0.5)
            log_w += shift * math.log(2.0) / _WIDTH_STEPS
    return float(min(max(math.exp(log_w), bounds[0]), bounds[1])), trusted
