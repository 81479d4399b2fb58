"""Throughput of the batched ODMR fitter against a per-pixel scipy curve_fit loop.

Run: ``/work/venv/bin/python benchmarks/fit_throughput.py [--n 2048] [--n-ref 256]``.

Both fitters see the same simulated spectra (201 frequencies, two Lorentzian dips, Poisson
noise) and the same starting points (the batched fitter's own initial guesses); the model
has 6 parameters (2 centres, 2 contrasts, 1 shared FWHM, baseline). The baseline is an
honest one: ``curve_fit`` on the model written out in numpy (no general helper), checked
to compute the same values as the project's model. Two sets: separated
dips (60–150 MHz apart) and overlapping dips (8–15 MHz apart, FWHM 8–12 MHz).

The batched fitter runs with the default ``FitModel()``, everything ``fit_line`` does
included: the line's width by a matched filter, dip detection, one pass with the width as
a prior and σ from the observed information, the one-dip test of close pairs and the
profile likelihood of weak centres (here the whole set counts as one line).

Printed per set: spectra/s of each (wall clock, best of several runs, so that load from
other processes on the machine counts as little as possible), their ratio, the same
ratio in CPU time (the batched fitter's CPU time sums its threads, so this ratio is the
per-core efficiency and moves less with load), each one's failure rate (no result, a
non-OK status, or a centre more than 5σ from the truth), and the batched fitter's time
per spectrum in units of one fused model+Jacobian pass (the cost floor of an iteration).
Numba compile time is excluded: the fitter is warmed up before timing. No assertions.
"""

from __future__ import annotations

import argparse
import time
import warnings

import numba
import numpy as np
from scipy.optimize import OptimizeWarning, curve_fit

from strayline.fit._guess import guess_dips
from strayline.fit._kernel import fused_pass_batch
from strayline.fit.line_fit import FitModel, FitStatus, _start, fit_line
from strayline.physics import lorentzian_dips

FREQ_HZ = np.linspace(2.77e9, 2.97e9, 201)
D_HZ = 2.870e9


def simulate(n: int, split_hz: tuple[float, float], seed: int) -> tuple[dict, np.ndarray]:
    """Random two-dip spectra; returns (truth, counts of shape (n, 201))."""
    rng = np.random.default_rng(seed)
    split = rng.uniform(*split_hz, n)
    mid = D_HZ + rng.uniform(-3e6, 3e6, n)
    t = {
        "center": np.stack([mid - split / 2, mid + split / 2], axis=1),
        "contrast": rng.uniform(0.10, 0.20, (n, 2)),
        "fwhm": rng.uniform(8e6, 12e6, n),
        "baseline": rng.uniform(2000.0, 4000.0, n),
    }
    mu = lorentzian_dips(FREQ_HZ, t["center"], t["contrast"], t["fwhm"], t["baseline"])
    return t, rng.poisson(mu)


def starting_points(y: np.ndarray, model: FitModel) -> np.ndarray:
    """The batched fitter's own starting rows, in Hz: (c0, c1, C0, C1, FWHM, baseline)."""
    ref, half = FREQ_HZ.mean(), 0.5 * (FREQ_HZ[-1] - FREQ_HZ[0])
    x = (FREQ_HZ - ref) / half
    g = guess_dips(
        x,
        y.astype(np.float64),
        hf_off=np.zeros(1),
        hf_w=np.ones(1),
        fwhm_bounds=(model.fwhm_bounds_hz[0] / half, model.fwhm_bounds_hz[1] / half),
        contrast_max=model.contrast_bounds[1],
        poisson=True,
        false_dip_rate=model.false_dip_rate,
        false_partner_rate=model.false_partner_rate,
        pair_center=0.0,  # the window is centred on D
        mirror_tol=2.0 * model.pair_tolerance_hz / half,
    )
    rows = np.arange(y.shape[0])
    p = _start(model._main, g, rows, g.n_found == 1)
    p[:, :2] = ref + half * p[:, :2]
    p[:, 4] *= half
    # rows without a dip found: start at the window's quarter points
    bad = ~np.all(np.isfinite(p), axis=1)
    p[bad] = [D_HZ - 50e6, D_HZ + 50e6, 0.1, 0.1, 10e6, 3000.0]
    return p


def model_mhz(f_mhz, c0, c1, k0, k1, w, b):  # noqa: PLR0917 -- curve_fit passes positionally
    """The fit model written out in numpy, as one would for a curve_fit loop: two
    Lorentzian dips with one FWHM ``w`` on a flat baseline ``b``, frequencies, centres and
    width in MHz from D (so finite differences are sane). The same function as
    :func:`strayline.physics.lorentzian_dips` (checked in :func:`check_plain_model`)."""
    g = 0.25 * w * w
    return b * (1.0 - k0 * g / ((f_mhz - c0) ** 2 + g) - k1 * g / ((f_mhz - c1) ** 2 + g))


F_MHZ = (FREQ_HZ - D_HZ) / 1e6


def check_plain_model() -> None:
    """The plain baseline model computes what the project's model does."""
    c, k, w, b = np.array([2.84e9, 2.90e9]), np.array([0.1, 0.15]), 10e6, 3000.0
    ours = lorentzian_dips(FREQ_HZ, c, k, w, b)
    plain = model_mhz(F_MHZ, *((c - D_HZ) / 1e6), *k, w / 1e6, b)
    assert np.allclose(ours, plain, rtol=1e-12, atol=1e-9), "baseline model differs"


def curve_fit_loop(y: np.ndarray, p0_hz: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-pixel curve_fit; returns centres and their 1σ, shape (n, 2) (NaN on failure)."""
    n = y.shape[0]
    centres, sigmas = np.full((n, 2), np.nan), np.full((n, 2), np.nan)
    for i in range(n):
        p0 = p0_hz[i].copy()
        p0[:2] = (p0[:2] - D_HZ) / 1e6
        p0[4] /= 1e6
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", OptimizeWarning)
                popt, pcov = curve_fit(
                    model_mhz, F_MHZ, y[i], p0=p0, sigma=np.sqrt(np.maximum(y[i], 1.0))
                )
        except RuntimeError:
            continue
        order = np.argsort(popt[:2])
        centres[i] = D_HZ + 1e6 * popt[:2][order]
        sigmas[i] = 1e6 * np.sqrt(np.diag(pcov))[:2][order]
    return centres, sigmas


def failed(centres: np.ndarray, sigmas: np.ndarray, truth: np.ndarray) -> np.ndarray:
    """No result, or a centre more than 5σ from the truth; shape (n,)."""
    with np.errstate(invalid="ignore"):
        far = np.abs(centres - truth) > 5.0 * sigmas
    return ~np.all(np.isfinite(centres) & np.isfinite(sigmas), axis=1) | np.any(far, axis=1)


def best_of(fn, repeats: int) -> float:
    """Shortest wall-clock time of ``repeats`` calls, s."""
    return best_wall_cpu(fn, repeats)[0]


def best_wall_cpu(fn, repeats: int) -> tuple[float, float]:
    """Shortest wall-clock and shortest CPU (process) time of ``repeats`` calls, s."""
    wall = cpu = np.inf
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        wall = min(wall, time.perf_counter() - t0)
        cpu = min(cpu, time.process_time() - c0)
    return wall, cpu


def run_set(name: str, split_hz: tuple[float, float], n: int, n_ref: int, seed: int) -> None:
    model = FitModel()
    truth, y = simulate(n, split_hz, seed)
    fit_line(FREQ_HZ, y[:64], model)  # warm-up: compile or load the numba cache
    t_batch, c_batch = best_wall_cpu(lambda: fit_line(FREQ_HZ, y, model), 5)
    fit = fit_line(FREQ_HZ, y, model)
    fail_batch = failed(fit.center_hz, fit.center_sigma_hz, truth["center"]) | (
        fit.status != FitStatus.OK
    )

    # The floor: one fused model+Jacobian pass per spectrum at the true parameters.
    ref, half = FREQ_HZ.mean(), 0.5 * (FREQ_HZ[-1] - FREQ_HZ[0])
    x = (FREQ_HZ - ref) / half
    p = np.column_stack(
        [(truth["center"] - ref) / half, truth["contrast"], truth["fwhm"] / half, truth["baseline"]]
    )
    yf = np.ascontiguousarray(y, dtype=np.float64)
    args = (x, yf, p, 2, 1, np.zeros(1), np.ones(1), 0, 1)
    fused_pass_batch(*args)
    t_pass = best_of(lambda: fused_pass_batch(*args), 5)
    t_guess = best_of(lambda: starting_points(y, model), 3)

    p0 = starting_points(y[:n_ref], model)
    cf_c, cf_s = curve_fit_loop(y[:n_ref], p0)
    t_ref, c_ref = best_wall_cpu(lambda: curve_fit_loop(y[:n_ref], p0), 2)
    fail_ref = failed(cf_c, cf_s, truth["center"][:n_ref])

    rate_batch = n / t_batch
    rate_ref = n_ref / t_ref
    print(f"\n== {name} dips ({split_hz[0] / 1e6:.0f}-{split_hz[1] / 1e6:.0f} MHz apart) ==")
    print(f"batched fitter : {n} spectra in {t_batch * 1e3:8.1f} ms -> {rate_batch:10.0f} /s")
    print(f"curve_fit loop : {n_ref} spectra in {t_ref * 1e3:8.1f} ms -> {rate_ref:10.0f} /s")
    print(
        f"speed ratio    : {rate_batch / rate_ref:8.1f} x wall clock, "
        f"{(c_ref / n_ref) / (c_batch / n):8.1f} x CPU time"
    )
    print(
        f"failure rate   : batched {fail_batch.mean():6.2%} "
        f"(status counts {np.bincount(fit.status, minlength=7).tolist()}), "
        f"curve_fit {fail_ref.mean():6.2%} (same {n_ref} spectra, batched: "
        f"{fail_batch[:n_ref].mean():6.2%})"
    )
    per_spec = t_batch / n
    per_pass = t_pass / n
    print(
        f"cost           : {per_spec * 1e6:.1f} us/spectrum = {per_spec / per_pass:.1f} fused "
        f"passes ({per_pass * 1e6:.2f} us each); mean iterations {fit.n_iter.mean():.1f}; "
        f"initial guesses {t_guess / n * 1e6:.1f} us/spectrum of it"
    )


def main() -> None:
    check_plain_model()
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=2048, help="spectra for the batched fitter")
    parser.add_argument("--n-ref", type=int, default=256, help="spectra for curve_fit")
    args = parser.parse_args()
    print(
        "numba compile time excluded (warmed up first); best of 5 runs for the batch, "
        f"of 2 for curve_fit; {numba.get_num_threads()} numba threads"
    )
    run_set("separated", (60e6, 150e6), args.n, args.n_ref, seed=1)
    run_set("overlapping", (8e6, 15e6), args.n, args.n_ref, seed=2)


if __name__ == "__main__":
    main()
