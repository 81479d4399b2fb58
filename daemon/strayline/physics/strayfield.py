"""Stray field of magnetic thin films, in Fourier space, and analytic reference fields.

Conventions: scan frame x (fast axis, array axis 1), y (slow axis, array axis 0), z from
the sample toward the NV; the film lies at z = 0 (its top surface, for a finite
thickness) and the NV at height d = `standoff_m`. Maps are indexed ``[iy, ix]``. A film
is described by its sheet moment density m = M t (magnetisation times thickness), in A
(1 mA = 107.8 μ_B/nm²). Fourier transform F(k) = ∫ f(r) e^{−i k·r} d²r, evaluated with
:func:`numpy.fft.fft2` on k = 2π·fftfreq(N, pixel).

Forward model (Beardsley [1]_; Lima & Weiss [2]_, Eq. (4)–(6) in their notation [mem]):

.. math::

    B_z(\\mathbf{k}) = \\frac{\\mu_0}{2} e^{-kd}
        \\bigl[k\\, m_z(\\mathbf{k}) - i (k_x m_x(\\mathbf{k}) + k_y m_y(\\mathbf{k}))\\bigr],
    \\qquad B_{x,y}(\\mathbf{k}) = -i \\frac{k_{x,y}}{k} B_z(\\mathbf{k})

(from B = −μ0∇φ with the scalar potential of a dipole sheet, whose 2-D transform is
e^{−kz}/(2k) times the dipole operator). A uniform out-of-plane film makes no field: the
k = 0 term is lost. For a film of thickness t with the moment spread evenly below its top
surface, e^{−kd} becomes e^{−kd}(1 − e^{−kt})/(kt).

Reconstruction from one projection B_NV = u·B (Lima & Weiss [2]_; pathways compared by
Broadway et al. [3]_):

.. math:: B_{NV}(\\mathbf{k}) = \\bigl[u_z - i (u_x k_x + u_y k_y)/k\\bigr] B_z(\\mathbf{k}),

solved for B_z(k), then B_x, B_y as above. Out-of-plane sheet moment from B_z:
m_z(k) = 2 e^{kd} B_z(k) / (μ0 k), low-passed because e^{kd} amplifies noise.

References
----------
.. [1] I. A. Beardsley, "Reconstruction of the magnetization in a thin film by a
   combination of Lorentz microscopy and external field measurements", IEEE Trans.
   Magn. 25, 671 (1989).
.. [2] E. A. Lima and B. P. Weiss, "Obtaining vector magnetic field maps from
   single-component measurements of geological samples", J. Geophys. Res. 114, B06102
   (2009).
.. [3] D. A. Broadway, S. E. Lillie, S. C. Scholten, D. Rohner, N. Dontschuk,
   P. Maletinsky, J.-P. Tetienne and L. C. L. Hollenberg, "Improved current density and
   magnetization reconstruction through vector magnetic field measurements",
   Phys. Rev. Applied 14, 024076 (2020).
.. [4] T. Hingant, J.-P. Tetienne, L. J. Martínez, K. Garcia, D. Ravelosona, J.-F. Roch
   and V. Jacques, "Measuring the magnetic moment density in patterned ultrathin
   ferromagnets with submicrometer resolution", Phys. Rev. Applied 4, 014003 (2015).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from strayline.physics._fourier import (
    crop,
    pad_amounts,
    pixel_pair,
    positive_finite,
    require_map,
    zero_pad,
)
from strayline.physics.constants import MU0
from strayline.physics.hamiltonian import nv_axis

__all__ = [
    "bz_from_projection",
    "dipole_field_t",
    "film_edge_field_t",
    "line_current_field_t",
    "project_on_axis",
    "sheet_moment_from_bz_a",
    "stray_field_t",
    "vector_from_projection",
    "wavevectors",
]

#: Smallest |cos θ| for which one projection determines Bz (|denominator| ≥ |u_z|).
_MIN_AXIS_Z = 1e-3


def wavevectors(
    shape: tuple[int, int], pixel_m: float | tuple[float, float]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Angular wavevectors of a map's discrete Fourier transform.

    Parameters
    ----------
    shape : (ny, nx)
        Map shape, array axes (y, x).
    pixel_m : float or (pixel_y_m, pixel_x_m)
        Pixel pitch, m; a tuple follows the array axis order (y first).

    Returns
    -------
    kx, ky, k : ndarray, shape (ny, nx)
        k_x = 2π·fftfreq(nx, pixel_x), k_y = 2π·fftfreq(ny, pixel_y), k = |k|, rad/m,
        in numpy's FFT order (zero frequency at [0, 0]).
    """
    pixel_y_m, pixel_x_m = pixel_pair(pixel_m)
    ny, nx = (int(n) for n in shape)
    ky1 = 2.0 * np.pi * np.fft.fftfreq(ny, pixel_y_m)
    kx1 = 2.0 * np.pi * np.fft.fftfreq(nx, pixel_x_m)
    ky, kx = np.meshgrid(ky1, kx1, indexing="ij")
    return kx, ky, np.hypot(kx, ky)


def _layer_transfer(k: np.ndarray, standoff_m: float, thickness_m: float | None) -> np.ndarray:
    """e^{−kd}, or its average over a thickness t below the top surface."""
    transfer = np.exp(-k * standoff_m)
    if thickness_m is None:
        return transfer
    kt = k * thickness_m
    spread = np.ones_like(kt)
    nonzero = kt > 0.0
    spread[nonzero] = -np.expm1(-kt[nonzero]) / kt[nonzero]  # (1 − e^{−kt})/(kt)
    return transfer * spread


def stray_field_t(
    m_z_a: ArrayLike,
    *,
    pixel_m: float | tuple[float, float],
    standoff_m: float,
    m_x_a: ArrayLike | None = None,
    m_y_a: ArrayLike | None = None,
    thickness_m: float | None = None,
    pad: int | None = None,
) -> np.ndarray:
    """Field (Bx, By, Bz) at height `standoff_m` above a magnetic sheet.

    Parameters
    ----------
    m_z_a : array_like, shape (ny, nx)
        Out-of-plane sheet moment density m_z = M_z t, A, sampled at pixel centres.
    pixel_m : float or (pixel_y_m, pixel_x_m)
        Pixel pitch, m.
    standoff_m : float
        Height d of the evaluation plane above the sheet (above the top surface when
        `thickness_m` is given), m.
    m_x_a, m_y_a : array_like, shape (ny, nx), optional
        In-plane sheet moment densities, A.
    thickness_m : float, optional
        Film thickness t, m; the moment is spread evenly over it. None: an infinitely
        thin sheet.
    pad : int, optional
        Zero padding added on every side before transforming, pixels. None pads each
        axis by its own length on both sides (a window three times as large): the
        periodic images of a pattern with a net moment then add ≲ 0.5 % of the peak
        field (they fall off as 1/r³); with half that padding it was 1.4 % for a patch
        filling a quarter of the map. 0 treats the map as periodic.

    Returns
    -------
    ndarray, shape (3, ny, nx)
        (Bx, By, Bz), T, on the input grid.

    Notes
    -----
    Bz(k) = (μ0/2) e^{−kd} [k m_z − i (k_x m_x + k_y m_y)], B_{x,y}(k) = −i (k_{x,y}/k) Bz(k)
    (Beardsley 1989; Lima & Weiss 2009; see the module docstring). Accurate where d is
    a few pixels or more; the mean of m_z makes no field.
    """
    m_z = require_map(m_z_a, "m_z_a")
    pixel = pixel_pair(pixel_m)
    d = positive_finite(standoff_m, "standoff_m", allow_zero=True)
    t = None if thickness_m is None else positive_finite(thickness_m, "thickness_m")
    pads = pad_amounts(m_z.shape, pad)
    padded = zero_pad(m_z, pads)
    kx, ky, k = wavevectors(padded.shape, pixel)
    source = k * np.fft.fft2(padded)
    if m_x_a is not None:
        source = source - 1j * kx * np.fft.fft2(
            zero_pad(require_map(m_x_a, "m_x_a", m_z.shape), pads)
        )
    if m_y_a is not None:
        source = source - 1j * ky * np.fft.fft2(
            zero_pad(require_map(m_y_a, "m_y_a", m_z.shape), pads)
        )
    bz_k = 0.5 * MU0 * _layer_transfer(k, d, t) * source
    return crop(_vector_from_bz_k(bz_k, kx, ky, k), pads)


def _vector_from_bz_k(
    bz_k: np.ndarray, kx: np.ndarray, ky: np.ndarray, k: np.ndarray
) -> np.ndarray:
    """(Bx, By, Bz) maps from Bz(k): B_{x,y}(k) = −i (k_{x,y}/k) Bz(k), 0 at k = 0."""
    inv_k = np.divide(1.0, k, out=np.zeros_like(k), where=k > 0.0)
    stacked = np.stack([-1j * kx * inv_k * bz_k, -1j * ky * inv_k * bz_k, bz_k])
    return np.fft.ifft2(stacked, axes=(-2, -1)).real


def project_on_axis(b_xyz_t: ArrayLike, theta_rad: float, phi_rad: float) -> np.ndarray:
    """Projection of a field on the NV axis, B_NV = u·B.

    Parameters
    ----------
    b_xyz_t : array_like, shape (3, ...)
        (Bx, By, Bz) in the scan frame, T (as returned by :func:`stray_field_t`).
    theta_rad, phi_rad : float
        NV axis orientation (see :func:`strayline.physics.hamiltonian.nv_axis`), rad.

    Returns
    -------
    ndarray, shape (...)
        u·B, T.
    """
    b = np.asarray(b_xyz_t, dtype=np.float64)
    u = nv_axis(theta_rad, phi_rad)
    return u[0] * b[0] + u[1] * b[1] + u[2] * b[2]


def _bz_k_from_projection(
    b_nv_t: ArrayLike,
    theta_rad: float,
    phi_rad: float,
    pixel_m: float | tuple[float, float],
    pad: int | None,
) -> tuple[np.ndarray, tuple[np.ndarray, np.ndarray, np.ndarray], tuple[int, int]]:
    """Bz(k) of the padded map, its wavevectors and the padding used."""
    b_nv = require_map(b_nv_t, "b_nv_t")
    ux, uy, uz = nv_axis(theta_rad, phi_rad)
    if abs(uz) < _MIN_AXIS_Z:
        raise ValueError(
            "theta_rad must leave the NV axis out of the sample plane (|cos θ| ≥ "
            f"{_MIN_AXIS_Z}) for Bz to follow from one projection; found θ = {theta_rad!r}"
        )
    pixel = pixel_pair(pixel_m)
    pads = pad_amounts(b_nv.shape, pad)
    # The uniform part cannot be told apart between components: drop it, then pad.
    padded = zero_pad(b_nv - np.mean(b_nv), pads)
    kx, ky, k = wavevectors(padded.shape, pixel)
    inv_k = np.divide(1.0, k, out=np.zeros_like(k), where=k > 0.0)
    transfer = uz - 1j * (ux * kx + uy * ky) * inv_k  # |transfer| ≥ |u_z|
    return np.fft.fft2(padded) / transfer, (kx, ky, k), pads


def bz_from_projection(
    b_nv_t: ArrayLike,
    theta_rad: float,
    phi_rad: float,
    pixel_m: float | tuple[float, float],
    pad: int | None = None,
) -> np.ndarray:
    """Out-of-plane field Bz from a map of its projection on the NV axis.

    Parameters
    ----------
    b_nv_t : array_like, shape (ny, nx)
        Measured B_NV = u·B, T.
    theta_rad, phi_rad : float
        NV axis orientation, rad; θ must not be 90° (axis in the sample plane).
    pixel_m : float or (pixel_y_m, pixel_x_m)
        Pixel pitch, m.
    pad : int, optional
        Zero padding on every side, pixels (None: each axis's own length, see
        :func:`stray_field_t`).

    Returns
    -------
    ndarray, shape (ny, nx)
        Bz, T, without its uniform part.

    Raises
    ------
    ValueError
        If the NV axis lies in the sample plane, or the map is not 2-D and finite.

    Notes
    -----
    Bz(k) = B_NV(k) / [u_z − i (u_x k_x + u_y k_y)/k] (Lima & Weiss 2009; module
    docstring). The mean of the map is not recoverable from one projection and is
    removed; add a known uniform bias back afterwards.
    """
    bz_k, _, pads = _bz_k_from_projection(b_nv_t, theta_rad, phi_rad, pixel_m, pad)
    return crop(np.fft.ifft2(bz_k).real, pads)


def vector_from_projection(
    b_nv_t: ArrayLike,
    theta_rad: float,
    phi_rad: float,
    pixel_m: float | tuple[float, float],
    pad: int | None = None,
) -> np.ndarray:
    """Full field (Bx, By, Bz) from a map of its projection on the NV axis.

    Parameters
    ----------
    b_nv_t, theta_rad, phi_rad, pixel_m, pad
        As in :func:`bz_from_projection`.

    Returns
    -------
    ndarray, shape (3, ny, nx)
        (Bx, By, Bz), T, without their uniform parts.

    Notes
    -----
    Bz(k) as in :func:`bz_from_projection`, then B_{x,y}(k) = −i (k_{x,y}/k) Bz(k)
    (Lima & Weiss 2009).
    """
    bz_k, (kx, ky, k), pads = _bz_k_from_projection(b_nv_t, theta_rad, phi_rad, pixel_m, pad)
    return crop(_vector_from_bz_k(bz_k, kx, ky, k), pads)


def sheet_moment_from_bz_a(
    bz_t: ArrayLike,
    *,
    pixel_m: float | tuple[float, float],
    standoff_m: float,
    k_cut_rad_per_m: float | None = None,
    pad: int | None = None,
) -> np.ndarray:
    """Out-of-plane sheet moment density m_z from a Bz map (out-of-plane assumption).

    Parameters
    ----------
    bz_t : array_like, shape (ny, nx)
        Bz at height `standoff_m`, T.
    pixel_m : float or (pixel_y_m, pixel_x_m)
        Pixel pitch, m.
    standoff_m : float
        Height d of the map above the sheet, m.
    k_cut_rad_per_m : float, optional
        Cut-off of the Hann low-pass window W(k) = ½(1 + cos(πk/k_c)) for k < k_c, 0 above;
        None: k_c = π/d.
    pad : int, optional
        Zero padding on every side, pixels (None: each axis's own length).

    Returns
    -------
    ndarray, shape (ny, nx)
        m_z, A, without its mean (a uniform m_z makes no field).

    Notes
    -----
    m_z(k) = 2 e^{kd} W(k) Bz(k) / (μ0 k), the inverse of the forward model (Beardsley
    1989; Broadway et al. 2020 for Bz as the preferred input). The window trades
    resolution (≈ 2π/k_c) for noise.
    """
    bz = require_map(bz_t, "bz_t")
    pixel = pixel_pair(pixel_m)
    d = positive_finite(standoff_m, "standoff_m", allow_zero=True)
    k_cut = np.pi / d if k_cut_rad_per_m is None else k_cut_rad_per_m
    k_cut = positive_finite(k_cut, "k_cut_rad_per_m")
    pads = pad_amounts(bz.shape, pad)
    padded = zero_pad(bz - np.mean(bz), pads)
    _, _, k = wavevectors(padded.shape, pixel)
    inside = (k > 0.0) & (k < k_cut)
    gain = np.zeros_like(k)
    k_in = k[inside]
    window = 0.5 * (1.0 + np.cos(np.pi * k_in / k_cut))
    gain[inside] = 2.0 * np.exp(k_in * d) * window / (MU0 * k_in)
    return crop(np.fft.ifft2(gain * np.fft.fft2(padded)).real, pads)


def line_current_field_t(
    x_m: ArrayLike, z_m: ArrayLike, current_a: float, x0_m: float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """Field of an infinite straight wire along +y through (x0, 0, 0).

    Parameters
    ----------
    x_m, z_m : array_like, broadcastable shapes (...)
        Evaluation points, m.
    current_a : float
        Current, A (positive along +y).
    x0_m : float
        Wire position along x, m.

    Returns
    -------
    bx, bz : ndarray, shape (...)
        Field components, T (By = 0). Infinite on the wire.

    Notes
    -----
    Biot–Savart: |B| = μ0 I / (2π r), B = (μ0 I / 2π) ŷ × r / r², so
    Bx = (μ0 I/2π) z / r², Bz = −(μ0 I/2π)(x − x0) / r².
    """
    x = np.asarray(x_m, dtype=np.float64) - x0_m
    z = np.asarray(z_m, dtype=np.float64)
    r2 = x * x + z * z
    scale = MU0 * current_a / (2.0 * np.pi)
    with np.errstate(divide="ignore", invalid="ignore"):
        return scale * z / r2, -scale * x / r2


def film_edge_field_t(
    x_m: ArrayLike,
    standoff_m: float,
    sheet_moment_a: float,
    thickness_m: float | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Field above the straight edge of a +z magnetised film occupying x < 0.

    Parameters
    ----------
    x_m : array_like, shape (...)
        Position across the edge (edge at x = 0), m.
    standoff_m : float
        Height d above the film's top surface, m.
    sheet_moment_a : float
        I_s = M_s t, A.
    thickness_m : float, optional
        Film thickness t, m; None for the thin-film limit t ≪ d.

    Returns
    -------
    bx, bz : ndarray, shape (...)
        Field components, T.

    Notes
    -----
    Thin film: the edge acts as a line current I_s along +y (bound current M × n̂),
    Bx = (μ0 I_s/2π) d/(x² + d²), Bz = −(μ0 I_s/2π) x/(x² + d²). Finite thickness
    (M_s = I_s/t): Bx = (μ0 M_s/4π) ln[(x² + (d+t)²)/(x² + d²)],
    Bz = −(μ0 M_s/2π)[atan2(d+t, x) − atan2(d, x)]. Geometry of Hingant et al. [4]_,
    who calibrate I_s and d on such an edge.

    References
    ----------
    .. [4] T. Hingant et al., Phys. Rev. Applied 4, 014003 (2015).
    """
    x = np.asarray(x_m, dtype=np.float64)
    d = positive_finite(standoff_m, "standoff_m")
    if thickness_m is None:
        return line_current_field_t(x, d, sheet_moment_a)
    t = positive_finite(thickness_m, "thickness_m")
    m_s = sheet_moment_a / t
    bx = MU0 * m_s / (4.0 * np.pi) * np.log((x * x + (d + t) ** 2) / (x * x + d * d))
    bz = -MU0 * m_s / (2.0 * np.pi) * (np.arctan2(d + t, x) - np.arctan2(d, x))
    return bx, bz


def dipole_field_t(position_m: ArrayLike, moment_a_m2: ArrayLike) -> np.ndarray:
    """Field of a point dipole at the origin.

    Parameters
    ----------
    position_m : array_like, shape (..., 3)
        Evaluation points relative to the dipole, m.
    moment_a_m2 : array_like, shape (3,) or (..., 3)
        Dipole moment, A m².

    Returns
    -------
    ndarray, shape (..., 3)
        B = (μ0/4π)(3 r̂ (m·r̂) − m)/r³, T (infinite at r = 0).
    """
    r = np.asarray(position_m, dtype=np.float64)
    m = np.asarray(moment_a_m2, dtype=np.float64)
    dist = np.linalg.norm(r, axis=-1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        r_hat = r / dist
        m_dot_r = np.sum(m * r_hat, axis=-1, keepdims=True)
        return MU0 / (4.0 * np.pi) * (3.0 * r_hat * m_dot_r - m) / dist**3
