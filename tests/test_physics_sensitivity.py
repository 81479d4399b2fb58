"""Tests for strayline.physics.sensitivity: the CW-ODMR shot-noise limit."""

from __future__ import annotations

import math

import numpy as np
import pytest

from strayline.physics import GAMMA_NV_HZ_PER_T, LINESHAPE_FACTOR, shot_noise_sensitivity_t_per_rthz


def test_worked_example_three_microtesla():
    """R = 2×10⁵ /s, C = 0.2, Δν = 10 MHz give η = 3.07 µT/√Hz (Dréau et al., PRB 84, 195204
    (2011), sensitivity formula; worked number PHYSICS.md §3 [num])."""
    eta = shot_noise_sensitivity_t_per_rthz(2e5, 0.2, 10e6)
    assert float(eta) * 1e6 == pytest.approx(3.07, abs=0.005)


@pytest.mark.parametrize(
    ("lineshape", "profile"),
    [
        ("lorentzian", lambda x: 1.0 / (1.0 + (2.0 * x) ** 2)),
        ("gaussian", lambda x: np.exp(-4.0 * math.log(2.0) * x**2)),
    ],
)
def test_lineshape_factor_from_steepest_slope(lineshape, profile):
    """P_F equals 1/(Γ · max|dL/df|) of a unit-height, unit-FWHM profile, computed numerically
    (Dréau et al. 2011: 4/(3√3) Lorentzian; √(e/8ln2) Gaussian, PHYSICS.md §3 [num])."""
    x = np.linspace(-3.0, 3.0, 600_001)
    max_slope = np.max(np.abs(np.gradient(profile(x), x)))
    assert LINESHAPE_FACTOR[lineshape] == pytest.approx(1.0 / max_slope, rel=1e-6)


def test_published_factor_values():
    """P_F is 0.7698 (Lorentzian) and 0.7002 (Gaussian) (PHYSICS.md §3 [num])."""
    assert LINESHAPE_FACTOR["lorentzian"] == pytest.approx(0.7698, abs=1e-4)
    assert LINESHAPE_FACTOR["gaussian"] == pytest.approx(0.7002, abs=1e-4)


def test_matches_brute_force_photon_budget():
    """η = δB_min √T from a signal slope R·C·γ·max|dL/df| against Poisson noise √(R T) at the
    steepest point of a numerically evaluated Lorentzian (Dréau 2011, derivation of η)."""
    rate, contrast, fwhm, t_s = 3e5, 0.15, 8e6, 1.0
    f = np.linspace(-4 * fwhm, 4 * fwhm, 400_001)
    counts = rate * t_s * (1.0 - contrast / (1.0 + (2.0 * f / fwhm) ** 2))
    slope_counts_per_t = np.max(np.abs(np.gradient(counts, f))) * GAMMA_NV_HZ_PER_T
    delta_b_min = math.sqrt(rate * t_s) / slope_counts_per_t
    eta = shot_noise_sensitivity_t_per_rthz(rate, contrast, fwhm)
    assert float(eta) == pytest.approx(delta_b_min * math.sqrt(t_s), rel=1e-5)


def test_gaussian_is_better_by_the_factor_ratio():
    """For equal FWHM a Gaussian dip gives η smaller by 0.7002/0.7698 (PHYSICS.md §3 [num])."""
    lor = shot_noise_sensitivity_t_per_rthz(1e5, 0.1, 5e6, "lorentzian")
    gau = shot_noise_sensitivity_t_per_rthz(1e5, 0.1, 5e6, "gaussian")
    assert float(gau / lor) == pytest.approx(0.7002 / 0.7698, rel=1e-3)


def test_vectorised_and_scaling():
    """η scales as Δν / (C √R) over arrays of pixels."""
    rate = np.array([1e5, 4e5, 1e5])
    contrast = np.array([0.1, 0.1, 0.2])
    fwhm = np.array([5e6, 5e6, 10e6])
    eta = shot_noise_sensitivity_t_per_rthz(rate, contrast, fwhm)
    assert eta.shape == (3,)
    assert eta[1] == pytest.approx(eta[0] / 2)
    assert eta[2] == pytest.approx(eta[0])


def test_zero_contrast_gives_infinity_without_warning():
    """No contrast means no sensitivity: η = inf, with no division warning."""
    assert np.isinf(shot_noise_sensitivity_t_per_rthz(1e5, 0.0, 5e6))


def test_unknown_lineshape_is_rejected():
    """An unknown lineshape raises ValueError naming the accepted values and the value found."""
    with pytest.raises(ValueError, match=r"lineshape must be one of .*; found 'voigt'"):
        shot_noise_sensitivity_t_per_rthz(1e5, 0.1, 5e6, "voigt")  # type: ignore[arg-type]
