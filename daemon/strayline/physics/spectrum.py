"""Line shape of a continuous-wave ODMR spectrum: Lorentzian dips on a sloped baseline.

The model (common practice for CW ODMR of NV centres, no single source):

.. math::

    N(f) = \\bigl(N_0 + s\\,(f - f_\\mathrm{ref})\\bigr)
           \\Bigl(1 - \\sum_i C_i\\, L(f; f_i, \\Gamma_i)\\Bigr),
    \\qquad L(f; f_i, \\Gamma) = \\frac{1}{1 + \\bigl(2 (f - f_i)/\\Gamma\\bigr)^2}

with L a Lorentzian of unit height and full width at half maximum Γ, N₀ the
off-resonance counts per sample, s a linear baseline slope (counts per sample per Hz,
e.g. from microwave-power variation over the sweep) and f_ref the mean of the frequency
grid, so that N₀ is the baseline at the middle of the sweep and N₀ and s are uncorrelated
on a uniform grid.

Contrast convention: C_i is the fractional depth of dip i at its centre relative to the
local baseline (an isolated dip dips to N(f_i) = N_baseline · (1 − C_i)); overlapping dips
add their depths. With hyperfine structure the contrast C_i of a transition is split
equally among its 2I + 1 lines: three lines f_i − A, f_i, f_i + A of depth C_i/3 for ¹⁴N
(A = :data:`HF_14N_HZ`), two lines f_i ± A/2 of depth C_i/2 for ¹⁵N (A =
:data:`HF_15N_HZ`), all of width Γ_i.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import ArrayLike

from strayline.physics.constants import HF_14N_HZ, HF_15N_HZ

__all__ = ["hyperfine_pattern", "lorentzian", "lorentzian_dips"]

Hyperfine = Literal["14N", "15N"] | None

_PATTERNS: dict[str | None, tuple[np.ndarray, np.ndarray]] = {
    None: (np.array([0.0]), np.array([1.0])),
    "14N": (np.array([-HF_14N_HZ, 0.0, HF_14N_HZ]), np.full(3, 1.0 / 3.0)),
    "15N": (np.array([-HF_15N_HZ / 2, HF_15N_HZ / 2]), np.full(2, 0.5)),
}


def hyperfine_pattern(hyperfine: Hyperfine) -> tuple[np.ndarray, np.ndarray]:
    """Offsets and contrast weights of the lines that make up one transition.

    Parameters
    ----------
    hyperfine : {None, "14N", "15N"}
        Nitrogen isotope whose hyperfine splitting is resolved, or None for one line.

    Returns
    -------
    offsets_hz : ndarray, shape (n_lines,)
        Line positions relative to the transition centre, Hz.
    weights : ndarray, shape (n_lines,)
        Share of the transition's contrast carried by each line (they sum to 1).

    Raises
    ------
    ValueError
        For an unknown `hyperfine`.
    """
    try:
        offsets, weights = _PATTERNS[hyperfine]
    except KeyError:
        raise ValueError(f"hyperfine must be None, '14N' or '15N'; found {hyperfine!r}") from None
    return offsets.copy(), weights.copy()


def lorentzian(freq_hz: ArrayLike, center_hz: ArrayLike, fwhm_hz: ArrayLike) -> np.ndarray:
    """Unit-height Lorentzian L(f) = 1 / (1 + (2 (f − f₀)/Γ)²).

    Parameters
    ----------
    freq_hz, center_hz, fwhm_hz : array_like, broadcastable shapes
        Frequency f, centre f₀ and full width at half maximum Γ, Hz.

    Returns
    -------
    ndarray, the broadcast shape
        L, dimensionless, 1 at f = f₀ and ½ at f = f₀ ± Γ/2.
    """
    freq = np.asarray(freq_hz, dtype=np.float64)
    x = (
        2.0
        * (freq - np.asarray(center_hz, dtype=np.float64))
        / np.asarray(fwhm_hz, dtype=np.float64)
    )
    return 1.0 / (1.0 + x * x)


def lorentzian_dips(  # noqa: PLR0917 -- positional order is the agreed model API
    freq_hz: ArrayLike,
    center_hz: ArrayLike,
    contrast: ArrayLike,
    fwhm_hz: ArrayLike,
    baseline: ArrayLike,
    slope: ArrayLike = 0.0,
    hyperfine: Hyperfine = None,
) -> np.ndarray:
    """Expected counts of CW ODMR spectra with any number of Lorentzian dips.

    Parameters
    ----------
    freq_hz : array_like, shape (n_freq,) or (..., n_freq)
        Microwave frequencies, Hz (need not be uniform).
    center_hz : array_like, shape (..., n_dips)
        Transition frequencies f_i, Hz.
    contrast : array_like, shape (..., n_dips)
        Fractional depths C_i (see the module notes for the convention).
    fwhm_hz : array_like, shape (..., n_dips) or (...,)
        Linewidths Γ_i (FWHM), Hz; with one dimension fewer than `center_hz` the width is
        shared by all dips.
    baseline : array_like, shape (...,)
        Off-resonance counts per sample N₀ at f_ref, counts.
    slope : array_like, shape (...,) or scalar
        Baseline slope s, counts per Hz.
    hyperfine : {None, "14N", "15N"}
        Resolved nitrogen hyperfine structure (see :func:`hyperfine_pattern`).

    Returns
    -------
    ndarray, shape (..., n_freq)
        Expected counts per sample N(f).

    Notes
    -----
    N(f) = (N₀ + s (f − f_ref)) (1 − Σ_i C_i L(f; f_i, Γ_i)), f_ref the mean of each
    spectrum's frequency grid; the standard CW-ODMR model (common practice), stated in
    full in the module docstring.
    """
    freq = np.asarray(freq_hz, dtype=np.float64)
    center = np.asarray(center_hz, dtype=np.float64)
    depth = np.asarray(contrast, dtype=np.float64)
    width = np.asarray(fwhm_hz, dtype=np.float64)
    if width.ndim == center.ndim - 1:
        width = width[..., np.newaxis]  # shared by every dip
    dips_shape = np.broadcast_shapes(center.shape, depth.shape, width.shape)
    center, depth, width = (np.broadcast_to(a, dips_shape) for a in (center, depth, width))
    offsets, weights = hyperfine_pattern(hyperfine)
    # Lines: (..., n_dips, n_hf) → (..., n_lines), then against (..., 1, n_freq).
    lines_shape = (*dips_shape[:-1], dips_shape[-1] * offsets.size)
    line_center = (center[..., np.newaxis] + offsets).reshape(lines_shape)
    line_depth = (depth[..., np.newaxis] * weights).reshape(lines_shape)
    line_width = np.repeat(width, offsets.size, axis=-1)
    profile = lorentzian(
        freq[..., np.newaxis, :], line_center[..., np.newaxis], line_width[..., np.newaxis]
    )
    dip = np.sum(line_depth[..., np.newaxis] * profile, axis=-2)
    f_ref = np.mean(freq, axis=-1, keepdims=True)
    base = np.asarray(baseline, dtype=np.float64)[..., np.newaxis]
    tilt = np.asarray(slope, dtype=np.float64)[..., np.newaxis] * (freq - f_ref)
    return (base + tilt) * (1.0 - dip)
