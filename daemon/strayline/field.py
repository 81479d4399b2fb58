"""Magnetic field at the NV from fitted resonances.

Pure functions over arrays; returns a frozen :class:`LineField`.

Two resonances f₋ < f₊ give the field along the NV axis exactly, through the closed-form
inversion of Balasubramanian et al. [1]_
(:func:`strayline.physics.inversion.field_from_resonances`): B∥ = sign · |B| cos θ. One
resonance gives B∥ = sign · (f − D)/γ on the upper branch and sign · (D − f)/γ on the
lower one, first order in the field ([2]_, Sec. 2); a lone dip of the two-dip model
(ONE_RESONANCE) takes the branch on its side of D.

Why the exact inversion rather than the D-independent splitting (f₊ − f₋)/(2γ): at
D = 2.870 GHz the splitting estimate is off by 0.001 % of |B| at 1 mT, 30°, but by 0.09 %
at 10 mT, 54.7°, 0.55 % at 10 mT, 80°, 0.49 % at 1 mT, 90° and 4.8 % at 10 mT, 90°
(there f₊ − f₋ = (γB⊥)²/D reads as a false 0.48 mT); values computed with
:func:`strayline.physics.hamiltonian.transition_frequencies_hz`. The inversion is exact
to 2e-7 of |B| or better at any angle up to 10 mT when D is right. Its price is its
dependence on D (a 1 K error in D, 74 kHz, moves |B| by −95 µT and θ by −4.4° at 1 mT,
54.7°; PHYSICS.md §2), so D must come from the temperature or from the mean of both lines
measured elsewhere. For noisy pairs that admit no field ((γB)² < 0 or cos²θ outside
[0, 1]) the inversion clips and stays finite.

References
----------
.. [1] G. Balasubramanian et al., "Nanoscale imaging magnetometry with diamond spins under
   ambient conditions", Nature 455, 648 (2008), Methods.
.. [2] L. Rondin, J.-P. Tetienne, T. Hingant, J.-F. Roch, P. Maletinsky and V. Jacques,
   "Magnetometry with nitrogen-vacancy defects in diamond", Rep. Prog. Phys. 77, 056503
   (2014).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from strayline.fit import FitStatus, LineFit
from strayline.physics import GAMMA_NV_HZ_PER_T, field_from_resonances

__all__ = ["LineField", "field_from_fit"]

Branch = Literal["upper", "lower"]

# Step of the central differences that linearise the inversion, Hz: small against any
# linewidth, large against rounding of GHz values (relative 3e-7).
_STEP_HZ = 1e3


@dataclass(frozen=True, eq=False)
class LineField:
    """Field results for the n_pixels of one line (all arrays shape (n_pixels,), 1σ).

    Attributes
    ----------
    field_nv_t, field_nv_sigma_t
        Field projected on the NV axis, T.
    field_abs_t, field_abs_sigma_t
        Field magnitude |B|, T (NaN with one resonance).
    angle_rad, angle_sigma_rad
        Angle between B and the NV axis, rad (NaN with one resonance).
    center_mean_hz, center_mean_sigma_hz
        (f₋ + f₊)/2, Hz: follows D (temperature, strain) and B⊥ (NaN with one resonance).
    status
        Fit status codes passed through (uint8).
    """

    field_nv_t: np.ndarray
    field_nv_sigma_t: np.ndarray
    field_abs_t: np.ndarray
    field_abs_sigma_t: np.ndarray
    angle_rad: np.ndarray
    angle_sigma_rad: np.ndarray
    center_mean_hz: np.ndarray
    center_mean_sigma_hz: np.ndarray
    status: np.ndarray


def _pair_field(
    f_lo: np.ndarray, f_hi: np.ndarray, zfs_hz: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(B∥ ≥ 0, |B|, θ) of resonance pairs, each shape (n,)."""
    b_abs, angle = field_from_resonances(f_lo, f_hi, zfs_hz)
    return b_abs * np.cos(angle), b_abs, angle


def field_from_fit(
    fit: LineFit,
    *,
    zfs_hz: float,
    sign: float = +1.0,
    branch: Branch = "upper",
) -> LineField:
    """Field along the NV axis (and |B|, angle, line mean) from a line's fitted resonances.

    Parameters
    ----------
    fit : LineFit
        The line's fit; ``center_hz`` and ``center_sigma_hz`` have shape (n_pixels, 2).
    zfs_hz : float
        Zero-field splitting D, Hz (from the temperature, or measured in the scan).
    sign : float
        +1 or −1: the sign of B∥, which CW ODMR cannot tell; it comes from a known bias
        field (common practice).
    branch : {"upper", "lower"}
        Which transition the resonance of a one-dip fit (status OK, one column) is:
        f₊ = D + γB∥ ("upper") or f₋ = D − γB∥. A lone dip of the two-dip model
        (ONE_RESONANCE) ignores it and takes the branch on its side of D.

    Returns
    -------
    LineField
        Arrays of shape (n_pixels,). Rows with two resonances (status OK, both columns)
        get every quantity; rows with one (ONE_RESONANCE, or OK from a one-dip fit) get
        B∥ only; MERGED rows get only the line mean (the merged centre); rows with other
        statuses are NaN. ``status`` is the fit's, passed through.

    Notes
    -----
    Two resonances: B∥ = sign · |B| cos θ with (|B|, θ) from Balasubramanian et al. [1]_,
    Methods (their (γB)², Δ and cos²θ equations, evaluated by
    :func:`strayline.physics.inversion.field_from_resonances`). One resonance:
    B∥ = ±(f − D)/γ ([2]_, Sec. 2), which neglects the (γB⊥)²·3/(2D) shift of both lines
    (15 µT of error per mT² of B⊥). A one-dip window sweeps one chosen transition, which
    may cross D when B∥ changes sign, so its branch is given. A two-dip window sees both
    transitions; when only one is significant its branch is unknown, and the sign
    convention of the pairs (B∥ = sign · |B| cos θ, |B| cos θ ≥ 0) makes it f₊ above D and
    f₋ below: B∥ = sign · |f − D|/γ, consistent with the pairs of the same map.

    A pair whose mean (f₋ + f₊)/2 lies at or below D (noise, or D set too high) admits no
    transverse field; there B∥ = sign · (f₊ − f₋)/(2γ), the θ = 0 solution, which is the
    consistent point nearest to it, rather than the inversion's clipped |B| = 0.

    1σ: the inversion is linearised by central differences of ±1 kHz in f₋ and f₊, and
    the two centres are taken as uncorrelated: their fits share the width and baseline,
    but a centre's derivative is odd about the dip while the width's and baseline's are
    even, so for separated dips the coupling cancels (measured on 20 000 simulated
    spectra of 600 counts per point, dips 80-250 MHz apart, FWHM 10 MHz: median
    correlation from the fit's covariance 9e-5, correlation of the actual centre errors
    −0.004). The line mean has
    σ = ½ √(σ₋² + σ₊²); the one-resonance B∥ has σ = σ_f / γ.

    References
    ----------
    .. [1] G. Balasubramanian et al., Nature 455, 648 (2008), Methods.
    .. [2] L. Rondin et al., Rep. Prog. Phys. 77, 056503 (2014).
    """
    if sign not in (1.0, -1.0):
        raise ValueError(f"sign must be +1 or -1; found {sign!r}")
    if branch not in ("upper", "lower"):
        raise ValueError(f"branch must be 'upper' or 'lower'; found {branch!r}")
    n = fit.n_pixels
    center = np.asarray(fit.center_hz, dtype=np.float64)
    sig = np.asarray(fit.center_sigma_hz, dtype=np.float64)
    status = np.asarray(fit.status)
    nan = np.full(n, np.nan)
    b_nv, b_nv_s = nan.copy(), nan.copy()
    b_abs, b_abs_s = nan.copy(), nan.copy()
    angle, angle_s = nan.copy(), nan.copy()
    mean, mean_s = nan.copy(), nan.copy()

    finite = np.isfinite(center)
    two = (status == FitStatus.OK) & finite[:, 0] & finite[:, 1]
    one = ((status == FitStatus.OK) | (status == FitStatus.ONE_RESONANCE)) & (
        finite[:, 0] & ~finite[:, 1]
    )
    merged = (status == FitStatus.MERGED) & finite[:, 0]

    if np.any(two):
        f_lo, f_hi = center[two, 0], center[two, 1]
        s_lo, s_hi = sig[two, 0], sig[two, 1]
        par, mag, ang = _pair_field(f_lo, f_hi, zfs_hz)
        d_lo = np.subtract(
            _pair_field(f_lo + _STEP_HZ, f_hi, zfs_hz), _pair_field(f_lo - _STEP_HZ, f_hi, zfs_hz)
        ) / (2 * _STEP_HZ)
        d_hi = np.subtract(
            _pair_field(f_lo, f_hi + _STEP_HZ, zfs_hz), _pair_field(f_lo, f_hi - _STEP_HZ, zfs_hz)
        ) / (2 * _STEP_HZ)
        var = (d_lo * s_lo) ** 2 + (d_hi * s_hi) ** 2  # shape (3, n_two)
        par_s = np.sqrt(var[0])
        # A pair whose mean lies below D admits no transverse field: the inversion would
        # clip |B| to 0. The consistent point nearest to it is θ = 0, where
        # B∥ = (f₊ − f₋)/(2γ) exactly, with σ = ½√(σ₋² + σ₊²)/γ.
        axial = 0.5 * (f_lo + f_hi) <= zfs_hz
        par = np.where(axial, 0.5 * (f_hi - f_lo) / GAMMA_NV_HZ_PER_T, par)
        par_s = np.where(axial, 0.5 * np.hypot(s_lo, s_hi) / GAMMA_NV_HZ_PER_T, par_s)
        b_nv[two], b_nv_s[two] = sign * par, par_s
        b_abs[two], b_abs_s[two] = mag, np.sqrt(var[1])
        angle[two], angle_s[two] = ang, np.sqrt(var[2])
        mean[two] = 0.5 * (f_lo + f_hi)
        mean_s[two] = 0.5 * np.hypot(s_lo, s_hi)

    branch_sign = np.where(
        status[one] == FitStatus.ONE_RESONANCE,
        np.where(center[one, 0] >= zfs_hz, 1.0, -1.0),
        1.0 if branch == "upper" else -1.0,
    )
    b_nv[one] = sign * branch_sign * (center[one, 0] - zfs_hz) / GAMMA_NV_HZ_PER_T
    b_nv_s[one] = sig[one, 0] / GAMMA_NV_HZ_PER_T
    mean[merged], mean_s[merged] = center[merged, 0], sig[merged, 0]

    return LineField(
        field_nv_t=b_nv,
        field_nv_sigma_t=b_nv_s,
        field_abs_t=b_abs,
        field_abs_sigma_t=b_abs_s,
        angle_rad=angle,
        angle_sigma_rad=angle_s,
        center_mean_hz=mean,
        center_mean_sigma_hz=mean_s,
        status=status.astype(np.uint8, copy=True),
    )
