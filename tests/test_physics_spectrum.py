"""Tests for strayline.physics.spectrum: the CW-ODMR line-shape model."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad

from strayline.physics import HF_14N_HZ, HF_15N_HZ, hyperfine_pattern, lorentzian, lorentzian_dips

F0, F1 = 2.80e9, 2.94e9


def test_dip_depth_at_centre_is_the_contrast():
    """An isolated dip reaches baseline·(1 − C) at its centre (contrast convention, common
    practice)."""
    freq = np.array([2.82e9, 2.85e9, 2.91e9])
    counts = lorentzian_dips(freq, [2.82e9, 2.91e9], [0.12, 0.2], 1e6, 1000.0)
    # The other dip, 90 MHz away with Γ = 1 MHz, adds (Γ/2/90 MHz)² ≈ 3e-5 of its depth.
    np.testing.assert_allclose(counts[[0, 2]], [880.0, 800.0], rtol=1e-4)


def test_fwhm_is_the_full_width_at_half_depth():
    """The dip is at half depth exactly Γ/2 either side of its centre (definition of FWHM)."""
    f0, gamma = 2.87e9, 7e6
    freq = np.array([f0 - gamma / 2, f0 + gamma / 2])
    counts = lorentzian_dips(freq, [f0], [0.3], gamma, 100.0)
    np.testing.assert_allclose(counts, 100.0 * (1 - 0.15), rtol=1e-12)


def test_dip_area_matches_lorentzian_integral():
    """∫ (1 − N/N₀) df = C π Γ / 2, the integral of a unit-height Lorentzian times C
    (scipy.integrate.quad of the model against the closed form)."""
    c, gamma, f0 = 0.2, 6e6, 2.87e9

    def depth(f):
        return 1.0 - float(lorentzian_dips(np.array([f]), [f0], [c], gamma, 1.0)[0])

    area, _ = quad(depth, f0 - 1e4 * gamma, f0 + 1e4 * gamma, points=[f0], limit=400)
    # The tails beyond ±10⁴ Γ carry C Γ/(2·10⁴)·… ≈ 6e-5 of the area.
    assert area == pytest.approx(c * np.pi * gamma / 2, rel=1e-4)


def test_baseline_slope_is_referred_to_the_grid_mean():
    """With no dips, N(f) = N₀ + s (f − mean(f)) on a non-uniform grid (model definition)."""
    freq = np.array([2.80e9, 2.81e9, 2.85e9, 2.94e9])
    counts = lorentzian_dips(freq, [2.87e9], [0.0], 5e6, 500.0, slope=2e-7)
    np.testing.assert_allclose(counts, 500.0 + 2e-7 * (freq - freq.mean()), rtol=1e-14)


def test_zero_contrast_is_exactly_flat():
    """Zero contrast gives exactly the baseline at every frequency."""
    freq = np.linspace(F0, F1, 51)
    counts = lorentzian_dips(freq, [2.85e9, 2.89e9], [0.0, 0.0], 5e6, 321.0)
    assert np.all(counts == 321.0)


def test_overlapping_dips_add_their_depths():
    """Two dips at the same frequency dip by C₁ + C₂ (sum convention of the model)."""
    counts = lorentzian_dips(np.array([2.87e9]), [2.87e9, 2.87e9], [0.1, 0.15], 5e6, 1.0)
    assert float(counts[0]) == pytest.approx(0.75, rel=1e-14)


def test_14n_hyperfine_splits_into_three_equal_lines():
    """With ¹⁴N the dip splits into three lines spaced HF_14N_HZ, each of depth C/3 when
    resolved (Felton et al., PRB 79, 075203 (2009) [mem] spacing; equal split: model)."""
    f0, c = 2.87e9, 0.3
    freq = f0 + np.array([-HF_14N_HZ, 0.0, HF_14N_HZ])
    counts = lorentzian_dips(freq, [f0], [c], 0.05e6, 1.0, hyperfine="14N")
    # Neighbours 2.16 MHz away with Γ = 50 kHz add ~1e-4 of their depth.
    np.testing.assert_allclose(1 - counts, c / 3, rtol=1e-3)


def test_15n_hyperfine_splits_into_two_equal_lines():
    """With ¹⁵N the dip splits into two lines HF_15N_HZ apart, each of depth C/2 (Felton 2009
    [mem] spacing; equal split: model)."""
    f0, c = 2.87e9, 0.2
    freq = f0 + np.array([-HF_15N_HZ / 2, HF_15N_HZ / 2])
    counts = lorentzian_dips(freq, [f0], [c], 0.05e6, 1.0, hyperfine="15N")
    np.testing.assert_allclose(1 - counts, c / 2, rtol=1e-3)


@pytest.mark.parametrize("hyperfine", ["14N", "15N"])
def test_hyperfine_split_conserves_dip_area(hyperfine):
    """Splitting a dip into hyperfine lines keeps its integrated area C π Γ/2 (equal split)."""
    freq = np.linspace(2.0e9, 3.7e9, 1_700_001)
    plain = 1 - lorentzian_dips(freq, [2.87e9], [0.2], 1e6, 1.0)
    split = 1 - lorentzian_dips(freq, [2.87e9], [0.2], 1e6, 1.0, hyperfine=hyperfine)
    assert np.trapezoid(split, freq) == pytest.approx(np.trapezoid(plain, freq), rel=1e-6)


def test_unresolved_triplet_looks_like_one_dip():
    """When Γ ≫ A the ¹⁴N triplet approaches a single dip of depth C (within (A/Γ)² terms)."""
    counts = lorentzian_dips(np.array([2.87e9]), [2.87e9], [0.2], 100e6, 1.0, hyperfine="14N")
    assert 1 - float(counts[0]) == pytest.approx(0.2, rel=2e-3)


def test_batched_shapes_and_shared_width():
    """(n_pixels, n_dips) centres with a shared (n_pixels,) width and per-pixel grids give
    (n_pixels, n_freq), equal to pixel-by-pixel evaluation."""
    rng = np.random.default_rng(11)
    n_pix, n_freq = 8, 31
    freq = np.sort(rng.uniform(F0, F1, size=(n_pix, n_freq)), axis=-1)
    centers = np.stack([rng.uniform(2.82e9, 2.86e9, n_pix), rng.uniform(2.88e9, 2.92e9, n_pix)], -1)
    contrast = rng.uniform(0.05, 0.2, size=(n_pix, 2))
    width = rng.uniform(4e6, 9e6, size=n_pix)
    base = rng.uniform(500, 1500, size=n_pix)
    slope = rng.uniform(-1e-7, 1e-7, size=n_pix)
    counts = lorentzian_dips(freq, centers, contrast, width, base, slope, hyperfine="14N")
    assert counts.shape == (n_pix, n_freq)
    k = 5
    one = lorentzian_dips(
        freq[k], centers[k], contrast[k], width[k], base[k], slope[k], hyperfine="14N"
    )
    np.testing.assert_allclose(counts[k], one, rtol=1e-14)


def test_per_dip_width_broadcasts():
    """A per-dip width of shape (1,) is shared by two dips like a scalar width."""
    freq = np.linspace(F0, F1, 21)
    a = lorentzian_dips(freq, [2.85e9, 2.89e9], [0.1, 0.1], np.array([5e6]), 10.0)
    b = lorentzian_dips(freq, [2.85e9, 2.89e9], [0.1, 0.1], 5e6, 10.0)
    np.testing.assert_allclose(a, b, rtol=0)


def test_integer_inputs_are_promoted():
    """Integer frequencies and counts give float64 results equal to float inputs."""
    freq = np.array([2_850_000_000, 2_870_000_000])
    counts = lorentzian_dips(freq, [2_870_000_000], [0], 5_000_000, 1000)
    assert counts.dtype == np.float64
    np.testing.assert_array_equal(counts, [1000.0, 1000.0])


def test_lorentzian_unit_height_and_half_width():
    """L(f₀) = 1 and L(f₀ ± Γ/2) = ½ (unit-height Lorentzian)."""
    np.testing.assert_allclose(lorentzian([10.0, 12.0, 8.0], 10.0, 4.0), [1.0, 0.5, 0.5])


def test_unknown_hyperfine_is_rejected():
    """An unknown isotope raises ValueError naming the accepted values and the value found."""
    with pytest.raises(ValueError, match=r"hyperfine must be None, '14N' or '15N'; found '13C'"):
        hyperfine_pattern("13C")  # type: ignore[arg-type]
