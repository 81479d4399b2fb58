"""Find the pixel range where one line departs from the previous line of the same direction.

Pure numerics, no I/O: numpy for the prefix sums, the search over segments compiled
(numba), O(n²) time and O(n) memory. Used by :mod:`strayline.rules.metrics`.

A tip event (contact, crash, a grain picked up) changes the measurement from one pixel of
the line onward and stays changed; a touched sample changes a range of pixels for a few
lines. Both show up as a *segment* of the per-pixel line-to-line difference whose level
differs from the rest of the line. A sample feature (domain wall, stripe edge) that moves a
little from line to line gives differences that are local and of both signs, so averaged
over a segment of many pixels they cancel.

Two kinds of channel are searched, both over every segment ``[a, b)`` of at least
``min_pixels`` pixels (in acquisition order), with the rest of the line either empty or also
at least ``min_pixels`` long:

- *level* channels (PL ratio, centre-mean shift): per-pixel differences ``c``; the segment
  score is a two-sample t-like statistic of the segment mean against the mean outside,
  with a noise scale estimated robustly from the pixel-to-pixel scatter of ``c`` (which a
  single step barely changes);
- *energy* channels (field roughness): per-pixel non-negative energies of the current and
  previous line; the segment value is the log ratio of their sums (regularised so that a
  nearly featureless segment cannot dominate), compared with the same ratio outside.

The changed part is reported: for a prefix or suffix split, whichever side has the larger
own value (so a change from pixel p to the end is reported as ``[p, n)`` whatever side the
search found first); for a segment inside the line, the segment itself.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from strayline._numbers import MAD_TO_SIGMA, median

__all__ = ["Segment", "best_energy_segment", "best_level_segment", "robust_scatter"]

# t of a split above which two parts of a line are taken to differ: well above the largest
# t that pure noise reaches over the ~n²/2 segments searched (≈ 4–4.5 for n = 256) [cp]
_SPLIT_T = 6.0
# Segment boundaries searched exhaustively; longer lines are searched coarse-then-fine.
_MAX_GRID = 257
# With per-pixel σ, a pixel's standardised change counts at most this much in the search
# statistic (Huber's clipping of residuals: Huber, Ann. Math. Statist. 35, 73 (1964)):
# one misfitted pixel (a dip taken for the wrong one moves its centre by tens of σ) must
# not carry a range of min_pixels on its own, while a real shift of many σ still scores
# about _Z_CLIP·√n over n pixels [cp].
_Z_CLIP = 6.0


@dataclass(frozen=True)
class Segment:
    """The most different pixel range of one channel (indices in acquisition order).

    Attributes
    ----------
    start, stop : int
        Half-open range ``[start, stop)`` of the changed part, acquisition order.
    value : float
        Own value of the changed part (mean difference, or log energy ratio).
    score : float
        Search statistic (t-like for level channels, |Δ log ratio| for energy channels).
    """

    start: int
    stop: int
    value: float
    score: float


def robust_scatter(values: np.ndarray) -> float:
    """σ of a per-pixel series from its pixel-to-pixel differences (NaN-aware).

    ``1.4826 · median(|c[p+1] − c[p]|) / √2``: insensitive to a few steps or spikes.

    Parameters
    ----------
    values : ndarray, shape (n,)
        Per-pixel series (any unit; NaN ignored).

    Returns
    -------
    float
        Robust σ in the unit of ``values``; NaN with fewer than 3 finite neighbours.
    """
    d = np.diff(values)
    d = d[np.isfinite(d)]
    if d.size < 3:
        return float("nan")
    return float(MAD_TO_SIGMA * median(np.abs(d)) / np.sqrt(2.0))


def _grid(n: int) -> tuple[np.ndarray, int]:
    """Segment boundaries searched first (at most ``_MAX_GRID``) and their stride."""
    stride = max(1, -(-n // (_MAX_GRID - 1)))
    return np.unique(np.r_[np.arange(0, n + 1, stride), n]).astype(np.int64), stride


def _refined(grid: np.ndarray, k: int, stride: int, n: int) -> np.ndarray:
    """Every boundary within one stride of ``grid[k]``."""
    return np.arange(max(grid[k] - stride, 0), min(grid[k] + stride, n) + 1, dtype=np.int64)


@njit(cache=True)
def _level_kernel(  # noqa: PLR0917 -- compiled kernels take their arrays positionally
    a_s, b_s, cs, cc, cw, cn, n, min_pixels, scale
):
    """Arg-max over segments [a, b) (a in ``a_s``, b in ``b_s``, both increasing) of the
    level statistic of :func:`best_level_segment`: the first maximum in (a, b) order, as
    numpy.argmax over the (a, b) table. Segments that do not count score −1 (and are
    skipped where they are too short). Returns (i, j, score, mean inside, outside)."""
    best = -1.0
    bi = bj = 0
    best_in = best_out = np.nan
    j0 = 0
    for i in range(a_s.shape[0]):
        a = a_s[i]
        # segments shorter than min_pixels never count: start at the first long enough
        while j0 < b_s.shape[0] and b_s[j0] - a < min_pixels:
            j0 += 1
        for j in range(j0, b_s.shape[0]):
            b = b_s[j]
            n_in = cn[b] - cn[a]
            w_in = cw[b] - cw[a]
            w_out = cw[n] - w_in
            s_in = cs[b] - cs[a]
            c_in = cc[b] - cc[a]
            m_in = s_in / w_in if w_in != 0.0 else (np.nan if s_in == 0.0 else np.inf * s_in)
            if w_out > 0:
                m_out = (cs[n] - s_in) / w_out
                inv = 1.0 / w_in + 1.0 / w_out if w_in != 0.0 else np.inf
                c_out = (cc[n] - c_in) / w_out
            else:
                m_out = 0.0
                inv = 1.0 / w_in if w_in != 0.0 else np.inf
                c_out = 0.0
            score = np.nan
            if w_in != 0.0:
                score = abs(c_in / w_in - c_out) / (scale * math.sqrt(inv))
            length = b - a
            valid = length >= min_pixels and (n - length >= min_pixels or length == n)
            edge = a == 0 or b == n
            whole = a == 0 and b == n
            keep = (
                valid and not whole and n_in >= min_pixels / 2 and (edge or abs(m_in) >= abs(m_out))
            )
            value = score if keep and math.isfinite(score) else -1.0
            if value > best:
                best, bi, bj, best_in, best_out = value, i, j, m_in, m_out
    return bi, bj, best, best_in, best_out


@njit(cache=True)
def _energy_kernel(  # noqa: PLR0917 -- compiled kernels take their arrays positionally
    a_s, b_s, cn, cp, n, min_pixels, eps
):
    """Arg-max over segments of the energy statistic of :func:`best_energy_segment`
    (as :func:`_level_kernel`). Returns (i, j, score, log ratio inside, outside)."""
    best = -1.0
    bi = bj = 0
    best_in = best_out = np.nan
    j0 = 0
    for i in range(a_s.shape[0]):
        a = a_s[i]
        # segments shorter than min_pixels never count: start at the first long enough
        while j0 < b_s.shape[0] and b_s[j0] - a < min_pixels:
            j0 += 1
        for j in range(j0, b_s.shape[0]):
            b = b_s[j]
            e_in_now = cn[b] - cn[a]
            e_in_prev = cp[b] - cp[a]
            num, den = e_in_now + eps, e_in_prev + eps
            r_in = math.log(num / den) if num > 0.0 and den > 0.0 else np.nan
            whole = b - a == n
            if whole:
                r_out = 0.0
            else:
                num, den = cn[n] - e_in_now + eps, cp[n] - e_in_prev + eps
                r_out = math.log(num / den) if num > 0.0 and den > 0.0 else np.nan
            edge = a == 0 or b == n
            score = 0.5 * abs(r_in) if whole else abs(r_in - r_out)
            length = b - a
            valid = length >= min_pixels and (n - length >= min_pixels or length == n)
            keep = valid and math.isfinite(r_in) and (edge or abs(r_in) >= abs(r_out))
            value = score if keep else -1.0
            if value > best:
                best, bi, bj, best_in, best_out = value, i, j, r_in, r_out
    return bi, bj, best, best_in, best_out


def _search(n: int, kernel, *args) -> tuple[int, int, float, float, float]:  # type: ignore[no-untyped-def]
    """Arg-max of a compiled segment statistic over segments ``[a, b)``, ``0 <= a < b <= n``.

    Long lines are searched on a grid of at most ``_MAX_GRID`` boundaries, then refined at
    full resolution around the best grid cell, so time stays O(_MAX_GRID²); the compiled
    kernels keep no table, so memory is O(n). Returns (a, b, score, value inside, value
    outside).
    """
    grid, stride = _grid(n)
    i, j, score, v_in, v_out = kernel(grid, grid, *args)
    a_s, b_s = grid, grid
    if stride > 1:
        a_s, b_s = _refined(grid, i, stride, n), _refined(grid, j, stride, n)
        i, j, score, v_in, v_out = kernel(a_s, b_s, *args)
    return int(a_s[i]), int(b_s[j]), float(score), float(v_in), float(v_out)


def _changed_part(
    n: int, a: int, b: int, *, in_value: float, out_value: float, score: float
) -> Segment:
    is_prefix_or_suffix = (a == 0) != (b == n)
    if is_prefix_or_suffix and abs(out_value) > abs(in_value):
        a, b = (b, n) if a == 0 else (0, a)
        in_value = out_value
    return Segment(int(a), int(b), float(in_value), float(score))


def best_level_segment(
    change: np.ndarray, min_pixels: int, sigma: np.ndarray | None = None
) -> Segment | None:
    """Segment whose mean differs most from the rest of the line (t-like statistic).

    Parameters
    ----------
    change : ndarray, shape (n,)
        Per-pixel difference in acquisition order (NaN = no value).
    min_pixels : int
        Smallest segment (and smallest remainder) considered.
    sigma : ndarray, shape (n,), optional
        Per-pixel 1σ of ``change`` (same unit; NaN or <= 0 = no value). Given, the means
        are inverse-variance weighted and the statistic is
        ``(m_in − m_out) / √(1/W_in + 1/W_out)`` with ``W = Σ 1/σ²`` — the two-sample z of
        weighted means (e.g. Bevington & Robinson, *Data Reduction and Error Analysis*,
        3rd ed., §4.1) — divided by ``max(1, s)``, ``s`` the robust scatter of
        ``change / sigma`` (so that σ that understate the pixel-to-pixel scatter cannot
        inflate it); in the statistic (not in the reported mean) each pixel's change is
        clipped to ``±6σ`` (σ times that scatter) so that one misfitted pixel cannot
        make a range alone. Without it every pixel weighs the same and the noise scale
        is the robust scatter of ``change``.

    Returns
    -------
    Segment or None
        None when there are too few finite pixels or no scatter estimate.
    """
    n = change.shape[0]
    ok = np.isfinite(change)
    if sigma is not None:
        ok &= np.isfinite(sigma) & (sigma > 0)
    if n < min_pixels or ok.sum() < min_pixels:
        return None
    values = np.where(ok, change, 0.0)
    if sigma is None:
        scale = robust_scatter(change)
        weight = ok.astype(float)
        clipped = None
    else:
        safe = np.where(ok, sigma, 1.0)
        scale = max(1.0, robust_scatter(np.where(ok, change / safe, np.nan)))
        weight = np.where(ok, 1.0 / safe**2, 0.0)
        clipped = np.clip(values, -_Z_CLIP * scale * safe, _Z_CLIP * scale * safe)
    if not np.isfinite(scale):
        return None
    scale = max(scale, 1e-300)
    cs = np.concatenate([[0.0], np.cumsum(values * weight)])
    # Sums of the clipped changes, for the statistic (the same sums when nothing clips).
    cc = cs if clipped is None else np.concatenate([[0.0], np.cumsum(clipped * weight)])
    cw = np.concatenate([[0.0], np.cumsum(weight)])
    cn = np.concatenate([[0.0], np.cumsum(ok.astype(float))])

    a, b, score, m_in, m_out = _search(n, _level_kernel, cs, cc, cw, cn, n, min_pixels, scale)
    # The whole line is the answer only when no split separates two parts that differ
    # significantly (t >= _SPLIT_T); its own score is the t of its mean against zero.
    w_all = float(cw[n])
    m_whole = float(cs[n]) / w_all
    whole_score = abs(float(cc[n]) / w_all) * np.sqrt(w_all) / scale
    if score < _SPLIT_T and whole_score > score:
        return Segment(0, n, m_whole, whole_score)
    if score < 0:
        return None
    return _changed_part(n, a, b, in_value=m_in, out_value=m_out, score=score)


def best_energy_segment(
    energy_now: np.ndarray,
    energy_prev: np.ndarray,
    min_pixels: int,
    noise_energy: float = 0.0,
) -> Segment | None:
    """Segment whose energy ratio (now / previous) differs most from the rest of the line.

    Parameters
    ----------
    energy_now, energy_prev : ndarray, shape (n,)
        Non-negative per-pixel energies in acquisition order (NaN = no value; a pixel
        missing in either line is dropped from both).
    min_pixels : int
        Smallest segment (and smallest remainder) considered.
    noise_energy : float
        Mean energy per pixel that noise alone gives (same unit as the energies); the
        regulariser is at least ``min_pixels`` times it, so a line whose roughness is
        mostly noise (a µT-level sample) cannot give large ratios.

    Returns
    -------
    Segment or None
        ``value`` is ``ln(ΣE_now / ΣE_prev)`` over the changed part, each sum regularised
        by ``min_pixels`` times the larger of the line's mean previous energy per pixel
        and ``noise_energy``. None when the
        previous line has no energy at all.
    """
    n = energy_now.shape[0]
    ok = np.isfinite(energy_now) & np.isfinite(energy_prev)
    if n < min_pixels or ok.sum() < min_pixels:
        return None
    en = np.where(ok, energy_now, 0.0)
    ep = np.where(ok, energy_prev, 0.0)
    eps = max(float(np.mean(ep[ok])), float(noise_energy)) * min_pixels
    if not eps > 0:
        return None
    cn = np.concatenate([[0.0], np.cumsum(en)])
    cp = np.concatenate([[0.0], np.cumsum(ep)])

    a, b, score, r_in, r_out = _search(n, _energy_kernel, cn, cp, n, min_pixels, eps)
    if score < 0:
        return None
    return _changed_part(n, a, b, in_value=r_in, out_value=r_out, score=score)
