"""Tests of strayline.physics.wall_profile: the field of a wall or film edge along a cut,
and its fit (position, M_s t, width or its upper bound)."""

from __future__ import annotations

import math

import magpylib as magpy
import numpy as np
import pytest
from scipy import constants
from scipy.integrate import quad

from strayline.physics.wall_profile import fit_wall_cut, wall_profile_field_nv_t

S = np.linspace(-450e-9, 450e-9, 91)
U_N, U_Z = 0.577, 0.577  # a (100) tip looking along the cut, PHYSICS.md §6


def _tanh_wall_reference(s: float, d: float, ms: float, delta: float) -> float:
    """B_NV of a tanh wall by adaptive quadrature of its current sheet K = (m_s/δ) sech²
    (scipy.integrate.quad; independent of the model's fixed nodes)."""

    def density(sp: float) -> float:
        r2 = (s - sp) ** 2 + d * d
        k = ms / delta / math.cosh(sp / delta) ** 2
        return k * constants.mu_0 / (2 * math.pi) * (U_N * d - U_Z * (s - sp)) / r2

    return quad(density, -40 * delta, 40 * delta, points=[0.0, s], limit=400)[0]


def test_sharp_wall_check_values_of_physics_md() -> None:
    """A sharp up/down wall of 1 mA at d = 50 nm: Bx = 8.000, Bz = 0 mT over it and
    Bx = 4.000, Bz = −4.000 mT at +50 nm, twice the edge (PHYSICS.md §5 [num]; walls as two
    edges, Tetienne et al., Nat. Commun. 6, 6733 (2015))."""
    s = np.array([0.0, 50e-9])
    args = {"kind": "wall", "standoff_m": 50e-9, "sheet_moment_a": 1e-3, "position_m": 0.0}
    bx = wall_profile_field_nv_t(s, width_m=0.0, u_n=1.0, u_z=0.0, **args)  # type: ignore[arg-type]
    bz = wall_profile_field_nv_t(s, width_m=0.0, u_n=0.0, u_z=1.0, **args)  # type: ignore[arg-type]
    np.testing.assert_allclose(bx * 1e3, [8.000, 4.000], atol=5e-4)
    np.testing.assert_allclose(bz * 1e3, [0.000, -4.000], atol=5e-4)


def test_sharp_wall_matches_magpylib_opposite_cuboids() -> None:
    """A sharp wall is two films of opposite magnetisation meeting: magpylib's two
    cuboids (independent reference; 0.1 nm thin, 200 µm wide, so the thin-film form and
    the far edges each err by < 0.1 %) give the same B_NV to 0.3 % of its peak."""
    t, d, ms = 0.1e-9, 60e-9, 0.7e-3 / 0.1e-9
    up = magpy.magnet.Cuboid(
        polarization=(0, 0, constants.mu_0 * ms),
        dimension=(200e-6, 400e-6, t),
        position=(-100e-6, 0, -t / 2),
    )
    down = magpy.magnet.Cuboid(
        polarization=(0, 0, -constants.mu_0 * ms),
        dimension=(200e-6, 400e-6, t),
        position=(100e-6, 0, -t / 2),
    )
    obs = np.stack([S, np.zeros_like(S), np.full_like(S, d)], axis=-1)
    b = magpy.getB([up, down], obs, sumup=True)
    ref = U_N * b[:, 0] + U_Z * b[:, 2]
    model = wall_profile_field_nv_t(
        S,
        kind="wall",
        standoff_m=d,
        sheet_moment_a=ms * t,
        position_m=0.0,
        width_m=0.0,
        u_n=U_N,
        u_z=U_Z,
    )
    assert np.abs(model - ref).max() < 3e-3 * np.abs(ref).max()


@pytest.mark.parametrize("delta", [5e-9, 40e-9, 200e-9])
def test_tanh_wall_matches_adaptive_quadrature(delta: float) -> None:
    """The tanh wall (Hubert & Schäfer, Magnetic Domains, sec. 3.6.1) on the model's fixed
    nodes agrees with adaptive quadrature to 1e-6 of the peak, narrow or wide."""
    model = wall_profile_field_nv_t(
        S,
        kind="wall",
        standoff_m=50e-9,
        sheet_moment_a=1e-3,
        position_m=0.0,
        width_m=delta,
        u_n=U_N,
        u_z=U_Z,
    )
    ref = np.array([_tanh_wall_reference(s, 50e-9, 1e-3, delta) for s in S])
    assert np.abs(model - ref).max() < 1e-6 * np.abs(ref).max()


def _noisy_wall(delta: float, seed: int, d: float = 60e-9) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    clean = np.array([_tanh_wall_reference(s - 30e-9, d, 0.5e-3, delta) for s in S])
    sigma = np.full(S.shape, 20e-6)
    return clean + 1e-3 + 1.5e3 * S + rng.normal(size=S.shape) * sigma, sigma


def test_a_wall_as_wide_as_the_standoff_is_resolved() -> None:
    """A wall with δ = d is resolved: δ, the position and M_s t within 3σ of the truth."""
    data, sigma = _noisy_wall(60e-9, 1)
    fit = fit_wall_cut(S, data, sigma, kind="wall", standoff_m=60e-9, u_n=U_N, u_z=U_Z)
    assert fit.width_resolved
    assert fit.width_sigma_m is not None
    assert abs(fit.values["width_m"] - 60e-9) < 3 * fit.width_sigma_m
    assert abs(fit.values["position_m"] - 30e-9) < 3 * fit.sigmas["position_m"]
    assert abs(fit.values["sheet_moment_a"] - 0.5e-3) < 3 * fit.sigmas["sheet_moment_a"]
    assert fit.width_upper_m is None


def test_a_narrow_wall_gets_an_upper_bound_above_its_width() -> None:
    """A wall with δ = 3 nm ≪ d is not resolved: an upper bound (95 %, one-sided) is
    given, above the truth and of the order of d (the field changes at order (δ/d)²)."""
    data, sigma = _noisy_wall(3e-9, 2)
    fit = fit_wall_cut(S, data, sigma, kind="wall", standoff_m=60e-9, u_n=U_N, u_z=U_Z)
    assert not fit.width_resolved
    assert fit.width_upper_m is not None
    assert 3e-9 < fit.width_upper_m < 60e-9
    assert fit.chi2_red == pytest.approx(1.0, abs=0.35)


def test_the_standoff_sigma_widens_the_moment_sigma() -> None:
    """Carrying σ_d = 2 nm into the fit adds the change of M_s t at d ± σ_d in quadrature:
    its σ grows, the values stay."""
    data, sigma = _noisy_wall(10e-9, 3)
    args = {"kind": "wall", "standoff_m": 60e-9, "u_n": U_N, "u_z": U_Z}
    exact = fit_wall_cut(S, data, sigma, **args)  # type: ignore[arg-type]
    carried = fit_wall_cut(S, data, sigma, standoff_sigma_m=2e-9, **args)  # type: ignore[arg-type]
    assert carried.values["sheet_moment_a"] == pytest.approx(exact.values["sheet_moment_a"])
    assert carried.sigmas["sheet_moment_a"] > 1.5 * exact.sigmas["sheet_moment_a"]


def test_a_film_edge_cut_recovers_its_sheet_moment() -> None:
    """The edge model (film on the cut's start side): a sharp 0.8 mA edge is found with
    M_s t within 3σ, and its model curve has a band."""
    clean = wall_profile_field_nv_t(
        S,
        kind="edge",
        standoff_m=45e-9,
        sheet_moment_a=0.8e-3,
        position_m=-20e-9,
        width_m=0.0,
        u_n=U_N,
        u_z=U_Z,
    )
    rng = np.random.default_rng(4)
    sigma = np.full(S.shape, 15e-6)
    fit = fit_wall_cut(
        S,
        clean + rng.normal(size=S.shape) * sigma,
        sigma,
        kind="edge",
        standoff_m=45e-9,
        u_n=U_N,
        u_z=U_Z,
    )
    assert abs(fit.values["sheet_moment_a"] - 0.8e-3) < 3 * fit.sigmas["sheet_moment_a"]
    curve, band = fit.curve_t(S)
    assert np.abs(curve - clean).max() < 5 * band.max()
    assert np.all(band > 0)


def test_too_few_samples_and_unknown_kinds_are_refused() -> None:
    """Fewer than 8 measured samples, or a kind other than wall/edge, raises ValueError."""
    with pytest.raises(ValueError, match="at least 8 measured samples; found 5"):
        fit_wall_cut(S[:5], S[:5], np.ones(5), kind="wall", standoff_m=5e-8, u_n=1, u_z=0)
    with pytest.raises(ValueError, match="kind must be one of wall, edge; found 'bubble'"):
        fit_wall_cut(S, S, np.ones(S.size), kind="bubble", standoff_m=5e-8, u_n=1, u_z=0)  # type: ignore[arg-type]
