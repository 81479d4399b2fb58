"""Calibration of the fitter's σ correction, κ of ``FitModel.sigma_kappa``.

Run: ``.venv/bin/python benchmarks/sigma_calibration.py [--lines 40]``.

The centres' 1σ from the inverse information is too small at low signal: the likelihood
is not yet quadratic over the centre's spread. Below ``FitModel.profile_below`` the
fitter takes it from the profile likelihood; above, the next term of an estimator's
variance falls off as 1/z² (z the dip's significance, contrast / 1σ), so the fitter
widens each centre's 1σ by √(1 + κ/z²). κ is set here by simulation, protocol of
``../shared/EVALUATION.md``:

- *family*: each line draws a sweep centred on D (span 150–450 MHz, 121–301 points), a
  FWHM (5–15 MHz), counts per sample (150–3000, log-uniform) and a contrast (5–25 %,
  each dip 0.7–1.3 of it); each pixel a field of random direction and size 0.1–4 mT
  (kept inside the sweep); two Lorentzian dips at the exact spin-Hamiltonian transition
  frequencies, Poisson counts; 128 pixels per line, fitted with ``FitModel(sigma_kappa=0)``;
- *tuning seeds* 100–109 choose κ: the value on a 0.5 grid that brings the rms of
  (fitted − true)/σ closest to 1 in the significance bins where κ applies (least
  squares over bins);
- *held-out seeds* 200–209 are only reported. The demo presets (``fit_coverage.py``)
  are further held-out families; the resolved-hyperfine one was never tuned on.

Printed: per bin of z, the count of OK centres, the rms of the normalised error and the
fractions within 1, 2, 3σ (68.3 / 95.4 / 99.7 % expected), with κ = 0 and the chosen κ
(the profiled centres, below ``profile_below``, are the same in both).
No assertions: a measurement.
"""

from __future__ import annotations

import argparse
import itertools

import numpy as np

from strayline.fit import FitModel, FitStatus, fit_line
from strayline.physics import (
    D_ROOM_HZ,
    GAMMA_NV_HZ_PER_T,
    lorentzian,
    transition_frequencies_hz,
)

LINE = 128
TUNING = range(100, 110)
HELD_OUT = range(200, 210)
EDGES = (0.0, 3.5, 4.0, 4.5, 5.0, 6.0, 7.0, 9.0, 12.0, 20.0, np.inf)


def draw_lines(seed: int, n_lines: int) -> tuple[np.ndarray, np.ndarray]:
    """Significance z and normalised error (fitted − true)/σ of every OK centre."""
    rng = np.random.default_rng(seed)
    model = FitModel(sigma_kappa=0.0)  # the profile still applies below profile_below
    z_all, e_all = [], []
    for _ in range(n_lines):
        span = rng.uniform(150e6, 450e6)
        freq = np.linspace(D_ROOM_HZ - span / 2, D_ROOM_HZ + span / 2, int(rng.integers(121, 302)))
        fwhm = rng.uniform(5e6, 15e6)
        base = np.exp(rng.uniform(np.log(150.0), np.log(3000.0)))
        contrast = rng.uniform(0.05, 0.25)
        # field size up to 4 mT, and small enough that both dips stay inside the sweep
        size = rng.uniform(0.1e-3, min(4e-3, 0.4 * span / GAMMA_NV_HZ_PER_T), LINE)
        cos_t = rng.uniform(-1.0, 1.0, LINE)
        sin_t = np.sqrt(1.0 - cos_t**2)
        phi = rng.uniform(0.0, 2 * np.pi, LINE)
        field = size[:, None] * np.column_stack([sin_t * np.cos(phi), sin_t * np.sin(phi), cos_t])
        centre = np.sort(transition_frequencies_hz(field, D_ROOM_HZ), axis=-1)
        depth = contrast * rng.uniform(0.7, 1.3, (LINE, 2))
        shape = lorentzian(freq[None, None, :], centre[:, :, None], fwhm)
        counts = rng.poisson(base * (1.0 - np.sum(depth[:, :, None] * shape, axis=1)))
        fit = fit_line(freq, counts, model)
        ok = fit.status == FitStatus.OK
        z_all.append((fit.contrast / fit.contrast_sigma)[ok].ravel())
        e_all.append(((fit.center_hz - centre) / fit.center_sigma_hz)[ok].ravel())
    return np.concatenate(z_all), np.concatenate(e_all)


def pooled(seeds: range, n_lines: int) -> tuple[np.ndarray, np.ndarray]:
    parts = [draw_lines(seed, n_lines) for seed in seeds]
    z = np.concatenate([p[0] for p in parts])
    e = np.concatenate([p[1] for p in parts])
    good = np.isfinite(z) & np.isfinite(e)
    return z[good], e[good]


def widened(z: np.ndarray, e: np.ndarray, kappa: float) -> np.ndarray:
    """Normalised errors with the widening applied where the fitter applies it (centres
    of dips at or above ``FitModel.profile_below``; weaker ones get the profile)."""
    below = z < FitModel().profile_below
    return e / np.where(below, 1.0, np.sqrt(1.0 + kappa / z**2))


def bins(z: np.ndarray, e: np.ndarray, kappa: float) -> list[tuple[float, float, int, float, list]]:
    """(low, high, count, rms, fractions within 1, 2, 3σ) per significance bin."""
    scaled = widened(z, e, kappa)
    out = []
    for lo, hi in itertools.pairwise(EDGES):
        sel = (z >= lo) & (z < hi)
        if np.count_nonzero(sel) < 50:
            continue
        s = scaled[sel]
        within = [float(np.mean(np.abs(s) < k)) for k in (1.0, 2.0, 3.0)]
        out.append((lo, hi, int(sel.sum()), float(np.sqrt(np.mean(s**2))), within))
    return out


def choose_kappa(z: np.ndarray, e: np.ndarray) -> float:
    """κ on a 0.5 grid whose binned rms, where it applies, is closest to 1 (least squares)."""
    grid = np.arange(0.0, 40.5, 0.5)
    floor = FitModel().profile_below
    cost = [
        sum((rms - 1.0) ** 2 for lo, _, _, rms, _ in bins(z, e, k) if lo >= floor) for k in grid
    ]
    return float(grid[int(np.argmin(cost))])


def report(label: str, z: np.ndarray, e: np.ndarray, kappa: float) -> None:
    scaled = widened(z, e, kappa)
    print(
        f"{label}, kappa = {kappa:g}: {z.size} OK centres, rms {np.sqrt(np.mean(scaled**2)):.3f}, "
        f"within 3 sigma {np.mean(np.abs(scaled) < 3):.2%}"
    )
    for lo, hi, n, rms, (w1, w2, w3) in bins(z, e, kappa):
        print(f"  z {lo:4.1f}-{hi:<5.1f} {n:6d}  rms {rms:5.2f}  {w1:6.1%} {w2:6.1%} {w3:6.2%}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lines", type=int, default=40, help="lines per seed")
    args = parser.parse_args()
    z_t, e_t = pooled(TUNING, args.lines)
    kappa = choose_kappa(z_t, e_t)
    report("tuning seeds 100-109", z_t, e_t, 0.0)
    report("tuning seeds 100-109", z_t, e_t, kappa)
    z_h, e_h = pooled(HELD_OUT, args.lines)
    report("held-out seeds 200-209", z_h, e_h, 0.0)
    report("held-out seeds 200-209", z_h, e_h, kappa)
    print(f"chosen kappa: {kappa:g} (FitModel.sigma_kappa = {FitModel().sigma_kappa:g})")


if __name__ == "__main__":
    main()
