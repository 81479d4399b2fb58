"""Tests for strayline.physics.strayfield: Fourier forward model, reconstruction, analytic
fields, checked against published check values and against magpylib."""

from __future__ import annotations

import magpylib as magpy
import numpy as np
import pytest
import scipy.constants

from strayline.physics import (
    MU0,
    bz_from_projection,
    dipole_field_t,
    film_edge_field_t,
    line_current_field_t,
    nv_axis,
    project_on_axis,
    sheet_moment_from_bz_a,
    stray_field_t,
    vector_from_projection,
    wavevectors,
)

THETA_100 = np.arccos(1 / np.sqrt(3))  # (100) tip, PHYSICS.md §6
PHI_100 = np.pi / 4
MU_B = scipy.constants.physical_constants["Bohr magneton"][0]  # J/T = A m²


def _grid(ny, nx, pixel_y_m, pixel_x_m):
    """Pixel-centre coordinates (Y, X), shape (ny, nx), centred on 0."""
    y = (np.arange(ny) - ny / 2 + 0.5) * pixel_y_m
    x = (np.arange(nx) - nx / 2 + 0.5) * pixel_x_m
    return np.meshgrid(y, x, indexing="ij")


def _magpylib_map(source, y_map, x_map, z_m):
    """magpylib field (Bx, By, Bz), shape (3, ny, nx), T, on a plane at height z_m."""
    obs = np.stack([x_map, y_map, np.full_like(x_map, z_m)], axis=-1).reshape(-1, 3)
    return source.getB(obs).reshape(*x_map.shape, 3).transpose(2, 0, 1)


def _patch(y_map, x_map, half_y_m, half_x_m):
    return (np.abs(y_map) < half_y_m) & (np.abs(x_map) < half_x_m)


# --- wavevectors -------------------------------------------------------------------------


def test_wavevectors_follow_numpy_fftfreq_and_axis_order():
    """kx, ky are 2π·fftfreq along axes 1 and 0 and a (y, x) pitch pair is honoured (numpy FFT
    convention, PHYSICS.md §4)."""
    kx, ky, k = wavevectors((6, 8), (2e-9, 5e-9))
    assert kx.shape == ky.shape == k.shape == (6, 8)
    np.testing.assert_allclose(kx[0], 2 * np.pi * np.fft.fftfreq(8, 5e-9))
    np.testing.assert_allclose(ky[:, 0], 2 * np.pi * np.fft.fftfreq(6, 2e-9))
    np.testing.assert_allclose(k, np.hypot(kx, ky))


def test_wavevectors_reject_bad_pitch():
    """A non-positive pixel pitch raises ValueError naming the value."""
    with pytest.raises(ValueError, match=r"pixel_m must be finite and > 0; found -1e-09"):
        wavevectors((4, 4), -1e-9)


# --- analytic fields (PHYSICS.md §5) -------------------------------------------------------


def test_film_edge_thin_film_check_values():
    """1 mA at 50 nm: Bx = 4.000 mT, Bz = 0 at x = 0 and Bx = 2.000, Bz = −2.000 mT at x = 50 nm
    (PHYSICS.md §5 [num]; edge geometry of Hingant et al., Phys. Rev. Applied 4, 014003
    (2015))."""
    bx, bz = film_edge_field_t(np.array([0.0, 50e-9]), 50e-9, 1e-3)
    np.testing.assert_allclose(bx * 1e3, [4.000, 2.000], atol=5e-4)
    np.testing.assert_allclose(bz * 1e3, [0.000, -2.000], atol=5e-4)


def test_film_edge_finite_thickness_check_value():
    """M_s = 1 MA/m, t = 10 nm, d = 50 nm gives Bx(0) = 36.5 mT exactly vs 40.0 mT thin-film
    (PHYSICS.md §5 [num])."""
    bx_thick, _ = film_edge_field_t(0.0, 50e-9, 1e6 * 10e-9, thickness_m=10e-9)
    bx_thin, _ = film_edge_field_t(0.0, 50e-9, 1e6 * 10e-9)
    assert float(bx_thick) * 1e3 == pytest.approx(36.5, abs=0.05)
    assert float(bx_thin) * 1e3 == pytest.approx(40.0, abs=0.05)


def test_film_edge_finite_thickness_tends_to_thin_film():
    """As t → 0 at fixed I_s = M_s t the finite-thickness edge field becomes the thin-film one
    (PHYSICS.md §5, both formulas)."""
    x = np.linspace(-200e-9, 200e-9, 41)
    thin = film_edge_field_t(x, 60e-9, 1e-3)
    thick = film_edge_field_t(x, 60e-9, 1e-3, thickness_m=1e-12)
    np.testing.assert_allclose(thick, thin, rtol=1e-4, atol=1e-12)


def test_film_edge_finite_thickness_matches_magpylib():
    """The finite-thickness edge formula equals magpylib's field of a wide 10 nm cuboid (magpylib
    analytic cuboid field as independent reference; PHYSICS.md §5)."""
    t, d, m_s = 10e-9, 50e-9, 1e6
    # A film 2 mm wide and 4 mm long. Its far edges add Bx ≈ μ0 M_s d t/(2π L²) ≈ 2.5e-8 T
    # (rtol 1e-5 below) and a near-uniform Bz ≈ μ0 M_s t/(π L) ≈ 1.4e-6 T (atol 3e-6 T,
    # < 1e-4 of the 36 mT peak).
    big = 2e-3
    film = magpy.magnet.Cuboid(
        dimension=(big, 2 * big, t), polarization=(0, 0, MU0 * m_s), position=(-big / 2, 0, -t / 2)
    )
    x = np.linspace(-300e-9, 300e-9, 13)
    obs = np.stack([x, np.zeros_like(x), np.full_like(x, d)], axis=-1)
    ref = film.getB(obs)
    bx, bz = film_edge_field_t(x, d, m_s * t, thickness_m=t)
    np.testing.assert_allclose(bx, ref[:, 0], rtol=1e-5, atol=1e-9)
    np.testing.assert_allclose(bz, ref[:, 2], rtol=1e-5, atol=3e-6)


def test_wire_check_value():
    """15 nA at 10 nm gives 0.300 µT (Biot–Savart μ0 I/(2π r); PHYSICS.md §5 [num])."""
    bx, bz = line_current_field_t(0.0, 10e-9, 15e-9)
    assert float(np.hypot(bx, bz)) * 1e6 == pytest.approx(0.300, abs=5e-4)


def test_wire_matches_magpylib_current_line():
    """The wire field equals magpylib's straight current line (2 mm long, so end effects are
    ~(r/L)² ≈ 1e-8) at points around the wire."""
    current, x0 = 2e-3, 30e-9
    wire = magpy.current.Polyline(current=current, vertices=[(x0, -1e-3, 0), (x0, 1e-3, 0)])
    rng = np.random.default_rng(5)
    x = rng.uniform(-500e-9, 500e-9, 20)
    z = rng.uniform(20e-9, 500e-9, 20)
    ref = wire.getB(np.stack([x, np.zeros_like(x), z], axis=-1))
    bx, bz = line_current_field_t(x, z, current, x0_m=x0)
    np.testing.assert_allclose(bx, ref[:, 0], rtol=1e-6)
    np.testing.assert_allclose(bz, ref[:, 2], rtol=1e-6)
    np.testing.assert_allclose(ref[:, 1], 0.0, atol=1e-12)


def test_dipole_check_values():
    """1 μB at 10 nm: 1.8548 μT on axis, −0.9274 μT in the equatorial plane (μ0 m/(2π r³);
    PHYSICS.md §5 [num], μB from scipy.constants)."""
    b = dipole_field_t(np.array([[0, 0, 10e-9], [10e-9, 0, 0]]), np.array([0, 0, MU_B]))
    assert b[0, 2] * 1e6 == pytest.approx(1.8548, abs=1e-4)
    assert b[1, 2] * 1e6 == pytest.approx(-0.9274, abs=1e-4)


def test_dipole_matches_magpylib():
    """The point-dipole field equals magpylib's Dipole at random points."""
    moment = np.array([1e-18, -2e-18, 0.5e-18])
    rng = np.random.default_rng(9)
    pts = rng.uniform(-1e-7, 1e-7, size=(30, 3))
    ref = magpy.misc.Dipole(moment=moment).getB(pts)
    np.testing.assert_allclose(dipole_field_t(pts, moment), ref, rtol=1e-9)


# --- forward model vs magpylib (PHYSICS.md §4) --------------------------------------------


def test_thin_out_of_plane_patch_matches_magpylib():
    """The FFT field of a thin +z patch (1 mA, 8×10 nm pixels, d = 60 nm) is within 1 % of the
    peak of magpylib's Cuboid (polarization μ0 M) away from the window edges (Beardsley 1989,
    IEEE Trans. Magn. 25, 671; PHYSICS.md §4)."""
    ny, nx, py, px, d = 80, 96, 8e-9, 10e-9, 60e-9
    y_map, x_map = _grid(ny, nx, py, px)
    inside = _patch(y_map, x_map, 160e-9, 240e-9)
    t = 0.2e-9  # magpylib slab, centred on z = 0 like the thin sheet: O(t²) apart
    slab = magpy.magnet.Cuboid(dimension=(480e-9, 320e-9, t), polarization=(0, 0, MU0 * 1e-3 / t))
    ref = _magpylib_map(slab, y_map, x_map, d)
    # Default padding (the map's own size per side): the patch's periodic images, falling off
    # as 1/r³, add ~0.5 % of the peak (measured 0.48 %).
    b = stray_field_t(inside * 1e-3, pixel_m=(py, px), standoff_m=d)
    peak = np.abs(ref).max()
    err = np.abs(b - ref)[:, 8:-8, 8:-8]
    assert err.max() < 0.01 * peak


def test_finite_thickness_patch_matches_magpylib():
    """With thickness_m the moment is spread over t below the top surface: a 20 nm thick +z
    patch matches magpylib's Cuboid within 1 % of the peak (PHYSICS.md §4 thickness factor)."""
    n, p, d, t = 96, 10e-9, 50e-9, 20e-9
    y_map, x_map = _grid(n, n, p, p)
    inside = _patch(y_map, x_map, 200e-9, 200e-9)
    m_s = 5e5
    block = magpy.magnet.Cuboid(
        dimension=(400e-9, 400e-9, t), polarization=(0, 0, MU0 * m_s), position=(0, 0, -t / 2)
    )
    ref = _magpylib_map(block, y_map, x_map, d)
    b = stray_field_t(inside * m_s * t, pixel_m=p, standoff_m=d, thickness_m=t)
    err = np.abs(b - ref)[:, 8:-8, 8:-8]
    assert err.max() < 0.01 * np.abs(ref).max()


def test_in_plane_patch_matches_magpylib():
    """A thin patch magnetised in-plane at 30° from x matches magpylib within 1 % of the peak
    (the −i k·m term of Lima & Weiss 2009, J. Geophys. Res. 114, B06102; PHYSICS.md §4)."""
    n, p, d, t = 96, 10e-9, 60e-9, 0.2e-9
    y_map, x_map = _grid(n, n, p, p)
    inside = _patch(y_map, x_map, 160e-9, 200e-9)
    angle = np.radians(30.0)
    m_sheet = 1e-3
    pol = MU0 * m_sheet / t * np.array([np.cos(angle), np.sin(angle), 0.0])
    slab = magpy.magnet.Cuboid(dimension=(400e-9, 320e-9, t), polarization=pol)
    ref = _magpylib_map(slab, y_map, x_map, d)
    b = stray_field_t(
        np.zeros((n, n)),
        m_x_a=inside * m_sheet * np.cos(angle),
        m_y_a=inside * m_sheet * np.sin(angle),
        pixel_m=p,
        standoff_m=d,
    )
    err = np.abs(b - ref)[:, 8:-8, 8:-8]
    assert err.max() < 0.01 * np.abs(ref).max()


def test_single_pixel_is_a_point_dipole():
    """One pixel of sheet moment m_z seen from d ≫ pixel is a dipole p² m_z: Bz on axis within
    1 % of μ0 m/(2π d³) (PHYSICS.md §5 dipole formula)."""
    n, p, d = 256, 5e-9, 100e-9
    m = np.zeros((n, n))
    m[n // 2, n // 2] = 1e-3
    b = stray_field_t(m, pixel_m=p, standoff_m=d)
    moment = 1e-3 * p * p
    assert b[2, n // 2, n // 2] == pytest.approx(MU0 * moment / (2 * np.pi * d**3), rel=0.01)


def test_uniform_out_of_plane_film_makes_no_field():
    """A uniform out-of-plane sheet on a periodic window has no stray field (Beardsley 1989:
    the k = 0 term is lost)."""
    b = stray_field_t(np.full((32, 32), 1e-3), pixel_m=10e-9, standoff_m=50e-9, pad=0)
    np.testing.assert_allclose(b, 0.0, atol=1e-18)


def test_default_padding_suppresses_wrap_around():
    """The default zero padding brings a patch's field far closer to magpylib than a periodic
    window (pad = 0) does (common practice: pad before transforming)."""
    n, p, d = 64, 10e-9, 60e-9
    y_map, x_map = _grid(n, n, p, p)
    inside = _patch(y_map, x_map, 160e-9, 160e-9)
    t = 0.2e-9
    slab = magpy.magnet.Cuboid(dimension=(320e-9, 320e-9, t), polarization=(0, 0, MU0 * 1e-3 / t))
    ref = _magpylib_map(slab, y_map, x_map, d)
    err_default = np.abs(stray_field_t(inside * 1e-3, pixel_m=p, standoff_m=d) - ref).max()
    err_periodic = np.abs(stray_field_t(inside * 1e-3, pixel_m=p, standoff_m=d, pad=0) - ref).max()
    assert err_default < 0.3 * err_periodic


def test_stray_field_rejects_mismatched_in_plane_map():
    """An in-plane map whose shape differs from m_z_a raises ValueError naming both shapes."""
    with pytest.raises(
        ValueError, match=r"m_x_a must have shape \(8, 8\) like m_z_a; found \(8, 9\)"
    ):
        stray_field_t(np.zeros((8, 8)), m_x_a=np.zeros((8, 9)), pixel_m=1e-8, standoff_m=5e-8)


def test_stray_field_rejects_negative_standoff():
    """A negative standoff raises ValueError naming the value."""
    with pytest.raises(ValueError, match=r"standoff_m must be finite and ≥ 0; found -5e-08"):
        stray_field_t(np.zeros((8, 8)), pixel_m=1e-8, standoff_m=-5e-8)


def test_stray_field_rejects_nan_map():
    """A map with NaN raises ValueError counting the bad values."""
    m = np.zeros((8, 8))
    m[2, 3] = np.nan
    with pytest.raises(ValueError, match=r"m_z_a must be finite everywhere; found 1 NaN/inf"):
        stray_field_t(m, pixel_m=1e-8, standoff_m=5e-8)


# --- projection and reconstruction --------------------------------------------------------


def _domain_pattern(n, p):
    """Disc up, ring down, zero net moment (keeps the field inside the window)."""
    y_map, x_map = _grid(n, n, p, p)
    r = np.hypot(x_map - 15e-9, y_map + 10e-9)
    return np.where(r < 200e-9, 1e-3, 0.0) - np.where((r >= 200e-9) & (r < 283e-9), 1e-3, 0.0)


def test_project_on_axis_is_the_dot_product():
    """project_on_axis returns u·B with u from nv_axis, over any trailing shape."""
    b = np.random.default_rng(2).normal(size=(3, 4, 5))
    u = nv_axis(0.4, 2.0)
    np.testing.assert_allclose(project_on_axis(b, 0.4, 2.0), np.einsum("i,ijk->jk", u, b))


def test_bz_recovered_from_a_100_tip_projection():
    """Bz of a forward-modelled domain pattern is recovered from its (100)-tip projection within
    0.5 % of the peak (Lima & Weiss, J. Geophys. Res. 114, B06102 (2009); PHYSICS.md §4)."""
    n, p, d = 128, 10e-9, 50e-9
    b = stray_field_t(_domain_pattern(n, p), pixel_m=p, standoff_m=d)
    b_nv = project_on_axis(b, THETA_100, PHI_100)
    bz = bz_from_projection(b_nv, THETA_100, PHI_100, p)
    err = np.abs(bz - b[2])[16:-16, 16:-16]
    assert err.max() < 0.005 * np.abs(b[2]).max()


def test_vector_recovered_from_a_100_tip_projection():
    """All three components of a forward-modelled field are recovered from one (100)-tip
    projection within 0.5 % of the peak (Lima & Weiss 2009; Broadway et al., Phys. Rev.
    Applied 14, 024076 (2020))."""
    n, p, d = 128, 10e-9, 50e-9
    b = stray_field_t(_domain_pattern(n, p), pixel_m=p, standoff_m=d)
    b_nv = project_on_axis(b, THETA_100, 3 * PHI_100)
    v = vector_from_projection(b_nv, THETA_100, 3 * PHI_100, p)
    assert v.shape == (3, n, n)
    err = np.abs(v - b)[:, 16:-16, 16:-16]
    assert err.max() < 0.005 * np.abs(b).max()


def test_axis_in_plane_is_rejected():
    """An NV axis in the sample plane (θ = 90°) cannot give Bz from one projection: ValueError."""
    with pytest.raises(
        ValueError, match=r"theta_rad must leave the NV axis out of the sample plane"
    ):
        bz_from_projection(np.zeros((8, 8)), np.pi / 2, 0.0, 1e-8)


def test_sheet_moment_inverts_the_forward_model_exactly_without_window():
    """On a periodic window with no low-pass, m_z(k) = 2 e^{kd} Bz(k)/(μ0 k) undoes the forward
    model up to the lost mean (PHYSICS.md §4)."""
    n, p, d = 64, 10e-9, 30e-9
    m = np.zeros((n, n))
    m[20:40, 16:50] = 1e-3
    bz = stray_field_t(m, pixel_m=p, standoff_m=d, pad=0)[2]
    m_back = sheet_moment_from_bz_a(bz, pixel_m=p, standoff_m=d, pad=0, k_cut_rad_per_m=1e12)
    np.testing.assert_allclose(m_back, m - m.mean(), atol=1e-9)


def test_sheet_moment_with_hann_window_recovers_a_1_ma_film():
    """A Hann window cut at π/d recovers a 1.000 mA patch within 0.2 % at its centre, relative to
    the region outside (PHYSICS.md §4 [num]: 1.006 mA in its own set-up)."""
    n, p, d = 128, 10e-9, 50e-9
    m = np.zeros((n, n))
    m[32:96, 32:96] = 1e-3
    bz = stray_field_t(m, pixel_m=p, standoff_m=d, pad=0)[2]
    m_back = sheet_moment_from_bz_a(bz, pixel_m=p, standoff_m=d, pad=0)
    assert m_back[64, 64] - m_back[4, 4] == pytest.approx(1e-3, rel=2e-3)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"pad": -1}, r"pad must be a whole number of pixels ≥ 0 or None; found -1"),
        ({"pad": 2.5}, r"pad must be a whole number of pixels ≥ 0 or None; found 2\.5"),
        (
            {"pixel_m": (1e-8, 1e-8, 1e-8)},
            r"pixel_m must be one pitch or a \(pixel_y_m, pixel_x_m\)",
        ),
        ({"thickness_m": 0.0}, r"thickness_m must be finite and > 0; found 0\.0"),
    ],
)
def test_stray_field_rejects_bad_options(kwargs, message):
    """Bad padding, pitch or thickness raise ValueError naming the option and the value."""
    args = {"pixel_m": 1e-8, "standoff_m": 5e-8, **kwargs}
    with pytest.raises(ValueError, match=message):
        stray_field_t(np.zeros((8, 8)), **args)
