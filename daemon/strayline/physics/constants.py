"""Physical constants of the NV⁻ ground state, and the zero-field splitting D(T).

Every value is in SI units (Hz, T, K). Tags: [pub] stated in the cited work, [num]
computed here, [mem] recalled from the cited work and to be confirmed before it is used
as a hard limit.

References
----------
.. [1] J. H. N. Loubser and J. A. van Wyk, "Electron spin resonance in the study of
   diamond", Rep. Prog. Phys. 41, 1201 (1978).
.. [2] V. M. Acosta, E. Bauch, M. P. Ledbetter, A. Waxman, L.-S. Bouchard and D. Budker,
   "Temperature dependence of the nitrogen-vacancy magnetic resonance in diamond",
   Phys. Rev. Lett. 104, 070801 (2010).
.. [3] X.-D. Chen, C.-H. Dong, F.-W. Sun, C.-L. Zou, J.-M. Cui, Z.-F. Han and G.-C. Guo,
   "Temperature dependent energy level shifts of nitrogen-vacancy centers in diamond",
   Appl. Phys. Lett. 99, 161903 (2011).
.. [4] S. Felton, A. M. Edmonds, M. E. Newton, P. M. Martineau, D. Fisher, D. J. Twitchen
   and J. M. Baker, "Hyperfine interaction in the ground state of the negatively charged
   nitrogen vacancy center in diamond", Phys. Rev. B 79, 075203 (2009).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.constants
from numpy.typing import ArrayLike
from scipy.optimize import brentq

__all__ = [
    "DD_DT_HZ_PER_K",
    "D_CRYO_HZ",
    "D_ROOM_HZ",
    "GAMMA_NV_HZ_PER_T",
    "G_NV",
    "HF_14N_HZ",
    "HF_15N_HZ",
    "MU0",
    "T_ROOM_K",
    "ZFS_PHONON_TEMPERATURE_K",
    "zfs_hz",
]

#: g-factor of the NV⁻ ground state, 2.0028(3) [mem] (Loubser & van Wyk 1978 [1]_).
G_NV: float = 2.0028

#: Gyromagnetic ratio γ_NV = g μ_B / h, Hz/T [num]: 28.0317 GHz/T with the CODATA value
#: of μ_B/h from scipy.constants (13.9962449171 GHz/T in CODATA 2022).
GAMMA_NV_HZ_PER_T: float = G_NV * scipy.constants.physical_constants["Bohr magneton in Hz/T"][0]

#: Vacuum permeability μ0, T m / A (CODATA, via scipy.constants).
MU0: float = scipy.constants.mu_0

#: Room temperature at which :data:`D_ROOM_HZ` and :data:`DD_DT_HZ_PER_K` apply, K.
T_ROOM_K: float = 300.0

#: Zero-field splitting at room temperature, Hz; reported 2.8695–2.8705 GHz [mem].
D_ROOM_HZ: float = 2.870e9

#: dD/dT near room temperature, Hz/K: −74.2(7) kHz/K [pub] (Acosta et al. 2010 [2]_).
DD_DT_HZ_PER_K: float = -74.2e3

#: Zero-field splitting at cryogenic temperature (≲ 10 K), Hz; ≈ 2.8775–2.878 GHz [mem]
#: (Chen et al. 2011 [3]_).
D_CRYO_HZ: float = 2.8777e9

#: Spacing of the three ¹⁴N (I = 1) hyperfine lines of each ODMR transition, Hz;
#: |A∥| ≈ 2.14(7) MHz in Felton et al. 2009 [4]_, observed spacing ≈ 2.16 MHz [mem].
HF_14N_HZ: float = 2.16e6

#: Spacing of the two ¹⁵N (I = ½) hyperfine lines of each ODMR transition, Hz;
#: |A∥| ≈ 3.03 MHz [mem] (Felton et al. 2009 [4]_).
HF_15N_HZ: float = 3.03e6


def _solve_phonon_temperature() -> tuple[float, float]:
    """Fit the one-mode model's (Θ, amplitude) to the three anchors; see :func:`zfs_hz`."""
    drop_hz = D_CRYO_HZ - D_ROOM_HZ
    # With x = Θ/T_room the anchors give  x / (1 − e^{−x}) = −dD/dT · T_room / (D₀ − D_room).
    target = -DD_DT_HZ_PER_K * T_ROOM_K / drop_hz
    x = brentq(lambda x: x / -math.expm1(-x) - target, 1e-6, 100.0, xtol=1e-14)
    amplitude_hz = drop_hz * math.expm1(x)
    return x * T_ROOM_K, amplitude_hz


#: Effective phonon temperature Θ of the D(T) interpolation, K [num] (≈ 809 K).
ZFS_PHONON_TEMPERATURE_K: float
_ZFS_AMPLITUDE_HZ: float
ZFS_PHONON_TEMPERATURE_K, _ZFS_AMPLITUDE_HZ = _solve_phonon_temperature()


def zfs_hz(temperature_k: ArrayLike) -> np.ndarray:
    """Zero-field splitting D at a given temperature.

    Parameters
    ----------
    temperature_k : array_like, any shape
        Temperature, K; must be finite and > 0.

    Returns
    -------
    ndarray, same shape as `temperature_k`
        D(T), Hz.

    Raises
    ------
    ValueError
        If any temperature is not finite or is ≤ 0 K.

    Notes
    -----
    The model is a single Bose–Einstein occupation term of our own choosing,

    .. math:: D(T) = D_0 - \\frac{A}{e^{\\Theta/T} - 1},

    whose three parameters are pinned by three anchor values: D_0 = :data:`D_CRYO_HZ`
    (the low-temperature limit, [mem] from Chen et al. [3]_), D(300 K) =
    :data:`D_ROOM_HZ` [mem] and dD/dT(300 K) = :data:`DD_DT_HZ_PER_K` [pub] (Acosta et
    al. [2]_). That gives Θ ≈ 809 K and A ≈ 106 MHz. The curve is smooth and decreases
    monotonically, is flat below ~100 K (D(100 K) − D_0 ≈ −33 kHz) and steepens above
    room temperature (≈ −106 kHz/K at 500 K). Only the anchors come from the literature;
    the shape between them is an interpolation, good to a few hundred kHz between 4 and
    400 K when the anchors are right. For a measured curve over 15–500 K see Cambria et
    al., Phys. Rev. B 108, L180102 (2023).

    References
    ----------
    .. [2] Acosta et al., Phys. Rev. Lett. 104, 070801 (2010).
    .. [3] Chen et al., Appl. Phys. Lett. 99, 161903 (2011).
    """
    t = np.asarray(temperature_k, dtype=np.float64)
    bad = ~np.isfinite(t) | (t <= 0.0)
    if np.any(bad):
        found = t[bad].ravel()[0] if t.ndim else t
        raise ValueError(f"temperature_k must be finite and > 0 K; found {float(found)!r}")
    # 1 / (e^{Θ/T} − 1) written with expm1 so that it neither loses digits near room
    # temperature nor overflows at very low temperature (it tends to 0).
    with np.errstate(over="ignore"):
        occupation = 1.0 / np.expm1(ZFS_PHONON_TEMPERATURE_K / t)
    return D_CRYO_HZ - _ZFS_AMPLITUDE_HZ * occupation
