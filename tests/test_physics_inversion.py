"""Tests for strayline.physics.inversion: (f₋, f₊) → (|B|, θ) and B∥."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from strayline.physics import (
    GAMMA_NV_HZ_PER_T,
    field_along_axis_from_resonances,
    field_from_resonances,
    transition_frequencies_hz,
)

D_HZ = 2.870e9


def _field_nv(b_t, theta_rad, phi_rad=0.0):
    return b_t * np.array(
        [
            np.sin(theta_rad) * np.cos(phi_rad),
            np.sin(theta_rad) * np.sin(phi_rad),
            np.cos(theta_rad),
        ]
    )


def _published_inversion(f_lo, f_hi, d):
    """Literal transcription of Balasubramanian et al., Nature 455, 648 (2008), Methods
    (as restated in PHYSICS.md §2), E = 0."""
    q = f_hi**2 + f_lo**2 - f_hi * f_lo
    gb2 = (q - d**2) / 3
    delta = (
        7 * d**3 + 2 * (f_hi + f_lo) * (2 * (f_hi**2 + f_lo**2) - 5 * f_hi * f_lo) - 3 * d * q
    ) / (9 * (q - d**2))
    cos2 = (delta + d) / (2 * d)
    return np.sqrt(gb2) / GAMMA_NV_HZ_PER_T, np.arccos(np.sqrt(cos2))


@pytest.mark.parametrize(
    ("b_t", "theta_deg", "f_lo", "f_hi"),
    [
        (5.000e-3, 30.0, 2.751222e9, 2.993917e9),
        (10.000e-3, 54.7356, 2.735705e9, 3.058879e9),
        (2.000e-3, 80.0, 2.861845e9, 2.881341e9),
        (1.000e-3, 0.0, 2.841968e9, 2.898032e9),
    ],
)
def test_worked_examples_invert_to_their_field(b_t, theta_deg, f_lo, f_hi):
    """The PHYSICS.md §2 worked examples invert to their (|B|, θ) (Balasubramanian et al.,
    Nature 455, 648 (2008), Methods); tolerances 0.5 µT and 0.01° cover the table's 1 kHz
    rounding."""
    b, angle = field_from_resonances(f_lo, f_hi, D_HZ)
    assert float(b) == pytest.approx(b_t, abs=0.5e-6)
    assert np.degrees(float(angle)) == pytest.approx(theta_deg, abs=0.01)


@settings(max_examples=300, deadline=None)
@given(
    st.floats(min_value=0.1e-3, max_value=30e-3),
    st.floats(min_value=0.0, max_value=np.pi / 2),
    st.floats(min_value=2.86e9, max_value=2.88e9),
    st.floats(min_value=0.0, max_value=2 * np.pi),
)
def test_round_trip_from_eigen_frequencies(b_t, theta_rad, d_hz, phi_rad):
    """Eigen-frequencies of the 3×3 Hamiltonian (Doherty et al., Phys. Rep. 528, 1 (2013)) invert
    back to |B| and θ (Balasubramanian et al. 2008, Methods: exact for E = 0)."""
    f = transition_frequencies_hz(_field_nv(b_t, theta_rad, phi_rad), d_hz)
    b, angle = field_from_resonances(f[0], f[1], d_hz)
    assert float(b) == pytest.approx(b_t, rel=1e-9)
    # sin²θ is recovered to ~1e-15·(D/γB)² ≤ 1e-9 absolute, so θ to a few 1e-5 rad near 0.
    assert np.sin(float(angle)) ** 2 == pytest.approx(np.sin(theta_rad) ** 2, abs=1e-8)


@settings(max_examples=200, deadline=None)
@given(
    st.floats(min_value=0.5e6, max_value=500e6),
    st.floats(min_value=0.5e6, max_value=500e6),
    st.floats(min_value=2.86e9, max_value=2.88e9),
)
def test_same_as_published_delta_formula(below_hz, above_hz, d_hz):
    """Our invariant-based evaluation equals the literal Δ/cos²θ formula of Balasubramanian et
    al. 2008 (Methods) wherever that formula is defined and inside [0, 1]."""
    f_lo, f_hi = d_hz - below_hz, d_hz + above_hz
    # Outside the published formula's domain ((γB)² ≤ 0, cos²θ ∉ [0, 1]) the clipping test
    # applies instead; near (γB)² = 0 the published form divides 0 by 0.
    q = f_hi**2 + f_lo**2 - f_hi * f_lo - d_hz**2
    assume(q > 1e-3 * d_hz**2)
    with np.errstate(invalid="ignore"):
        ref_b, ref_angle = _published_inversion(np.float64(f_lo), np.float64(f_hi), d_hz)
    assume(np.isfinite(ref_b) and np.isfinite(ref_angle))
    b, angle = field_from_resonances(f_lo, f_hi, d_hz)
    assert float(b) == pytest.approx(ref_b, rel=1e-9)
    assert np.cos(float(angle)) ** 2 == pytest.approx(np.cos(ref_angle) ** 2, abs=1e-7)


@settings(max_examples=300, deadline=None)
@given(
    st.floats(min_value=2.0e9, max_value=3.8e9),
    st.floats(min_value=2.0e9, max_value=3.8e9),
    st.floats(min_value=2.86e9, max_value=2.88e9),
    st.floats(min_value=0.0, max_value=10e6),
)
def test_noisy_inputs_never_give_nan(f_a, f_b, d_hz, e_hz):
    """Any finite resonance pair, even an unphysical one, gives finite |B| ≥ 0 and θ ∈ [0, π/2]
    (clipping of (γB)² and cos²θ, as specified)."""
    b, angle = field_from_resonances(f_a, f_b, d_hz, e_hz)
    assert np.isfinite(b)
    assert b >= 0
    assert 0.0 <= angle <= np.pi / 2


def test_equal_resonances_at_d_give_zero_field():
    """f₋ = f₊ = D is zero field; the angle is reported as 0 there (documented convention)."""
    b, angle = field_from_resonances(D_HZ, D_HZ, D_HZ)
    assert float(b) == 0.0
    assert float(angle) == 0.0


def test_order_of_the_two_resonances_does_not_matter():
    """Swapping f₋ and f₊ gives the same |B| and θ (the formula is symmetric)."""
    f = transition_frequencies_hz(_field_nv(4e-3, 0.7), D_HZ)
    a = field_from_resonances(f[0], f[1], D_HZ)
    b = field_from_resonances(f[1], f[0], D_HZ)
    np.testing.assert_allclose(a, b, rtol=1e-13)


def test_with_strain_exact_when_transverse_field_at_45_degrees():
    """With E ≠ 0 the inversion is exact when B⊥ lies at 45° to the strain axis (the strain term
    of det H vanishes; our extension of Balasubramanian 2008, derived in the docstring)."""
    e_hz = 5e6
    f = transition_frequencies_hz(_field_nv(3e-3, 1.0, np.pi / 4), D_HZ, strain_hz=e_hz)
    b, angle = field_from_resonances(f[0], f[1], D_HZ, strain_hz=e_hz)
    assert float(b) == pytest.approx(3e-3, rel=1e-9)
    assert float(angle) == pytest.approx(1.0, abs=1e-7)


def test_strain_term_corrects_field_magnitude():
    """|B| is exact with E ≠ 0 for any azimuth (−3E² in the (γB)² numerator; PHYSICS.md §2),
    and ignoring E biases it."""
    e_hz = 5e6
    f = transition_frequencies_hz(_field_nv(3e-3, 1.0, 0.3), D_HZ, strain_hz=e_hz)
    b, _ = field_from_resonances(f[0], f[1], D_HZ, strain_hz=e_hz)
    b_no_e, _ = field_from_resonances(f[0], f[1], D_HZ)
    assert float(b) == pytest.approx(3e-3, rel=1e-9)
    assert abs(float(b_no_e) - 3e-3) > 1e-6


def test_error_in_d_biases_magnitude_and_angle():
    """1 K of error in D (74.2 kHz too high) gives −95 µT and −4.4° at 1 mT, 54.7° (PHYSICS.md §2
    [num]; dD/dT from Acosta et al., PRL 104, 070801 (2010))."""
    theta = np.radians(54.7356)
    f = transition_frequencies_hz(_field_nv(1e-3, theta), D_HZ)
    b, angle = field_from_resonances(f[0], f[1], D_HZ + 74.2e3)
    assert (float(b) - 1e-3) * 1e6 == pytest.approx(-95.0, abs=0.5)
    assert np.degrees(float(angle) - theta) == pytest.approx(-4.4, abs=0.05)


def test_axial_field_projection_is_half_the_splitting_over_gamma():
    """For B along the axis, B∥ = (f₊ − f₋)/(2γ) exactly (linear Zeeman; Doherty 2013)."""
    f = transition_frequencies_hz(np.array([0.0, 0.0, 12e-3]), D_HZ)
    b_par = field_along_axis_from_resonances(f[0], f[1], D_HZ)
    assert float(b_par) == pytest.approx((f[1] - f[0]) / (2 * GAMMA_NV_HZ_PER_T), rel=1e-12)
    assert float(b_par) == pytest.approx(12e-3, rel=1e-12)


@pytest.mark.parametrize("theta_deg", [0.0, 30.0, 54.7356, 70.0])
def test_splitting_estimate_good_to_a_fifth_of_a_percent_below_10_mT(theta_deg):
    """B∥ = |B| cos θ from the exact inversion and the estimate (f₊ − f₋)/(2γ) agree to 0.2 % at
    5 mT (PHYSICS.md §2 [num])."""
    theta = np.radians(theta_deg)
    f = transition_frequencies_hz(_field_nv(5e-3, theta), D_HZ)
    b_par = field_along_axis_from_resonances(f[0], f[1], D_HZ)
    assert float(b_par) == pytest.approx(5e-3 * np.cos(theta), rel=1e-9)
    assert (f[1] - f[0]) / (2 * GAMMA_NV_HZ_PER_T) == pytest.approx(float(b_par), rel=2e-3)


def test_vectorised_over_a_line():
    """Arrays of shape (n_pixels,) with a scalar D give arrays of shape (n_pixels,)."""
    rng = np.random.default_rng(3)
    b_t = rng.uniform(1e-3, 10e-3, size=50)
    theta = rng.uniform(0, np.pi / 2, size=50)
    fields = np.stack([_field_nv(bi, ti) for bi, ti in zip(b_t, theta, strict=True)])
    f = transition_frequencies_hz(fields, D_HZ)
    b, angle = field_from_resonances(f[:, 0], f[:, 1], D_HZ)
    assert b.shape == angle.shape == (50,)
    np.testing.assert_allclose(b, b_t, rtol=1e-9)
    b_par = field_along_axis_from_resonances(f[:, 0], f[:, 1], D_HZ)
    np.testing.assert_allclose(b_par, b_t * np.cos(theta), rtol=1e-7)
