"""Tests of dip detection: the matched filter, its look-elsewhere threshold, the partner
statistic, and what detection gives the fit (yield on resolvable pairs, false dips on
noise, narrow hyperfine lines)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.special import ndtr

from strayline.fit import FitModel, FitStatus, fit_line
from strayline.fit._detect import detect_dips, dip_templates, rice_threshold
from strayline.physics import hyperfine_pattern, lorentzian, lorentzian_dips

FREQ_HZ = np.linspace(2.72e9, 3.02e9, 161)
REF_HZ = float(FREQ_HZ.mean())
HALF_HZ = 0.5 * float(FREQ_HZ[-1] - FREQ_HZ[0])
X = (FREQ_HZ - REF_HZ) / HALF_HZ
ONE = (np.zeros(1), np.ones(1))


def _templates(fwhm_hz: float = 9e6):
    return dip_templates(X, fwhm_hz / HALF_HZ, *ONE)


def _depth_for(significance: float, fwhm_hz: float, baseline: float) -> float:
    """Dip depth whose matched-filter significance k √b ‖L‖ is ``significance`` (known
    shape on a Poisson baseline, common practice)."""
    shape = lorentzian(FREQ_HZ, REF_HZ, fwhm_hz)
    return significance / math.sqrt(baseline * float(np.sum(shape**2)))


def test_statistic_is_the_zero_mean_template_projection():
    """Noise-free, T at a dip's own centre is k·b·‖t̃‖²/(√b ‖t̃‖) = k √b ‖t̃‖ with t̃ the
    template minus its mean (least squares with the baseline fitted alongside), computed
    here with plain numpy."""
    tmpl = _templates()
    j = int(np.argmin(np.abs(FREQ_HZ - 2.83e9)))
    centre = FREQ_HZ[j]
    b, k = 800.0, 0.07
    y = b * (1.0 - k * lorentzian(FREQ_HZ, centre, 9e6))[None, :]
    found = detect_dips(X, y, tmpl, poisson=True, u_single=3.0, u_partner=2.0)
    t = np.zeros(FREQ_HZ.size)
    i = int(np.flatnonzero(tmpl.cand == j)[0])
    t[tmpl.k0[i] : tmpl.k0[i] + tmpl.n_taps[i]] = tmpl.values[i, : tmpl.n_taps[i]]
    t_zero_mean = t - t.mean()
    ybar = y.mean()
    expected = np.dot(ybar - y[0], t_zero_mean) / np.sqrt(ybar) / np.linalg.norm(t_zero_mean)
    assert found.significance[0, 0] == pytest.approx(expected, rel=1e-9)
    assert found.center[0, 0] == pytest.approx(X[j], abs=1e-3 * (X[1] - X[0]))


@pytest.mark.parametrize("rate", [0.05, 0.01])
def test_threshold_holds_the_stated_false_dip_rate_on_pure_noise(rate):
    """On Poisson noise without dips, the share of spectra whose largest T passes the
    threshold is at most the stated rate: the bound Φc(u) + (ℓ/2π) e^{−u²/2} (Rice, Bell
    Syst. Tech. J. 23, 282 (1944); Davies, Biometrika 74, 33 (1987); from memory) is an
    upper bound that is close for smooth templates, so the share also exceeds half of it.
    Fixed seed; 8000 spectra give ±0.25 % (1σ) at 5 %."""
    tmpl = _templates()
    u = rice_threshold(tmpl.arc, rate)
    y = np.random.default_rng(11).poisson(600.0, (8000, FREQ_HZ.size)).astype(float)
    found = detect_dips(X, y, tmpl, poisson=True, u_single=u, u_partner=u)
    share = float(np.mean(found.n_found > 0))
    assert 0.5 * rate < share <= 1.1 * rate


def test_arc_length_of_a_lorentzian_template():
    """For a Lorentzian of half width h on a fine grid, the filter output's correlation is
    the self-convolution, a Lorentzian of half width 2h, so ρ''(0) = −1/(2h²) and the arc
    length per unit centre is 1/(h√2) (Rice 1944; continuum limit, edges aside): checked
    on a grid of 20 points per half width, away from the ends, within 4 % (the templates
    are cut at four half-widths, which lengthens the arc by about 3 %)."""
    x = np.linspace(-1.0, 1.0, 4001)
    h = 0.01
    tmpl = dip_templates(x, 2 * h, *ONE, lo=-0.5, hi=0.5)
    assert tmpl.arc_per_x == pytest.approx(1.0 / (h * math.sqrt(2.0)), rel=0.04)


@given(
    arc=st.floats(min_value=0.0, max_value=1e4),
    rate=st.floats(min_value=1e-6, max_value=0.49),
)
def test_rice_threshold_solves_its_equation(arc, rate):
    """u solves Φc(u) + (arc/2π) e^{−u²/2} = rate, and grows with the arc length."""
    u = rice_threshold(arc, rate)
    assert float(ndtr(-u)) + arc / (2 * math.pi) * math.exp(-0.5 * u * u) == pytest.approx(
        rate, rel=1e-6
    )
    assert rice_threshold(arc + 10.0, rate) >= u


def test_rice_threshold_rejects_a_rate_outside_its_range():
    with pytest.raises(ValueError, match=r"false-detection rate must lie in \(0, 0.5\); found 0.7"):
        rice_threshold(10.0, 0.7)


def test_partner_statistic_is_standard_normal_beside_a_real_dip():
    """With one real dip, the partner statistic (the rest projected on the part of each
    template orthogonal to the first) is a standard normal on noise, also where the
    templates overlap: its mean and spread over the mirror window, pooled over draws, are
    0 and 1 (fixed seed)."""
    tmpl = _templates()
    rng = np.random.default_rng(5)
    mu = lorentzian_dips(FREQ_HZ, [2.87e9], [0.1], 9e6, 600.0)
    y = rng.poisson(np.broadcast_to(mu, (4000, FREQ_HZ.size))).astype(float)
    # the partner threshold at -inf reports the best partner; the pair centre sits 12 MHz
    # off the dip, so the window (±20 MHz about the mirror image) overlaps it
    found = detect_dips(
        X,
        y,
        tmpl,
        poisson=True,
        u_single=-np.inf,
        u_partner=-np.inf,
        pair_center=(2.882e9 - REF_HZ) / HALF_HZ,
        mirror_tol=20e6 / HALF_HZ,
    )
    z2 = found.significance[:, 1]
    # the best of a window of several correlated normals: above 0 on average, but far
    # below what a real dip would give, and never inflated by the overlap
    assert 0.3 < np.mean(z2) < 2.0
    assert np.quantile(z2, 0.99) < 3.8


def test_resolvable_pairs_are_fitted_ok():
    """Two dips 60–120 MHz apart, each at 5.5σ (matched filter against the truth, common
    practice), FWHM 9 MHz, 600 counts per point: at least 98 % come back OK (fixed seed)."""
    rng = np.random.default_rng(21)
    n = 1024
    depth = _depth_for(5.5, 9e6, 600.0)
    split = rng.uniform(60e6, 120e6, n)
    centre = np.stack([2.87e9 - split / 2, 2.87e9 + split / 2], axis=1)
    mu = lorentzian_dips(FREQ_HZ, centre, np.full((n, 2), depth), 9e6, 600.0)
    y = rng.poisson(mu)
    status = np.concatenate([fit_line(FREQ_HZ, y[i : i + 256]).status for i in range(0, n, 256)])
    assert np.mean(status == FitStatus.OK) >= 0.98


def test_pure_noise_rarely_shows_a_resonance():
    """Spectra of pure Poisson noise: at most the default false-dip rate (0.5 %) come back
    with a resonance (OK, MERGED or ONE_RESONANCE); fixed seed, 4096 spectra."""
    y = np.random.default_rng(8).poisson(600.0, (4096, FREQ_HZ.size))
    status = np.concatenate(
        [fit_line(FREQ_HZ, y[i : i + 256]).status for i in range(0, y.shape[0], 256)]
    )
    claimed = np.isin(status, [FitStatus.OK, FitStatus.MERGED, FitStatus.ONE_RESONANCE])
    assert np.mean(claimed) <= FitModel().false_dip_rate


def test_narrow_hyperfine_lines_below_a_megahertz_are_fitted():
    """0.8 MHz lines with the 14N triplet (2.16 MHz spacing; Felton et al., PRB 79, 075203
    (2009), from memory) on a 0.2 MHz grid, each transition at about 9σ (so that a centre
    one spacing off costs about 55 in χ², common practice for a triplet): the default
    model fits them (the FWHM floor is the grid step, not 1 MHz), the width comes back
    within 10 % and no centre is left on a satellite."""
    freq = np.concatenate([np.linspace(2.726e9, 2.846e9, 601), np.linspace(2.894e9, 3.014e9, 601)])
    off, w = hyperfine_pattern("14N")
    rng = np.random.default_rng(3)
    n = 64
    centre = np.array([2.786e9, 2.954e9])
    mean = np.full((n, freq.size), 2000.0)
    for c in centre:
        triplet = sum(wm * lorentzian(freq, c + o, 0.8e6) for o, wm in zip(off, w, strict=True))
        mean -= 2000.0 * 0.2 * triplet
    fit = fit_line(freq, rng.poisson(mean), FitModel(hyperfine="14N"))
    ok = fit.status == FitStatus.OK
    assert np.mean(ok) >= 0.95
    assert np.median(fit.fwhm_hz[ok, 0]) == pytest.approx(0.8e6, rel=0.1)
    z = (fit.center_hz[ok] - centre) / fit.center_sigma_hz[ok]
    assert np.all(np.abs(z) < 4.0)
