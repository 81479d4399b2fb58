"""Tests of strayline.physics.structure_field: the fields of a film edge, a stripe and a
wire on a scan grid, against published check values, Biot–Savart and magpylib."""

from __future__ import annotations

import math

import magpylib as magpy
import numpy as np
import pytest
from scipy import constants
from scipy.spatial.transform import Rotation

from strayline.physics import nv_axis, project_on_axis
from strayline.physics.structure_field import (
    StraightStructure,
    structure_field_nv_t,
    structure_field_t,
)

THETA_100 = math.acos(1 / math.sqrt(3))  # (100) tip, PHYSICS.md §6
PHI_100 = math.pi / 4


def test_film_edge_check_values_of_physics_md() -> None:
    """A +z film on x < 0 (α = 90°), I_s = 1 mA, d = 50 nm: Bx = 4.000 mT, Bz = 0 over the
    edge and Bx = 2.000, Bz = −2.000 mT at x = +50 nm (PHYSICS.md §5 [num]; the
    calibration geometry of Hingant et al., Phys. Rev. Applied 4, 014003 (2015))."""
    edge = StraightStructure("film-edge", 50e-9, 1e-3, 0.0, math.pi / 2)
    b = structure_field_t(edge, np.array([0.0, 50e-9]), np.zeros(2))
    np.testing.assert_allclose(b[0] * 1e3, [4.000, 2.000], atol=5e-4)
    np.testing.assert_allclose(b[1], 0.0, atol=1e-15)
    np.testing.assert_allclose(b[2] * 1e3, [0.000, -2.000], atol=5e-4)


@pytest.mark.parametrize("angle", [0.3, 1.0, 2.5, 4.0])
def test_wire_field_is_mu0_i_over_2_pi_r_at_right_angles_to_r(angle: float) -> None:
    """|B| of a straight wire is μ0 I/(2π r) (Biot–Savart; scipy.constants.mu_0) and B is
    perpendicular to both the wire and the line to it, at any wire direction."""
    wire = StraightStructure("wire", 40e-9, 2.5e-3, 30e-9, angle)
    rng = np.random.default_rng(3)
    x, y = rng.uniform(-300e-9, 300e-9, (2, 50))
    b = structure_field_t(wire, x, y)
    t_hat = np.array([math.cos(angle), math.sin(angle), 0.0])
    n_hat = np.array([math.sin(angle), -math.cos(angle), 0.0])
    s = x * n_hat[0] + y * n_hat[1] - 30e-9
    r = np.hypot(s, 40e-9)
    np.testing.assert_allclose(
        np.linalg.norm(b, axis=0), constants.mu_0 * 2.5e-3 / (2 * np.pi * r), rtol=1e-9
    )
    np.testing.assert_allclose(t_hat @ b, 0.0, atol=1e-12)
    np.testing.assert_allclose(s * (n_hat @ b) + 40e-9 * b[2], 0.0, atol=1e-18)


def _cuboid_film(
    width_m: float, centre_x_m: float, thickness_m: float, angle: float, ms_a_m: float
):
    """A long +z-magnetised slab (magpylib Cuboid) of the given width across, 40 µm long,
    its top at z = 0, its long axis along (cos α, sin α)."""
    cuboid = magpy.magnet.Cuboid(
        polarization=(0.0, 0.0, constants.mu_0 * ms_a_m),
        dimension=(width_m, 40e-6, thickness_m),
        position=(centre_x_m, 0.0, -thickness_m / 2),
    )
    # Turn the slab (long axis y) so that it runs along t̂ = (cos α, sin α).
    cuboid.rotate(Rotation.from_euler("z", angle - math.pi / 2), anchor=(0, 0, 0))
    return cuboid


@pytest.mark.parametrize("angle", [math.pi / 2, 0.4, 2.2])
def test_film_edge_matches_magpylib_for_a_thin_slab_at_any_direction(angle: float) -> None:
    """The film-edge model (exact slab form with the thickness, and the thin-film form
    within t/d) matches magpylib's analytic field of a magnetised cuboid 10 µm wide whose
    one edge crosses the scan (magpylib, an independent reference; PHYSICS.md §5)."""
    t, d, ms = 2e-9, 45e-9, 0.8e-3 / 2e-9  # M_s t = 0.8 mA
    # A slab covering s < 0 near the scan: centred 5 µm behind its edge.
    film = _cuboid_film(10e-6, -5e-6, t, angle, ms)
    x, y = np.meshgrid(np.linspace(-300e-9, 300e-9, 25), np.linspace(-200e-9, 200e-9, 17))
    ref = film.getB(np.stack([x, y, np.full_like(x, d)], axis=-1)).transpose(2, 0, 1)
    exact = structure_field_t(
        StraightStructure("film-edge", d, ms * t, 0.0, angle, thickness_m=t), x, y
    )
    thin = structure_field_t(StraightStructure("film-edge", d, ms * t, 0.0, angle), x, y)
    peak = np.abs(ref).max()
    # The far edge 10 µm away adds ~μ0 I_s/(2π·10 µm) ≈ 0.5 % of the peak here.
    assert np.abs(exact - ref).max() < 0.007 * peak
    assert np.abs(thin - ref).max() < (0.007 + t / d) * peak


def test_stripe_matches_magpylib() -> None:
    """A stripe 400 nm wide is two edges: its field matches magpylib's cuboid of that width
    (independent reference) to 0.2 % of the peak."""
    t, d, ms, angle = 1e-9, 60e-9, 1e-3 / 1e-9, 1.1
    stripe = _cuboid_film(400e-9, 0.0, t, angle, ms)
    x, y = np.meshgrid(np.linspace(-600e-9, 600e-9, 31), np.linspace(-300e-9, 300e-9, 13))
    # The cuboid's centre is at the origin: along n̂ it sits at p = 0 (rotation about it).
    ref = stripe.getB(np.stack([x, y, np.full_like(x, d)], axis=-1)).transpose(2, 0, 1)
    model = structure_field_t(
        StraightStructure("stripe", d, ms * t, 0.0, angle, width_m=400e-9, thickness_m=t), x, y
    )
    assert np.abs(model - ref).max() < 2e-3 * np.abs(ref).max()


def test_projection_is_the_field_on_the_nv_axis() -> None:
    """structure_field_nv_t is u·B of structure_field_t (PHYSICS.md §4, B_NV = u·B)."""
    stripe = StraightStructure("stripe", 70e-9, -0.6e-3, 25e-9, 2.0, width_m=250e-9)
    x, y = np.meshgrid(np.linspace(-400e-9, 400e-9, 9), np.linspace(-100e-9, 100e-9, 5))
    np.testing.assert_allclose(
        structure_field_nv_t(stripe, x, y, THETA_100, PHI_100),
        project_on_axis(structure_field_t(stripe, x, y), THETA_100, PHI_100),
        rtol=1e-12,
        atol=1e-18,
    )
    assert nv_axis(THETA_100, PHI_100)[2] == pytest.approx(1 / math.sqrt(3))


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"model": "disc"}, "model must be one of film-edge, stripe, wire; found 'disc'"),
        ({"model": "stripe"}, "a stripe needs width_m; found None"),
        ({"model": "wire", "thickness_m": 1e-9}, "thickness_m applies to films, not to a wire"),
        ({"standoff_m": -1e-9}, r"standoff_m must be finite and > 0; found -1e-09"),
        ({"angle_rad": math.nan}, "angle_rad must be finite; found nan"),
    ],
)
def test_bad_structures_raise_named_errors(kwargs: dict[str, object], message: str) -> None:
    """An unknown model, a stripe without width, a thick wire or a bad number raises a
    ValueError naming the field."""
    args: dict[str, object] = {
        "model": "film-edge",
        "standoff_m": 50e-9,
        "strength_a": 1e-3,
        "position_m": 0.0,
        "angle_rad": 0.0,
    } | kwargs
    with pytest.raises(ValueError, match=message):
        StraightStructure(**args)  # type: ignore[arg-type]
