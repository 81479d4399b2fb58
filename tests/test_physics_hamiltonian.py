"""Tests for strayline.physics.hamiltonian: NV frame and the 3×3 spin-Hamiltonian lines."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from strayline.physics import GAMMA_NV_HZ_PER_T, nv_axis, to_nv_frame, transition_frequencies_hz

D_HZ = 2.870e9

# PHYSICS.md §2 worked examples [num]: (|B| in T, θ in degrees, f₋ in Hz, f₊ in Hz).
TABLE = [
    (5.000e-3, 30.0, 2.751222e9, 2.993917e9),
    (10.000e-3, 54.7356, 2.735705e9, 3.058879e9),
    (2.000e-3, 80.0, 2.861845e9, 2.881341e9),
    (1.000e-3, 0.0, 2.841968e9, 2.898032e9),
]


def _field(b_t, theta_deg, phi_deg=0.0):
    t, p = np.radians(theta_deg), np.radians(phi_deg)
    return b_t * np.array([np.sin(t) * np.cos(p), np.sin(t) * np.sin(p), np.cos(t)])


@pytest.mark.parametrize(("b_t", "theta_deg", "f_lo", "f_hi"), TABLE)
def test_matches_worked_example_table(b_t, theta_deg, f_lo, f_hi):
    """The exact eigen-frequencies match the PHYSICS.md §2 table to 1 kHz (H of Doherty et al.,
    Phys. Rep. 528, 1 (2013); table values cross-checked there with Balasubramanian et al.,
    Nature 455, 648 (2008), Methods)."""
    f = transition_frequencies_hz(_field(b_t, theta_deg), D_HZ)
    # The table is rounded to 1 kHz, so allow half a kHz plus float noise.
    np.testing.assert_allclose(f, [f_lo, f_hi], atol=0.6e3, rtol=0)


def test_axial_field_gives_linear_zeeman_lines():
    """A field along the NV axis gives f± = D ± γB exactly (H diagonal in |ms⟩; Doherty 2013)."""
    b = np.array([0.0, 0.0, 20e-3])
    f = transition_frequencies_hz(b, D_HZ)
    gb = GAMMA_NV_HZ_PER_T * 20e-3
    np.testing.assert_allclose(f, [D_HZ - gb, D_HZ + gb], rtol=1e-14)


def test_zero_field_with_strain_gives_d_minus_and_plus_e():
    """At zero field the lines sit at D − E and D + E (E(Sx² − Sy²) mixes |±1⟩; Doherty 2013)."""
    f = transition_frequencies_hz(np.zeros(3), D_HZ, strain_hz=4e6)
    np.testing.assert_allclose(f, [D_HZ - 4e6, D_HZ + 4e6], rtol=1e-14)


@pytest.mark.parametrize("b_t", [1e-4, 3e-3, 30e-3, 90e-3])
def test_transverse_field_matches_two_level_closed_form(b_t):
    """A field ⊥ the axis gives f₋ = (D + √(D² + 4γ²B²))/2, f₊ = √(D² + 4γ²B²): the symmetric
    |±1⟩ combination couples to |0⟩ through a 2×2 block (derived from H, E = 0)."""
    f = transition_frequencies_hz(np.array([b_t, 0.0, 0.0]), D_HZ)
    root = np.sqrt(D_HZ**2 + 4 * (GAMMA_NV_HZ_PER_T * b_t) ** 2)
    np.testing.assert_allclose(f, [(D_HZ + root) / 2, root], rtol=1e-13)


@settings(max_examples=100, deadline=None)
@given(
    st.floats(min_value=0.0, max_value=1e-3),
    st.floats(min_value=0.0, max_value=np.radians(75.0)),
)
def test_small_field_expansion(b_t, theta_rad):
    """Below 1 mT and θ ≤ 75°, f± = D + 3(γB⊥)²/(2D) ± γB∥ to within 2 kHz (PHYSICS.md §2
    [num]; the expansion needs γB∥ ≫ (γB⊥)²/D, and its error is 0.8 kHz at 1 mT, 75°)."""
    gb_par = GAMMA_NV_HZ_PER_T * b_t * np.cos(theta_rad)
    gb_perp = GAMMA_NV_HZ_PER_T * b_t * np.sin(theta_rad)
    approx = D_HZ + 3 * gb_perp**2 / (2 * D_HZ) + np.array([-gb_par, gb_par])
    f = transition_frequencies_hz(_field(b_t, np.degrees(theta_rad)), D_HZ)
    np.testing.assert_allclose(f, approx, atol=2e3, rtol=0)


@settings(max_examples=100, deadline=None)
@given(
    st.floats(min_value=1e-5, max_value=50e-3),
    st.floats(min_value=0.0, max_value=np.pi),
    st.floats(min_value=0.0, max_value=2 * np.pi),
)
def test_lines_independent_of_transverse_azimuth_without_strain(b_t, theta_rad, phi_rad):
    """With E = 0 the lines depend only on |B| and its angle to the axis (axial symmetry of H)."""
    ref = transition_frequencies_hz(_field(b_t, np.degrees(theta_rad)), D_HZ)
    rot = transition_frequencies_hz(_field(b_t, np.degrees(theta_rad), np.degrees(phi_rad)), D_HZ)
    np.testing.assert_allclose(rot, ref, rtol=1e-12)


def test_lines_do_not_depend_on_field_sign():
    """Reversing B leaves both lines unchanged (time-reversal partner; Doherty 2013)."""
    b = _field(7e-3, 40.0, 20.0)
    np.testing.assert_allclose(
        transition_frequencies_hz(-b, D_HZ), transition_frequencies_hz(b, D_HZ), rtol=1e-13
    )


def test_above_ground_state_anticrossing_lower_line_turns_negative():
    """Above the GSLAC (≈ 102.4 mT axial; PHYSICS.md §1) the ms=0→−1 value is D − γB < 0."""
    b_t = 150e-3
    f = transition_frequencies_hz(np.array([0.0, 0.0, b_t]), D_HZ)
    np.testing.assert_allclose(f[0], D_HZ - GAMMA_NV_HZ_PER_T * b_t, rtol=1e-12)
    assert f[0] < 0


def test_batched_and_broadcast_shapes():
    """Fields of shape (4, 5, 3) with D of shape (5,) give lines of shape (4, 5, 2) equal to
    one-by-one evaluation."""
    rng = np.random.default_rng(7)
    b = rng.normal(scale=5e-3, size=(4, 5, 3))
    d = np.linspace(2.865e9, 2.875e9, 5)
    f = transition_frequencies_hz(b, d, strain_hz=1e6)
    assert f.shape == (4, 5, 2)
    one = transition_frequencies_hz(b[2, 3], d[3], strain_hz=1e6)
    np.testing.assert_allclose(f[2, 3], one, rtol=1e-14)
    assert np.all(f[..., 0] <= f[..., 1])


def test_nv_axis_of_a_100_tip():
    """θ = arccos(1/√3), φ = 45° gives u = (1, 1, 1)/√3 (PHYSICS.md §6 [num])."""
    u = nv_axis(np.arccos(1 / np.sqrt(3)), np.pi / 4)
    np.testing.assert_allclose(u, np.ones(3) / np.sqrt(3), rtol=1e-14)


@settings(max_examples=100, deadline=None)
@given(
    st.floats(min_value=0.0, max_value=np.pi),
    st.floats(min_value=-np.pi, max_value=np.pi),
    st.lists(st.floats(min_value=-1e-2, max_value=1e-2), min_size=3, max_size=3),
)
def test_nv_frame_is_a_rotation_with_z_along_the_axis(theta, phi, b):
    """to_nv_frame keeps |B| and its z' component is u·B (orthonormal frame, z' = NV axis)."""
    b = np.array(b)
    b_nv = to_nv_frame(b, theta, phi)
    assert np.linalg.norm(b_nv) == pytest.approx(np.linalg.norm(b), rel=1e-12, abs=1e-18)
    assert b_nv[2] == pytest.approx(np.dot(nv_axis(theta, phi), b), rel=1e-12, abs=1e-18)


def test_nv_frame_x_axis_is_e_theta():
    """The NV-frame x' is ê_θ = (cos θ cos φ, cos θ sin φ, −sin θ), as documented."""
    theta, phi = 0.6, 1.1
    e_theta = np.array([np.cos(theta) * np.cos(phi), np.cos(theta) * np.sin(phi), -np.sin(theta)])
    np.testing.assert_allclose(to_nv_frame(e_theta, theta, phi), [1.0, 0.0, 0.0], atol=1e-15)


def test_nv_frame_broadcasts_over_a_map():
    """A (ny, nx, 3) field map with scalar angles gives a (ny, nx, 3) result."""
    b = np.random.default_rng(1).normal(size=(6, 7, 3))
    out = to_nv_frame(b, 0.3, 0.2)
    assert out.shape == (6, 7, 3)
    np.testing.assert_allclose(out[4, 5], to_nv_frame(b[4, 5], 0.3, 0.2))
