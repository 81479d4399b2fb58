"""Shot-noise-limited sensitivity of continuous-wave ODMR magnetometry.

References
----------
.. [1] A. Dréau, M. Lesik, L. Rondin, P. Spinicelli, O. Arcizet, J.-F. Roch and
   V. Jacques, "Avoiding power broadening in optically detected magnetic resonance of
   single NV defects for enhanced dc magnetic field sensitivity", Phys. Rev. B 84,
   195204 (2011).
"""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike

from strayline.physics.constants import GAMMA_NV_HZ_PER_T

__all__ = ["LINESHAPE_FACTOR", "shot_noise_sensitivity_t_per_rthz"]

#: P_F, the line-shape factor: linewidth (FWHM) times the maximum slope of a unit-depth dip
#: is 1/P_F. Lorentzian 4/(3√3) ≈ 0.7698, Gaussian √(e / (8 ln 2)) ≈ 0.7002 [num].
LINESHAPE_FACTOR: dict[str, float] = {
    "lorentzian": 4.0 / (3.0 * math.sqrt(3.0)),
    "gaussian": math.sqrt(math.e / (8.0 * math.log(2.0))),
}


def shot_noise_sensitivity_t_per_rthz(
    rate_cps: ArrayLike,
    contrast: ArrayLike,
    fwhm_hz: ArrayLike,
    lineshape: Literal["lorentzian", "gaussian"] = "lorentzian",
    gamma_hz_per_t: float = GAMMA_NV_HZ_PER_T,
) -> np.ndarray:
    """Photon-shot-noise limit of the field sensitivity at the point of steepest slope.

    Parameters
    ----------
    rate_cps : array_like, shape (...)
        Off-resonance photon detection rate R, counts/s.
    contrast : array_like, shape (...)
        Fractional dip depth C (0.2 = 20 %).
    fwhm_hz : array_like, shape (...)
        Linewidth Δν (full width at half maximum), Hz.
    lineshape : {"lorentzian", "gaussian"}
        Shape of the dip, which sets the factor P_F.
    gamma_hz_per_t : float
        Gyromagnetic ratio, Hz/T.

    Returns
    -------
    ndarray, shape (...)
        η, T/√Hz. Infinite where C or R is 0.

    Raises
    ------
    ValueError
        For an unknown `lineshape`.

    Notes
    -----
    Dréau et al. [1]_, their sensitivity formula (Eq. (1) [mem], equation number not
    re-checked): with the probe set where the dip is steepest, a field
    change δB moves the signal by γ δB · max|dS/df| = γ δB · C R / (P_F Δν) per second,
    against a shot noise of √R per √s, so

    .. math:: \\eta = P_F \\frac{\\Delta\\nu}{\\gamma\\, C \\sqrt{R}}

    P_F = 4/(3√3) for a Lorentzian and √(e / (8 ln 2)) for a Gaussian (both follow from
    the maximum of the derivative of a unit-height profile of unit FWHM). A fitted full
    spectrum does worse than this figure (common practice).

    References
    ----------
    .. [1] A. Dréau et al., Phys. Rev. B 84, 195204 (2011).
    """
    try:
        p_f = LINESHAPE_FACTOR[lineshape]
    except KeyError:
        raise ValueError(
            f"lineshape must be one of {sorted(LINESHAPE_FACTOR)}; found {lineshape!r}"
        ) from None
    rate = np.asarray(rate_cps, dtype=np.float64)
    c = np.asarray(contrast, dtype=np.float64)
    width = np.asarray(fwhm_hz, dtype=np.float64)
    with np.errstate(divide="ignore"):
        return p_f * width / (gamma_hz_per_t * c * np.sqrt(rate))
