"""The NV⁻ ground-state spin Hamiltonian and its two ODMR transition frequencies.

Model (Doherty et al. [1]_, ground-state part, hyperfine terms left out):

.. math:: H/h = D S_z^2 + E (S_x^2 - S_y^2) + \\gamma_{NV}\\, \\mathbf{B}\\cdot\\mathbf{S}

with S = 1, z along the NV axis, D the zero-field splitting, E the transverse
(strain/electric) splitting and γ_NV = g μ_B / h. The ODMR lines are the transitions from
the level that is mostly |m_s = 0⟩ to the two others.

References
----------
.. [1] M. W. Doherty, N. B. Manson, P. Delaney, F. Jelezko, J. Wrachtrup and
   L. C. L. Hollenberg, "The nitrogen-vacancy colour centre in diamond",
   Phys. Rep. 528, 1 (2013).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from strayline.physics.constants import D_ROOM_HZ, GAMMA_NV_HZ_PER_T

__all__ = ["nv_axis", "to_nv_frame", "transition_frequencies_hz"]

_SQRT1_2 = np.sqrt(0.5)
# Spin-1 matrices in the basis (|+1⟩, |0⟩, |−1⟩).
_SX = _SQRT1_2 * np.array([[0, 1, 0], [1, 0, 1], [0, 1, 0]], dtype=np.complex128)
_SY = _SQRT1_2 * np.array([[0, -1j, 0], [1j, 0, -1j], [0, 1j, 0]], dtype=np.complex128)
_SZ = np.diag([1.0, 0.0, -1.0]).astype(np.complex128)
_SZ2 = _SZ @ _SZ
_SXX_MINUS_SYY = _SX @ _SX - _SY @ _SY
_MS0_INDEX = 1  # position of |m_s = 0⟩ in the basis


def nv_axis(theta_rad: ArrayLike, phi_rad: ArrayLike) -> np.ndarray:
    """Unit vector along the NV axis in the scan frame.

    Parameters
    ----------
    theta_rad : array_like, shape (...)
        Polar angle of the NV axis from the scan-frame z (sample normal, pointing to the
        NV), rad.
    phi_rad : array_like, shape (...)
        Azimuth of the NV axis from the scan-frame x (fast axis), rad.

    Returns
    -------
    ndarray, shape (..., 3)
        u = (sin θ cos φ, sin θ sin φ, cos θ).
    """
    theta, phi = np.broadcast_arrays(
        np.asarray(theta_rad, dtype=np.float64), np.asarray(phi_rad, dtype=np.float64)
    )
    sin_t = np.sin(theta)
    return np.stack([sin_t * np.cos(phi), sin_t * np.sin(phi), np.cos(theta)], axis=-1)


def to_nv_frame(field_t: ArrayLike, theta_rad: ArrayLike, phi_rad: ArrayLike) -> np.ndarray:
    """Components of a scan-frame vector in the NV frame.

    Parameters
    ----------
    field_t : array_like, shape (..., 3)
        Field (Bx, By, Bz) in the scan frame, T.
    theta_rad, phi_rad : array_like, shape broadcastable to (...)
        NV axis orientation as in :func:`nv_axis`, rad.

    Returns
    -------
    ndarray, shape (..., 3)
        (B·x', B·y', B·z'), T.

    Notes
    -----
    The NV frame is the spherical basis at (θ, φ): z' = u (the NV axis),
    x' = ê_θ = (cos θ cos φ, cos θ sin φ, −sin θ), y' = ê_φ = (−sin φ, cos φ, 0). So x'
    lies in the plane spanned by the NV axis and the scan z, and for θ = 0 the frame is
    the scan frame turned by φ about z. It is the rotation R_z(φ) R_y(θ) applied to the
    scan axes. With E = 0 only |B⊥| matters, so the choice of x' changes no transition
    frequency; with E ≠ 0, x' is taken as the strain axis.
    """
    b = np.asarray(field_t, dtype=np.float64)
    theta = np.asarray(theta_rad, dtype=np.float64)[..., np.newaxis]
    phi = np.asarray(phi_rad, dtype=np.float64)[..., np.newaxis]
    sin_t, cos_t = np.sin(theta), np.cos(theta)
    sin_p, cos_p = np.sin(phi), np.cos(phi)
    bx, by, bz = b[..., 0:1], b[..., 1:2], b[..., 2:3]
    b_x1 = cos_t * cos_p * bx + cos_t * sin_p * by - sin_t * bz
    b_y1 = -sin_p * bx + cos_p * by
    b_z1 = sin_t * cos_p * bx + sin_t * sin_p * by + cos_t * bz
    return np.concatenate(np.broadcast_arrays(b_x1, b_y1, b_z1), axis=-1)


def transition_frequencies_hz(
    field_nv_t: ArrayLike,
    zfs_hz: ArrayLike = D_ROOM_HZ,
    strain_hz: ArrayLike = 0.0,
    gamma_hz_per_t: float = GAMMA_NV_HZ_PER_T,
) -> np.ndarray:
    """The two ODMR transition frequencies from the exact 3×3 spin Hamiltonian.

    Parameters
    ----------
    field_nv_t : array_like, shape (..., 3)
        Field in the NV frame (B·x', B·y', B·z'), T (see :func:`to_nv_frame`).
    zfs_hz : array_like, shape broadcastable to (...)
        Zero-field splitting D, Hz.
    strain_hz : array_like, shape broadcastable to (...)
        Transverse splitting E, Hz (the E(Sx² − Sy²) term, x' the strain axis).
    gamma_hz_per_t : float
        Gyromagnetic ratio, Hz/T.

    Returns
    -------
    ndarray, shape (..., 2)
        (f_lo, f_hi) = (E_a − E_0, E_b − E_0), Hz, with E_0 the level of largest overlap
        with |m_s = 0⟩ and E_a ≤ E_b the other two. Above the ground-state level
        anticrossing (≈ 102.4 mT along the axis) f_lo turns negative: the line is then
        observed at |f_lo|, and near the anticrossing the m_s = 0 label itself fades.

    Notes
    -----
    H/h = D S_z² + E (S_x² − S_y²) + γ B·S (Doherty et al. [1]_, ground-state
    Hamiltonian), built for every field at once and diagonalised with
    :func:`numpy.linalg.eigh`. Before solving, H is divided by D (entries of order 1)
    and the eigenvalues are scaled back.

    References
    ----------
    .. [1] M. W. Doherty et al., Phys. Rep. 528, 1 (2013).
    """
    b = np.asarray(field_nv_t, dtype=np.float64)
    d = np.asarray(zfs_hz, dtype=np.float64)
    e = np.asarray(strain_hz, dtype=np.float64)
    lead = np.broadcast_shapes(b.shape[:-1], d.shape, e.shape)
    b = np.broadcast_to(b, (*lead, 3))
    d = np.broadcast_to(d, lead)
    e = np.broadcast_to(e, lead)
    # Scale: work in units of D so that the matrix entries are O(1).
    scale = np.where(d != 0.0, np.abs(d), 1.0)
    gb = (gamma_hz_per_t / scale)[..., np.newaxis] * b
    h = (
        (d / scale)[..., np.newaxis, np.newaxis] * _SZ2
        + (e / scale)[..., np.newaxis, np.newaxis] * _SXX_MINUS_SYY
        + gb[..., 0, np.newaxis, np.newaxis] * _SX
        + gb[..., 1, np.newaxis, np.newaxis] * _SY
        + gb[..., 2, np.newaxis, np.newaxis] * _SZ
    )
    energies, vectors = np.linalg.eigh(h)  # ascending energies, shape (..., 3)
    overlap0 = np.abs(vectors[..., _MS0_INDEX, :]) ** 2
    i0 = np.argmax(overlap0, axis=-1)
    e0 = np.take_along_axis(energies, i0[..., np.newaxis], axis=-1)
    # The two other levels, still in ascending order.
    others = np.ones(energies.shape, dtype=bool)
    np.put_along_axis(others, i0[..., np.newaxis], False, axis=-1)
    pair = energies[others].reshape(*lead, 2)
    return (pair - e0) * scale[..., np.newaxis]
