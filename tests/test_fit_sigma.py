"""Tests of the centres' 1σ at low signal: the widening √(1 + κ/z²) and the coverage it
gives on simulated spectra (fixed seeds)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import minimize

from strayline.fit import FitModel, FitStatus, LineFit, fit_line
from strayline.physics import lorentzian_dips

FREQ_HZ = np.linspace(2.72e9, 3.02e9, 161)


def _pairs(n: int, depth: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Counts of n two-dip spectra (9 MHz FWHM, 600 counts per point) and their centres."""
    rng = np.random.default_rng(seed)
    split = rng.uniform(50e6, 200e6, n)
    mid = 2.870e9 + rng.uniform(-3e6, 3e6, n)
    centre = np.stack([mid - split / 2, mid + split / 2], axis=1)
    mu = lorentzian_dips(FREQ_HZ, centre, np.full((n, 2), depth), 9e6, 600.0)
    return rng.poisson(mu), centre


def test_widening_is_the_stated_factor():
    """Each centre's 1σ is the information's 1σ times √(1 + κ/z²), z = contrast / 1σ of
    its dip (the form of ``FitModel.sigma_kappa``; the profile likelihood turned off);
    everything else is unchanged."""
    counts, _ = _pairs(256, 0.09, 3)
    plain = fit_line(FREQ_HZ, counts, FitModel(sigma_kappa=0.0, profile_below=0.0))
    wide = fit_line(FREQ_HZ, counts, FitModel(sigma_kappa=13.5, profile_below=0.0))
    np.testing.assert_array_equal(plain.status, wide.status)
    np.testing.assert_array_equal(plain.center_hz, wide.center_hz)
    np.testing.assert_array_equal(plain.contrast_sigma, wide.contrast_sigma)
    z = plain.contrast / plain.contrast_sigma
    np.testing.assert_allclose(
        wide.center_sigma_hz, plain.center_sigma_hz * np.sqrt(1.0 + 13.5 / z**2), rtol=1e-12
    )


@pytest.mark.parametrize(("depth", "seed"), [(0.12, 32), (0.15, 33)])
def test_centres_are_covered_at_low_signal(depth, seed):
    """At 5–7σ dips (600 counts per point, 12–15 % deep, 9 MHz FWHM), the OK centres'
    (fitted − true)/σ has an rms within 0.9–1.1 and at least 99 % lie within 3σ
    (coverage by simulation, ../shared/EVALUATION.md; 2048 spectra, fixed seeds that
    were not used to set κ). Without the widening the rms is 1.13 at 12 %."""
    counts, centre = _pairs(2048, depth, seed)
    fits = [fit_line(FREQ_HZ, counts[i : i + 256]) for i in range(0, counts.shape[0], 256)]
    status = np.concatenate([f.status for f in fits])
    ok = status == FitStatus.OK
    z = (
        (np.concatenate([f.center_hz for f in fits]) - centre)
        / np.concatenate([f.center_sigma_hz for f in fits])
    )[ok]
    assert ok.mean() > 0.5
    assert 0.9 <= np.sqrt(np.mean(z**2)) <= 1.1
    assert np.mean(np.abs(z) < 3.0) >= 0.99


def _deviance(y: np.ndarray, mu: np.ndarray) -> float:
    """Poisson likelihood-ratio χ² (Baker & Cousins, Nucl. Instrum. Methods 221, 437
    (1984)): 2 Σ [μ − y + y ln(y/μ)]."""
    mu = np.maximum(mu, 1e-9)
    return float(2.0 * np.sum(mu - y + np.where(y > 0, y * np.log(np.maximum(y, 1) / mu), 0.0)))


def _profile_rises(y: np.ndarray, fit: LineFit) -> list[float]:
    """χ² rise, over its minimum, of the weaker dip's centre held at ±3 of its reported
    σ, every other parameter refitted by scipy's Nelder–Mead on the Poisson deviance."""
    c, k, w, b = fit.center_hz[0], fit.contrast[0], fit.fwhm_hz[0, 0], fit.baseline[0]
    options = {"xatol": 1e-7, "fatol": 1e-7, "maxiter": 8000}

    def dev(q: np.ndarray, c_weak: float) -> float:
        centres = np.array([q[0] * 1e6, c_weak])
        return _deviance(y, lorentzian_dips(FREQ_HZ, centres, q[1:3], q[3] * 1e6, q[4]))

    q0 = np.array([c[0] / 1e6, k[0], k[1], w / 1e6, b])
    best = minimize(dev, q0, args=(c[1],), method="Nelder-Mead", options=options)
    rises = []
    for side in (-3.0, 3.0):
        held = c[1] + side * fit.center_sigma_hz[0, 1]
        r = minimize(dev, best.x, args=(held,), method="Nelder-Mead", options=options)
        rises.append(float(r.fun - best.fun))
    return rises


def test_weak_centres_take_the_profile_likelihood_interval():
    """A weak dip's reported centre 1σ is a sixth of its profile-likelihood 3σ interval:
    with the centre held at ±3σ and every other parameter refitted (scipy's Nelder–Mead
    on the Poisson likelihood-ratio χ²), the χ² rises by about 9 (Venzon & Moolgavkar,
    Appl. Stat. 37, 87 (1988), from memory): the two sides' mean within 9 ± 4 for each
    spectrum and 9 ± 1.5 over four (the fitter interpolates between two held fits and
    never reports less than the information's σ). No width prior here, so that the
    reference minimises the same objective. Observed when written: 10.3, 8.8, 5.7, 8.3."""
    rng = np.random.default_rng(7)
    mu = lorentzian_dips(FREQ_HZ, [2.80e9, 2.94e9], [0.10, 0.05], 9e6, 600.0)
    model = FitModel(line_width_spread=None)
    checked = []
    for _ in range(40):
        y = rng.poisson(mu)[None, :].astype(float)
        fit = fit_line(FREQ_HZ, y, model)
        z = fit.contrast[0] / fit.contrast_sigma[0]
        if fit.status[0] == FitStatus.OK and z[1] < model.profile_below:
            checked.append(float(np.mean(_profile_rises(y[0], fit))))
        if len(checked) == 4:
            break
    assert len(checked) == 4
    assert all(5.0 <= rise <= 13.0 for rise in checked), checked
    assert 7.5 <= np.mean(checked) <= 10.5, checked
