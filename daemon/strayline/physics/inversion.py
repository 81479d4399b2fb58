"""From the two ODMR resonances to the field magnitude and its angle to the NV axis.

The closed form of Balasubramanian et al. [1]_ (Methods; restated by Rondin et al.
[2]_): with f₋, f₊ the transitions m_s = 0 → ∓1 of the Hamiltonian of
:mod:`strayline.physics.hamiltonian`,

.. math::

    (\\gamma B)^2 = \\frac{f_+^2 + f_-^2 - f_+ f_- - D^2 - 3E^2}{3}

    \\Delta = \\frac{7D^3 + 2(f_+ + f_-)\\,[2(f_+^2 + f_-^2) - 5 f_+ f_-]
              - 3D\\,(f_+^2 + f_-^2 - f_+ f_-)}{9\\,(f_+^2 + f_-^2 - f_+ f_- - D^2)},
    \\qquad \\cos^2\\theta = \\frac{\\Delta + D}{2D}.

We evaluate it through the invariants of H (trace, second invariant, determinant),
which is the same algebra written so that E ≠ 0 fits in; see
:func:`field_from_resonances`.

References
----------
.. [1] G. Balasubramanian, I. Y. Chan, R. Kolesov, M. Al-Hmoud, J. Tisler, C. Shin,
   C. Kim, A. Wojcik, P. R. Hemmer, A. Krueger, T. Hanke, A. Leitenstorfer,
   R. Bratschitsch, F. Jelezko and J. Wrachtrup, "Nanoscale imaging magnetometry with
   diamond spins under ambient conditions", Nature 455, 648 (2008), Methods.
.. [2] L. Rondin, J.-P. Tetienne, T. Hingant, J.-F. Roch, P. Maletinsky and
   V. Jacques, "Magnetometry with nitrogen-vacancy defects in diamond",
   Rep. Prog. Phys. 77, 056503 (2014).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from strayline.physics.constants import GAMMA_NV_HZ_PER_T

__all__ = ["field_along_axis_from_resonances", "field_from_resonances"]


def field_from_resonances(
    f_lo_hz: ArrayLike,
    f_hi_hz: ArrayLike,
    zfs_hz: ArrayLike,
    strain_hz: ArrayLike = 0.0,
    gamma_hz_per_t: float = GAMMA_NV_HZ_PER_T,
) -> tuple[np.ndarray, np.ndarray]:
    """Field magnitude and angle to the NV axis from the two resonance frequencies.

    Parameters
    ----------
    f_lo_hz, f_hi_hz : array_like, shapes broadcastable to (...)
        The two ODMR resonances f₋ and f₊, Hz. Their order does not matter.
    zfs_hz : array_like, shape broadcastable to (...)
        Zero-field splitting D, Hz.
    strain_hz : array_like, shape broadcastable to (...)
        Transverse splitting E, Hz.
    gamma_hz_per_t : float
        Gyromagnetic ratio, Hz/T.

    Returns
    -------
    field_abs_t : ndarray, shape (...)
        |B|, T.
    angle_rad : ndarray, shape (...)
        θ ∈ [0, π/2], the angle between B and the NV axis (CW ODMR cannot tell B from −B
        along the axis), rad. Reported as 0 where |B| = 0.

    Notes
    -----
    Work in units of D (x = f/D) so that no step loses digits. With S = f₊ + f₋,
    P = f₊ f₋ and the level energies λ₀, λ₀ + f₋, λ₀ + f₊ of H/h:

    1. tr H = 2D gives λ₀ = (2D − S)/3.
    2. The second invariant, D² − E² − γ²B², gives
       (γB)² = (S² − 3P − D² − 3E²)/3 — Balasubramanian et al. [1]_, Methods, the
       (γB)² equation (their E = 0; the −3E² term is ours from the same algebra).
    3. det H = λ₀(λ₀ + f₋)(λ₀ + f₊) = −D (γB⊥)² + E (γ²)(B_x'² − B_y'²). With E = 0 this
       gives sin²θ = −det H / (D (γB)²), algebraically identical to the paper's
       Δ = D cos 2θ, cos²θ = (Δ + D)/(2D). With E ≠ 0 the strain term depends on the
       unknown azimuth of B⊥; we drop it, which is exact when B⊥ lies at 45° to the
       strain axis and is its average over that azimuth.

    For noisy inputs (γB)² is clipped at 0 and cos²θ to [0, 1], so the result is never
    NaN for finite inputs.

    References
    ----------
    .. [1] G. Balasubramanian et al., Nature 455, 648 (2008), Methods.
    """
    f_lo, f_hi, d, e = np.broadcast_arrays(
        np.asarray(f_lo_hz, dtype=np.float64),
        np.asarray(f_hi_hz, dtype=np.float64),
        np.asarray(zfs_hz, dtype=np.float64),
        np.asarray(strain_hz, dtype=np.float64),
    )
    scale = np.where(d != 0.0, np.abs(d), 1.0)
    x_lo, x_hi, x_d, x_e = f_lo / scale, f_hi / scale, d / scale, e / scale
    s = x_lo + x_hi
    p = x_lo * x_hi
    # Step 2: (γB)², in units of D².
    gb2 = np.maximum((s * s - 3.0 * p - x_d * x_d - 3.0 * x_e * x_e) / 3.0, 0.0)
    # Step 1 and 3: λ₀ and det H, then (γB⊥)² = −det H / D.
    lam0 = (2.0 * x_d - s) / 3.0
    det = lam0 * (lam0 + x_lo) * (lam0 + x_hi)
    gb_perp2 = -det / x_d
    sin2 = np.divide(gb_perp2, gb2, out=np.zeros_like(gb2), where=gb2 > 0.0)
    sin2 = np.clip(sin2, 0.0, 1.0)
    field_abs_t = np.sqrt(gb2) * scale / gamma_hz_per_t
    # atan2 keeps full precision at both ends (θ → 0 and θ → 90°).
    angle_rad = np.arctan2(np.sqrt(sin2), np.sqrt(1.0 - sin2))
    return field_abs_t, angle_rad


def field_along_axis_from_resonances(
    f_lo_hz: ArrayLike,
    f_hi_hz: ArrayLike,
    zfs_hz: ArrayLike,
    strain_hz: ArrayLike = 0.0,
    gamma_hz_per_t: float = GAMMA_NV_HZ_PER_T,
) -> np.ndarray:
    """Field component along the NV axis, |B| cos θ, from the two resonances.

    Parameters
    ----------
    f_lo_hz, f_hi_hz, zfs_hz, strain_hz, gamma_hz_per_t
        As in :func:`field_from_resonances`.

    Returns
    -------
    ndarray, shape (...)
        |B| cos θ ≥ 0, T. The sign of B∥ is not measurable by CW ODMR at low field; a
        known bias field fixes it (common practice).

    Notes
    -----
    Uses :func:`field_from_resonances` (Balasubramanian et al., Nature 455, 648 (2008),
    Methods). Unlike the small-field estimate (f₊ − f₋)/(2γ) it is exact for any
    angle, but it needs D.
    """
    field_abs_t, angle_rad = field_from_resonances(
        f_lo_hz, f_hi_hz, zfs_hz, strain_hz, gamma_hz_per_t
    )
    return field_abs_t * np.cos(angle_rad)
