"""Tests of the field stage: resonances to B along the NV axis, |B|, angle, line mean."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from strayline.field import field_from_fit
from strayline.fit import FitStatus, LineFit
from strayline.physics import GAMMA_NV_HZ_PER_T, transition_frequencies_hz

D_HZ = 2.870e9


def _line_fit(center_hz: np.ndarray, sigma_hz: np.ndarray, status: np.ndarray) -> LineFit:
    """A LineFit carrying only resonances (the rest NaN), as the fit stage would give."""
    n = center_hz.shape[0]
    nan2, nan1 = np.full((n, 2), np.nan), np.full(n, np.nan)
    return LineFit(
        center_hz=center_hz,
        center_sigma_hz=sigma_hz,
        contrast=nan2,
        contrast_sigma=nan2,
        fwhm_hz=nan2,
        fwhm_sigma_hz=nan2,
        baseline=nan1,
        baseline_sigma=nan1,
        slope=np.zeros(n),
        chi2_red=nan1,
        status=np.asarray(status, dtype=np.uint8),
        n_iter=np.zeros(n, dtype=np.int32),
    )


def _frequencies(field_t: np.ndarray, theta_rad: np.ndarray) -> np.ndarray:
    b = np.stack([field_t * np.sin(theta_rad), 0 * field_t, field_t * np.cos(theta_rad)], -1)
    return transition_frequencies_hz(b, D_HZ)


@settings(max_examples=200, deadline=None)
@given(
    field_t=st.floats(1e-5, 10e-3),
    theta_rad=st.floats(0.0, np.pi / 2),
)
def test_round_trip_through_the_exact_hamiltonian(field_t, theta_rad):
    """Resonances of the exact spin Hamiltonian (numpy eigensolver; form of Doherty et al.,
    Phys. Rep. 528, 1 (2013)) invert to B∥ = |B| cos θ within 1e-3 of |B| for |B| ≤ 10 mT
    at any angle (Balasubramanian et al., Nature 455, 648 (2008), Methods)."""
    f = _frequencies(np.array([field_t]), np.array([theta_rad]))
    out = field_from_fit(_line_fit(f, np.full((1, 2), 1e4), [FitStatus.OK]), zfs_hz=D_HZ)
    assert abs(out.field_nv_t[0] - field_t * np.cos(theta_rad)) < 1e-3 * field_t
    assert abs(out.field_abs_t[0] - field_t) < 1e-3 * field_t
    assert np.isfinite(out.angle_rad[0])


@pytest.mark.parametrize(
    ("field_t", "theta_deg", "f_lo_hz", "f_hi_hz"),
    [
        (5e-3, 30.0, 2.751222e9, 2.993917e9),
        (10e-3, 54.7356, 2.735705e9, 3.058879e9),
        (2e-3, 80.0, 2.861845e9, 2.881341e9),
        (1e-3, 0.0, 2.841968e9, 2.898032e9),
    ],
)
def test_worked_examples(field_t, theta_deg, f_lo_hz, f_hi_hz):
    """The worked examples of PHYSICS.md §2 (D = 2.870 GHz, exact eigenvalues [num]) give
    their B∥, |B| and θ (within 5e-4: the table rounds to 1 kHz, which near D and 80°
    moves |B| by 1.1e-4)."""
    out = field_from_fit(
        _line_fit(np.array([[f_lo_hz, f_hi_hz]]), np.full((1, 2), 1e4), [FitStatus.OK]),
        zfs_hz=D_HZ,
    )
    theta = np.radians(theta_deg)
    np.testing.assert_allclose(out.field_nv_t, field_t * np.cos(theta), atol=5e-4 * field_t)
    np.testing.assert_allclose(out.field_abs_t, field_t, rtol=5e-4)
    np.testing.assert_allclose(out.angle_rad, theta, atol=2e-3)
    np.testing.assert_allclose(out.center_mean_hz, 0.5 * (f_lo_hz + f_hi_hz))


def test_one_resonance_branches():
    """A resonance of a one-dip fit gives B∥ = ±(f − D)/γ on the given branch (Rondin et
    al., Rep. Prog. Phys. 77, 056503 (2014), Sec. 2), exact for a field along the axis,
    and the bias sign sets its sign; |B|, θ and the line mean stay NaN."""
    f = _frequencies(np.array([3e-3]), np.array([0.0]))[0]
    centers = np.array([[f[1], np.nan], [f[0], np.nan]])
    sig = np.array([[2e5, np.nan], [2e5, np.nan]])
    status = [FitStatus.OK, FitStatus.OK]
    up = field_from_fit(_line_fit(centers, sig, status), zfs_hz=D_HZ, branch="upper")
    low = field_from_fit(_line_fit(centers, sig, status), zfs_hz=D_HZ, branch="lower", sign=-1.0)
    np.testing.assert_allclose(up.field_nv_t, [3e-3, -3e-3], rtol=1e-9)
    np.testing.assert_allclose(low.field_nv_t, [3e-3, -3e-3], rtol=1e-9)
    np.testing.assert_allclose(up.field_nv_sigma_t, 2e5 / GAMMA_NV_HZ_PER_T)
    assert np.all(np.isnan(up.field_abs_t) & np.isnan(up.center_mean_hz))


def test_lone_dip_of_a_pair_takes_the_branch_on_its_side_of_d():
    """A lone dip of the two-dip model (ONE_RESONANCE) is f₊ above D and f₋ below it,
    whatever branch is configured, so B∥ = sign · |f − D|/γ keeps the sign convention of
    the pairs (B∥ = sign · |B| cos θ; Balasubramanian et al., Nature 455, 648 (2008),
    Methods; one-resonance form from Rondin et al., Rep. Prog. Phys. 77, 056503 (2014),
    Sec. 2)."""
    f = _frequencies(np.array([3e-3]), np.array([0.0]))[0]
    centers = np.array([[f[1], np.nan], [f[0], np.nan]])
    sig = np.full((2, 2), 2e5)
    status = [FitStatus.ONE_RESONANCE, FitStatus.ONE_RESONANCE]
    for branch in ("upper", "lower"):
        for sign in (1.0, -1.0):
            out = field_from_fit(
                _line_fit(centers, sig, status), zfs_hz=D_HZ, branch=branch, sign=sign
            )
            np.testing.assert_allclose(out.field_nv_t, [sign * 3e-3, sign * 3e-3], rtol=1e-9)
            np.testing.assert_allclose(out.field_nv_sigma_t, 2e5 / GAMMA_NV_HZ_PER_T)


def test_sigma_matches_monte_carlo():
    """The linearised 1σ of B∥, |B|, θ and the line mean matches the scatter of 20000
    Gaussian draws of the two centres (common practice: first-order error propagation)."""
    rng = np.random.default_rng(4)
    n = 20000
    f = _frequencies(np.full(n, 3e-3), np.full(n, np.radians(40.0)))
    sig = np.full((n, 2), 150e3)
    noisy = f + rng.normal(0.0, 1.0, (n, 2)) * sig
    out = field_from_fit(_line_fit(noisy, sig, np.zeros(n)), zfs_hz=D_HZ)
    # 20000 draws: the sample std is good to 0.5 %; 3 % leaves room for curvature.
    for value, sigma in [
        (out.field_nv_t, out.field_nv_sigma_t),
        (out.field_abs_t, out.field_abs_sigma_t),
        (out.angle_rad, out.angle_sigma_rad),
        (out.center_mean_hz, out.center_mean_sigma_hz),
    ]:
        np.testing.assert_allclose(np.std(value), np.median(sigma), rtol=0.03)


def test_inconsistent_noisy_pairs_stay_finite():
    """Pairs that admit no field (closer than the zero-field lines allow, or mean far from
    D) still give finite values, as the clipped inversion promises."""
    centers = np.array([[2.8699e9, 2.8701e9], [2.80e9, 2.81e9], [2.95e9, 2.951e9]])
    out = field_from_fit(_line_fit(centers, np.full((3, 2), 1e5), np.zeros(3)), zfs_hz=D_HZ)
    for name in ("field_nv_t", "field_abs_t", "angle_rad", "field_nv_sigma_t"):
        assert np.all(np.isfinite(getattr(out, name))), name


def test_statuses_without_a_value_are_nan():
    """NO_RESONANCE, LOW_COUNTS, AT_BOUND and NOT_CONVERGED rows carry no field; MERGED rows
    carry only the line mean; the status is passed through."""
    statuses = [
        FitStatus.NO_RESONANCE,
        FitStatus.LOW_COUNTS,
        FitStatus.AT_BOUND,
        FitStatus.NOT_CONVERGED,
        FitStatus.MERGED,
    ]
    centers = np.tile([2.85e9, 2.89e9], (5, 1))
    centers[4, 1] = np.nan
    out = field_from_fit(_line_fit(centers, np.full((5, 2), 1e5), statuses), zfs_hz=D_HZ)
    assert np.all(np.isnan(out.field_nv_t))
    assert np.all(np.isnan(out.center_mean_hz[:4]))
    assert out.center_mean_hz[4] == 2.85e9
    np.testing.assert_array_equal(out.status, statuses)


def test_bad_arguments_are_refused():
    """A sign other than ±1 or an unknown branch is a wrong call (ValueError naming it)."""
    fit = _line_fit(np.full((1, 2), np.nan), np.full((1, 2), np.nan), [FitStatus.OK])
    with pytest.raises(ValueError, match=r"sign must be \+1 or -1; found 0.5"):
        field_from_fit(fit, zfs_hz=D_HZ, sign=0.5)
    with pytest.raises(ValueError, match="branch must be 'upper' or 'lower'; found 'middle'"):
        field_from_fit(fit, zfs_hz=D_HZ, branch="middle")  # type: ignore[arg-type]


def test_pair_with_mean_below_d_falls_back_to_the_axial_solution():
    """A noisy pair whose mean lies below D (no transverse-field solution: Balasubramanian
    et al., Nature 455, 648 (2008), Methods, gives (γB)² < (f₊ − f₋)²/4) yields the θ = 0
    field (f₊ − f₋)/(2γ) with σ = ½√(σ₋² + σ₊²)/γ, not the clipped |B| = 0."""
    d_hz = 2.870e9
    center = np.array([[2.823e9, 2.91462e9]])
    sigma = np.array([[1.0e6, 1.2e6]])
    result = field_from_fit(_line_fit(center, sigma, np.array([FitStatus.OK])), zfs_hz=d_hz + 2e6)
    expected = 0.5 * (center[0, 1] - center[0, 0]) / GAMMA_NV_HZ_PER_T
    assert result.field_nv_t[0] == pytest.approx(expected, rel=1e-12)
    assert result.field_nv_sigma_t[0] == pytest.approx(
        0.5 * np.hypot(1.0e6, 1.2e6) / GAMMA_NV_HZ_PER_T, rel=1e-12
    )
