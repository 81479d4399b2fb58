"""Tests of strayline.physics.sheet_moment: m_z from B_NV with its uncertainty map and
round trip, against the demo's scenes and repeated noise."""

from __future__ import annotations

import math

import numpy as np
import pytest

import demo_stream as ds
from strayline.physics import nv_axis, stray_field_t, wavevectors
from strayline.physics.sheet_moment import (
    border_background,
    hann_lowpass_a,
    projection_from_sheet_moment_t,
    reconstruct_sheet_moment,
    sheet_moment_from_projection_a,
)

THETA = math.acos(1 / math.sqrt(3))  # (100) tip, PHYSICS.md §6
PHI = math.pi / 4
PITCH_M = 30e-9
D_M = 60e-9
FINE = 2  # the truth is sampled 2x finer than the scan


def _scene_maps(scene: ds.Scene, n: int) -> tuple[np.ndarray, np.ndarray]:
    """B_NV (n, n) at D_M above ``scene`` and the truth after the Hann window, (n, n).

    Both from the sheet sampled FINE times finer over the scan plus a margin of 10 d
    (zero-padded beyond), so that the truth is the filtered moment itself, not that of a
    map cut at the scan's border (Beardsley 1989 forward model)."""
    x = ds.scan_axis_m(n, PITCH_M)
    nf, extra = n * FINE, int(10 * D_M / (PITCH_M / FINE))
    fine = PITCH_M / FINE
    axis = x[0] + fine * np.arange(-extra, nf + extra)
    m = scene.sheet_moment_a(axis, axis)
    b = stray_field_t(m, pixel_m=fine, standoff_m=D_M)
    take = (slice(extra, extra + nf, FINE),) * 2
    b_nv = np.tensordot(nv_axis(THETA, PHI), b[(slice(None), *take)], axes=(0, 0))
    truth = hann_lowpass_a(m, pixel_m=fine, k_cut_rad_per_m=math.pi / D_M)[take]
    return b_nv, truth


def test_reconstruction_matches_the_filtered_truth_within_its_sigma() -> None:
    """A demo dot of 0.3 mA, 400 nm in radius, enclosed by a 3.8 µm scan with a 3 mT bias
    and 10–30 µT noise: m_z matches the truth after the same Hann window (Broadway et al.,
    Phys. Rev. Applied 14, 024076 (2020)) to within its propagated σ, rms z ≤ 1.2 over
    four noise seeds (its mean, which no field map fixes, removed)."""
    scene = ds.dot_array(pitch_m=20e-6, radius_m=400e-9, sheet_moment_a=0.3e-3)
    b_nv, truth = _scene_maps(scene, 128)
    z2 = []
    for seed in range(4):
        rng = np.random.default_rng(seed)
        sigma = rng.uniform(10e-6, 30e-6, b_nv.shape)
        data = b_nv + 3e-3 + rng.normal(size=b_nv.shape) * sigma
        rec = reconstruct_sheet_moment(
            data, sigma, nv_theta_rad=THETA, nv_phi_rad=PHI, pixel_m=PITCH_M, standoff_m=D_M
        )
        diff = rec.m_z_a - truth
        z2.append(((diff - diff.mean()) / rec.sigma_a) ** 2)
    assert float(np.sqrt(np.mean(z2))) <= 1.2
    assert float(truth.max()) > 100 * float(np.median(rec.sigma_a))  # a real signal


def test_sigma_map_matches_the_scatter_over_repeated_noise() -> None:
    """The noise part of the σ map equals the scatter of m_z over 60 noise draws at each
    pixel (median ratio within 8 %, what 60 draws allow, common practice)."""
    n = 32
    rng = np.random.default_rng(4)
    sigma = rng.uniform(5e-6, 40e-6, (n, n))
    draws = [
        sheet_moment_from_projection_a(
            rng.normal(size=(n, n)) * sigma,
            nv_theta_rad=THETA,
            nv_phi_rad=PHI,
            pixel_m=PITCH_M,
            standoff_m=D_M,
        )
        for _ in range(60)
    ]
    rec = reconstruct_sheet_moment(
        np.zeros((n, n)),
        sigma,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        pixel_m=PITCH_M,
        standoff_m=D_M,
    )
    ratio = np.std(draws, axis=0) / rec.sigma_noise_a
    assert float(np.median(ratio)) == pytest.approx(1.0, abs=0.08)


def test_standoff_sigma_is_the_half_difference_at_d_plus_and_minus_sigma() -> None:
    """The stand-off's part of the σ is |m_z(d + σ_d) − m_z(d − σ_d)|/2 at the window of d."""
    b_nv, _ = _scene_maps(ds.dot_array(pitch_m=20e-6, radius_m=300e-9), 48)
    sigma = np.full(b_nv.shape, 20e-6)
    rec = reconstruct_sheet_moment(
        b_nv,
        sigma,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        pixel_m=PITCH_M,
        standoff_m=D_M,
        standoff_sigma_m=2e-9,
    )
    k_cut = math.pi / D_M
    plus, minus = (
        sheet_moment_from_projection_a(
            b_nv,
            nv_theta_rad=THETA,
            nv_phi_rad=PHI,
            pixel_m=PITCH_M,
            standoff_m=D_M + step,
            k_cut_rad_per_m=k_cut,
        )
        for step in (2e-9, -2e-9)
    )
    np.testing.assert_allclose(rec.sigma_standoff_a, np.abs(plus - minus) / 2, atol=1e-12)
    np.testing.assert_allclose(rec.sigma_a, np.hypot(rec.sigma_noise_a, rec.sigma_standoff_a))


def test_a_uniform_bias_changes_nothing() -> None:
    """Adding a uniform field (a bias) to the map leaves m_z unchanged: the median of the
    border pixels takes it (common practice)."""
    b_nv, _ = _scene_maps(ds.dot_array(pitch_m=20e-6, radius_m=300e-9), 48)
    args = {"nv_theta_rad": THETA, "nv_phi_rad": PHI, "pixel_m": PITCH_M, "standoff_m": D_M}
    np.testing.assert_allclose(
        sheet_moment_from_projection_a(b_nv + 5e-3, **args),
        sheet_moment_from_projection_a(b_nv, **args),
        atol=1e-12,
    )
    assert border_background(b_nv + 5e-3)[0] == pytest.approx(
        5e-3 + border_background(b_nv)[0], abs=1e-15
    )


def test_round_trip_of_a_smooth_sheet_leaves_only_the_noise() -> None:
    """For a sheet whose detail lies well below the cut-off, the field of the reconstructed
    m_z gives the map back: the residual is the noise (rms z ≈ 1 minus the part of the
    noise the window passes), against ≫ 1 for a sharp texture whose detail the window
    drops."""
    n = 64
    x = ds.scan_axis_m(n, PITCH_M)
    gx, gy = np.meshgrid(x, x)
    smooth = 0.2e-3 * np.exp(-(gx**2 + gy**2) / (2 * (300e-9) ** 2))
    b_nv = projection_from_sheet_moment_t(
        smooth, nv_theta_rad=THETA, nv_phi_rad=PHI, pixel_m=PITCH_M, standoff_m=D_M
    )
    rng = np.random.default_rng(0)
    sigma = np.full(b_nv.shape, 10e-6)
    rec = reconstruct_sheet_moment(
        b_nv + rng.normal(size=b_nv.shape) * sigma,
        sigma,
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        pixel_m=PITCH_M,
        standoff_m=D_M,
    )
    assert 0.7 < rec.residual_rms_z < 1.1
    sharp, _ = _scene_maps(ds.labyrinth(), 48)
    rough = reconstruct_sheet_moment(
        sharp,
        np.full(sharp.shape, 10e-6),
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        pixel_m=PITCH_M,
        standoff_m=D_M,
    )
    assert rough.residual_rms_z > 5


def test_an_in_plane_texture_is_read_as_the_out_of_plane_sheet_with_its_field() -> None:
    """The documented limit (Beardsley, IEEE Trans. Magn. 25, 671 (1989)): a sheet of
    in-plane moment m_x makes exactly the field of the out-of-plane sheet
    m_z(k) = −i k_x m_x(k)/k, so from its field the reconstruction returns a non-zero m_z
    though the sheet has none."""
    n = 96
    x = ds.scan_axis_m(n, PITCH_M)
    gx, gy = np.meshgrid(x, x)
    m_x = 0.3e-3 * np.exp(-(gx**2 + gy**2) / (2 * (250e-9) ** 2))
    b = stray_field_t(np.zeros_like(m_x), m_x_a=m_x, pixel_m=PITCH_M, standoff_m=D_M, pad=0)
    kx, _, k = wavevectors((n, n), PITCH_M)
    m_x_k = np.fft.fft2(m_x)
    equivalent = np.fft.ifft2(
        np.divide(-1j * kx * m_x_k, k, out=np.zeros_like(m_x_k), where=k > 0)
    ).real
    b_eq = stray_field_t(equivalent, pixel_m=PITCH_M, standoff_m=D_M, pad=0)
    np.testing.assert_allclose(b_eq, b, atol=1e-9 * np.abs(b).max())
    b_nv = np.tensordot(nv_axis(THETA, PHI), b, axes=(0, 0))
    from_in_plane = sheet_moment_from_projection_a(
        b_nv, nv_theta_rad=THETA, nv_phi_rad=PHI, pixel_m=PITCH_M, standoff_m=D_M
    )
    assert np.abs(from_in_plane).max() > 0.1e-3


def test_in_plane_nv_axis_and_bad_sigma_are_refused() -> None:
    """An NV axis in the sample plane, or a negative σ, raises ValueError saying so."""
    args = {"pixel_m": PITCH_M, "standoff_m": D_M}
    with pytest.raises(ValueError, match="out of the sample plane"):
        reconstruct_sheet_moment(
            np.zeros((8, 8)), np.ones((8, 8)), nv_theta_rad=math.pi / 2, nv_phi_rad=0.0, **args
        )
    with pytest.raises(ValueError, match="sigma_nv_t must be ≥ 0 everywhere"):
        reconstruct_sheet_moment(
            np.zeros((8, 8)), -np.ones((8, 8)), nv_theta_rad=THETA, nv_phi_rad=PHI, **args
        )
