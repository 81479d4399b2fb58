"""Out-of-plane sheet moment from a map of B_NV, with an uncertainty map and a round-trip
check.

One linear filter takes the measured projection to the sheet moment (out-of-plane
assumption), in Fourier space (conventions of :mod:`strayline.physics.strayfield`):

.. math::

    m_z(\\mathbf{k}) = H(\\mathbf{k})\\, B_{NV}(\\mathbf{k}), \\qquad
    H(\\mathbf{k}) = \\frac{2\\, e^{kd}\\, W(k)}{\\mu_0\\, k\\,
        [u_z - i (u_x k_x + u_y k_y)/k]}, \\qquad
    W(k) = \\tfrac12 \\bigl(1 + \\cos(\\pi k / k_c)\\bigr)\\ (k < k_c),\\ 0\\ \\text{above},

the inverse of the forward model B_z = (μ0/2) e^{−kd} k m_z (Beardsley [1]_) and of the
projection B_NV = [u_z − i(u·k)/k] B_z (Lima & Weiss [2]_), low-passed by a Hann window
because e^{kd} amplifies noise; B_z is the input of choice for magnetization (Broadway et
al. [3]_), here reached from B_NV in the same step. The cut-off follows from the
stand-off, k_c = π/d by default (wavelengths below 2d are dropped; the resolution is
≈ 2π/k_c = 2d) [cp]. H(0) = 0: the mean of m_z is not recoverable.

Uniform background: a uniform field (a bias) is no field of the sample, but one
subtracted over the map alone leaves a step at the map's border once the map is
zero-padded, which the filter turns into a false moment along the border that the 1/k
gain carries inwards. So the background c is taken where the sample's field is weakest,
as the median of the map's outermost pixels, and subtracted before padding [cp]; for an
object the scan encloses with some margin, c is then the bias.

Uncertainty, for pixels with independent errors σ_i (the field σ map): the filter is a
convolution with the real kernel h = F⁻¹[H], so var m_z(r_j) = Σ_i h(r_j − r_i)² σ_i²,
a convolution of the variance map with h² (zero padding keeps it a linear, not a
circular, convolution over the map). The background's own error σ_c (that of a median of
N border pixels, ≈ √(π/2)·σ/√N) enters through the response a = F⁻¹[H · F(1 on the map)]
to a unit offset, |a| σ_c. The stand-off's 1σ σ_d enters through ∂m_z/∂d at a fixed
window, evaluated as the half-difference at d ± σ_d, F⁻¹[H sinh(kσ_d) B_NV]. The three
add in quadrature. The window is held at the nominal d, so that "the truth after the
same filter" (:func:`hann_lowpass_a`) is one fixed target.

Not in the σ map: the field of sources outside the scan (a texture that runs past the
border, the tail of an object too close to it). The scan has no record of it; its error
is largest near the border and at the longest wavelengths, where 1/k amplifies it.

Round trip: the reconstructed m_z, forward-modelled back to B_NV at d, leaves a residual
that holds the noise above k_c and any part of the map the out-of-plane model cannot
make (in-plane magnetization, a wrong d, a wrong NV axis).

In-plane textures: a sheet of in-plane moment makes a field only through its divergence
(its curl-free part), so from one projection (or even the full vector field) of a
single sheet, m_x and m_y are not determined; the reconstruction above holds for an
out-of-plane magnetization, and applied to a Néel texture it returns the out-of-plane
moment that makes the same field, not the texture (Beardsley [1]_; Broadway et al. [3]_).

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
"""

from __future__ import annotations

import math
from dataclasses import dataclass

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
from strayline.physics.strayfield import project_on_axis, stray_field_t, wavevectors

__all__ = [
    "SheetMomentMap",
    "border_background",
    "default_k_cut_rad_per_m",
    "hann_lowpass_a",
    "projection_from_sheet_moment_t",
    "reconstruct_sheet_moment",
    "sheet_moment_from_projection_a",
]

_MIN_AXIS_Z = 1e-3


def default_k_cut_rad_per_m(standoff_m: float) -> float:
    """The Hann window's cut-off for a stand-off d: k_c = π/d, rad/m (module docstring)."""
    return math.pi / positive_finite(standoff_m, "standoff_m")


def _hann(k: np.ndarray, k_cut: float) -> np.ndarray:
    window = np.zeros_like(k)
    inside = k < k_cut
    window[inside] = 0.5 * (1.0 + np.cos(np.pi * k[inside] / k_cut))
    return window


def _moment_transfer(
    shape: tuple[int, int],
    pixel: tuple[float, float],
    standoff_m: float,
    k_cut: float,
    *,
    theta_rad: float,
    phi_rad: float,
) -> tuple[np.ndarray, np.ndarray]:
    """H(k) on a (padded) grid, and k."""
    ux, uy, uz = nv_axis(theta_rad, phi_rad)
    if abs(uz) < _MIN_AXIS_Z:
        raise ValueError(
            "theta_rad must leave the NV axis out of the sample plane (|cos θ| ≥ "
            f"{_MIN_AXIS_Z}) for m_z to follow from one projection; found θ = {theta_rad!r}"
        )
    kx, ky, k = wavevectors(shape, pixel)
    inside = (k > 0.0) & (k < k_cut)
    transfer = np.zeros(k.shape, dtype=np.complex128)
    k_in = k[inside]
    projection = uz - 1j * (ux * kx[inside] + uy * ky[inside]) / k_in
    window = 0.5 * (1.0 + np.cos(np.pi * k_in / k_cut))
    transfer[inside] = 2.0 * np.exp(k_in * standoff_m) * window / (MU0 * k_in * projection)
    return transfer, k


def _settle(standoff_m: float, k_cut_rad_per_m: float | None) -> tuple[float, float]:
    d = positive_finite(standoff_m, "standoff_m")
    k_cut = default_k_cut_rad_per_m(d) if k_cut_rad_per_m is None else k_cut_rad_per_m
    return d, positive_finite(k_cut, "k_cut_rad_per_m")


def _ring(values: np.ndarray) -> np.ndarray:
    """The outermost pixels of a map, each once, shape (n_ring,)."""
    if min(values.shape) <= 2:
        return values.ravel()
    return np.concatenate([values[0], values[-1], values[1:-1, 0], values[1:-1, -1]])


def border_background(
    b_nv_t: np.ndarray, measured: np.ndarray | None = None, sigma_nv_t: np.ndarray | None = None
) -> tuple[float, float]:
    """The uniform background of a map and its 1σ: the median of the border pixels.

    Parameters
    ----------
    b_nv_t : ndarray, shape (ny, nx)
        The map, T, finite.
    measured : ndarray of bool, shape (ny, nx), optional
        Measured pixels; the border's measured ones are used when there are any.
    sigma_nv_t : ndarray, shape (ny, nx), optional
        1σ per pixel, T; None gives a σ of 0.

    Returns
    -------
    background_t, sigma_t : float
        Median of the border pixels, and its 1σ for N values with Gaussian errors σ_i,
        √(π/2) / (√N · mean(1/σ_i)), from the asymptotic variance 1/(4 N f(0)²) of a
        median, f the density of the errors at their median (Kendall & Stuart, *The
        Advanced Theory of Statistics* vol. 1, 10.10) [mem].
    """
    ring = _ring(b_nv_t)
    take = np.ones(ring.shape, dtype=bool)
    if measured is not None:
        measured_ring = _ring(np.asarray(measured, dtype=bool))
        if np.any(measured_ring):
            take = measured_ring
    background = float(np.median(ring[take]))
    if sigma_nv_t is None:
        return background, 0.0
    sigma_ring = _ring(sigma_nv_t)[take]
    positive = sigma_ring[sigma_ring > 0]
    if positive.size == 0:
        return background, 0.0
    # 1/(2 f(0) √N) with f(0) the mean density at the median, 1/(√(2π) σ_i) each.
    spread = math.sqrt(math.pi / 2.0) / (math.sqrt(positive.size) * float(np.mean(1.0 / positive)))
    return background, spread


def sheet_moment_from_projection_a(
    b_nv_t: ArrayLike,
    *,
    nv_theta_rad: float,
    nv_phi_rad: float,
    pixel_m: float | tuple[float, float],
    standoff_m: float,
    k_cut_rad_per_m: float | None = None,
    pad: int | None = None,
) -> np.ndarray:
    """Out-of-plane sheet moment m_z from a map of B_NV, in one filter.

    Parameters
    ----------
    b_nv_t : array_like, shape (ny, nx)
        B_NV = u·B at height ``standoff_m``, T, finite everywhere (fill gaps first).
    nv_theta_rad, nv_phi_rad : float
        NV axis, rad; θ must not be 90°.
    pixel_m : float or (pixel_y_m, pixel_x_m)
        Pixel pitch, m.
    standoff_m : float
        Stand-off d, m.
    k_cut_rad_per_m : float, optional
        Cut-off of the Hann window, rad/m; None: π/d.
    pad : int, optional
        Zero padding on every side, pixels (None: each axis's own length).

    Returns
    -------
    ndarray, shape (ny, nx)
        m_z, A, without its mean.

    Notes
    -----
    m_z(k) = H(k) [B_NV − c](k), c the median of the border pixels (module docstring:
    Beardsley 1989, Lima & Weiss 2009, Broadway et al. 2020).
    """
    b = require_map(b_nv_t, "b_nv_t")
    pixel = pixel_pair(pixel_m)
    d, k_cut = _settle(standoff_m, k_cut_rad_per_m)
    pads = pad_amounts(b.shape, pad)
    padded = zero_pad(b - border_background(b)[0], pads)
    transfer, _ = _moment_transfer(
        padded.shape, pixel, d, k_cut, theta_rad=nv_theta_rad, phi_rad=nv_phi_rad
    )
    return crop(np.fft.ifft2(transfer * np.fft.fft2(padded)).real, pads)


def hann_lowpass_a(
    m_z_a: ArrayLike,
    *,
    pixel_m: float | tuple[float, float],
    k_cut_rad_per_m: float,
    pad: int | None = None,
) -> np.ndarray:
    """A sheet moment map after the reconstruction's window: what an exact field map
    would give back.

    Parameters
    ----------
    m_z_a : array_like, shape (ny, nx)
        Sheet moment, A.
    pixel_m : float or (pixel_y_m, pixel_x_m)
        Pixel pitch, m.
    k_cut_rad_per_m : float
        Cut-off of the Hann window, rad/m.
    pad : int, optional
        Zero padding on every side, pixels (None: each axis's own length).

    Returns
    -------
    ndarray, shape (ny, nx)
        F⁻¹[W(k) m_z(k)] without its mean (k = 0 dropped, as the reconstruction drops it).
    """
    m = require_map(m_z_a, "m_z_a")
    pixel = pixel_pair(pixel_m)
    k_cut = positive_finite(k_cut_rad_per_m, "k_cut_rad_per_m")
    pads = pad_amounts(m.shape, pad)
    padded = zero_pad(m, pads)
    _, _, k = wavevectors(padded.shape, pixel)
    window = _hann(k, k_cut)
    window[0, 0] = 0.0
    return crop(np.fft.ifft2(window * np.fft.fft2(padded)).real, pads)


def projection_from_sheet_moment_t(
    m_z_a: ArrayLike,
    *,
    nv_theta_rad: float,
    nv_phi_rad: float,
    pixel_m: float | tuple[float, float],
    standoff_m: float,
    pad: int | None = None,
) -> np.ndarray:
    """B_NV above an out-of-plane sheet moment map (the forward model, projected).

    Returns
    -------
    ndarray, shape (ny, nx)
        u·B at height ``standoff_m``, T (:func:`strayline.physics.strayfield.stray_field_t`,
        then :func:`~strayline.physics.strayfield.project_on_axis`).
    """
    b = stray_field_t(m_z_a, pixel_m=pixel_m, standoff_m=standoff_m, pad=pad)
    return project_on_axis(b, nv_theta_rad, nv_phi_rad)


@dataclass(frozen=True, eq=False)
class SheetMomentMap:
    """A reconstructed sheet moment with its error bars and round-trip check.

    Attributes
    ----------
    m_z_a : ndarray, shape (ny, nx)
        Out-of-plane sheet moment, A, without its mean, Hann-filtered.
    sigma_a : ndarray, shape (ny, nx)
        Its total 1σ, A: noise, background and stand-off in quadrature.
    sigma_noise_a : ndarray, shape (ny, nx)
        Part of the 1σ from the field's σ map (the background's included), A.
    sigma_standoff_a : ndarray, shape (ny, nx)
        Part from the stand-off's 1σ, A (zeros when it is not known).
    k_cut_rad_per_m : float
        Cut-off of the window, rad/m.
    background_t, background_sigma_t : float
        The uniform background subtracted (median of the border pixels) and its 1σ, T.
    residual_nv_t : ndarray, shape (ny, nx)
        B_NV − B_NV(m_z) over the measured pixels (NaN elsewhere), both without their
        means over those pixels, T.
    residual_rms_t : float
        Its rms, T.
    residual_rms_z : float
        rms of the residual in units of the field σ (≈ 1 when the model explains the map
        down to the noise and the noise is mostly above k_c; larger otherwise).
    """

    m_z_a: np.ndarray
    sigma_a: np.ndarray
    sigma_noise_a: np.ndarray
    sigma_standoff_a: np.ndarray
    k_cut_rad_per_m: float
    background_t: float
    background_sigma_t: float
    residual_nv_t: np.ndarray
    residual_rms_t: float
    residual_rms_z: float


def reconstruct_sheet_moment(
    b_nv_t: ArrayLike,
    sigma_nv_t: ArrayLike,
    *,
    nv_theta_rad: float,
    nv_phi_rad: float,
    pixel_m: float | tuple[float, float],
    standoff_m: float,
    standoff_sigma_m: float = 0.0,
    k_cut_rad_per_m: float | None = None,
    measured: ArrayLike | None = None,
    pad: int | None = None,
) -> SheetMomentMap:
    """m_z from B_NV, its uncertainty map, and the round trip back to B_NV.

    Parameters
    ----------
    b_nv_t : array_like, shape (ny, nx)
        B_NV, T, finite everywhere (gaps filled).
    sigma_nv_t : array_like, shape (ny, nx)
        1σ of each pixel's B_NV, T, finite and ≥ 0 everywhere (a filled pixel takes the
        σ of the pixel it copies).
    nv_theta_rad, nv_phi_rad, pixel_m, standoff_m, k_cut_rad_per_m, pad
        As in :func:`sheet_moment_from_projection_a`.
    standoff_sigma_m : float
        1σ of the stand-off, m (0: taken as exact).
    measured : array_like of bool, shape (ny, nx), optional
        Measured pixels (the residual is taken over them); None: all.

    Returns
    -------
    SheetMomentMap

    Notes
    -----
    Module docstring: the variance map is (σ² ∗ h²) + (a σ_c)², the stand-off term
    F⁻¹[H sinh(kσ_d) (B_NV − c)]. Pixels filled from a neighbour are correlated with it;
    treating them as independent understates the σ next to large gaps.
    """
    b = require_map(b_nv_t, "b_nv_t")
    sigma = require_map(sigma_nv_t, "sigma_nv_t", b.shape)
    if np.any(sigma < 0):
        raise ValueError("sigma_nv_t must be ≥ 0 everywhere; found negative values")
    pixel = pixel_pair(pixel_m)
    d, k_cut = _settle(standoff_m, k_cut_rad_per_m)
    sigma_d = positive_finite(standoff_sigma_m, "standoff_sigma_m", allow_zero=True)
    mask = np.ones(b.shape, dtype=bool) if measured is None else np.asarray(measured, bool)
    pads = pad_amounts(b.shape, pad)
    background, background_sigma = border_background(b, mask, sigma)
    padded = zero_pad(b - background, pads)
    transfer, k = _moment_transfer(
        padded.shape, pixel, d, k_cut, theta_rad=nv_theta_rad, phi_rad=nv_phi_rad
    )
    b_k = np.fft.fft2(padded)
    m_z = crop(np.fft.ifft2(transfer * b_k).real, pads)
    kernel = np.fft.ifft2(transfer).real  # h, origin at [0, 0]
    variance = crop(
        np.fft.ifft2(np.fft.fft2(zero_pad(sigma**2, pads)) * np.fft.fft2(kernel**2)).real, pads
    )
    offset_response = crop(
        np.fft.ifft2(transfer * np.fft.fft2(zero_pad(np.ones_like(b), pads))).real, pads
    )
    variance = np.clip(variance, 0.0, None) + (offset_response * background_sigma) ** 2
    sigma_noise = np.sqrt(variance)
    if sigma_d > 0.0:
        sigma_standoff = np.abs(
            crop(np.fft.ifft2(transfer * np.sinh(k * sigma_d) * b_k).real, pads)
        )
    else:
        sigma_standoff = np.zeros_like(m_z)
    forward = projection_from_sheet_moment_t(
        m_z,
        nv_theta_rad=nv_theta_rad,
        nv_phi_rad=nv_phi_rad,
        pixel_m=pixel,
        standoff_m=d,
        pad=pad,
    )
    residual = np.full(b.shape, np.nan)
    if np.any(mask):
        measured_b = b[mask] - np.mean(b[mask])
        residual[mask] = measured_b - (forward[mask] - np.mean(forward[mask]))
        rms_t = float(np.sqrt(np.mean(residual[mask] ** 2)))
        positive = mask & (sigma > 0)
        rms_z = (
            float(np.sqrt(np.mean((residual[positive] / sigma[positive]) ** 2)))
            if np.any(positive)
            else float("nan")
        )
    else:
        rms_t = rms_z = float("nan")
    return SheetMomentMap(
        m_z_a=m_z,
        sigma_a=np.hypot(sigma_noise, sigma_standoff),
        sigma_noise_a=sigma_noise,
        sigma_standoff_a=sigma_standoff,
        k_cut_rad_per_m=k_cut,
        background_t=background,
        background_sigma_t=background_sigma,
        residual_nv_t=residual,
        residual_rms_t=rms_t,
        residual_rms_z=rms_z,
    )
