"""Yield and error-bar coverage of the fitter at each signal preset of the demo instrument.

Run: ``.venv/bin/python benchmarks/fit_coverage.py [--n 2000] [--seed 1]``.

For every signal preset (:data:`demo_stream.PRESETS`: count rate, dwell, dip depth and
width, sweep) spectra are drawn independently of the demo's scenes: a field of random
size (|B| 0.1–4 mT; for a sweep laid out around a bias, that bias along the NV axis plus
up to 1.5 mT) and direction at the NV, its two transition frequencies from the exact
spin Hamiltonian (:func:`strayline.physics.transition_frequencies_hz`), Lorentzian dips of
the preset's width (with its hyperfine pattern) and of its depth times 0.7–1.3 each,
Poisson counts. The spectra are
fitted as the daemon fits them (``FitModel()`` of the preset's hyperfine, lines of 256
pixels, the pair centre at D), the field
taken with :func:`strayline.field.field_from_fit`.

Printed per preset:

- *resolvable*: spectra whose two dips each exceed 5σ under a matched filter against the
  truth, ``S = k·sqrt(b·Σ_f L(f)²)`` (the SNR of a known Lorentzian of depth ``k`` on a
  Poisson baseline of ``b`` counts per sample, common practice), and whose pair is told
  from a single dip at 5σ: on the noise-free spectrum (the "Asimov" data set of G. Cowan,
  K. Cranmer, E. Gross and O. Vitells, Eur. Phys. J. C 71, 1554 (2011)) the best single
  dip of free width leaves a likelihood-ratio χ² of at least 25; with resolved hyperfine
  lines, also each centre from its satellite alias (the dip moved by one hyperfine
  spacing, other parameters as they are: an upper bound on that χ², so the count of
  resolvable spectra is generous and the yield a conservative figure);
- *yield*: of those, the fraction fitted OK (the issue asks ≥ 98 %);
- *coverage* of OK pixels: rms of (fitted − true)/σ and the fraction within 1, 2, 3σ, for
  the two centres and for B along the NV axis (1.0 and 68.3 / 95.4 / 99.7 % expected);
- *ambiguous*: pixels whose centre has a rival solution a hyperfine spacing away;
- *false dips*: spectra of pure noise at the preset's counts that come back with a
  resonance (OK, MERGED or ONE_RESONANCE; the issue asks ≤ 0.5 %);
- *bnded*, *held*: of the MERGED pixels, the share given an upper bound on |B_NV|
  (``LineField.field_nv_bound_t``, 95 % one-sided), and of those the share whose bound
  holds the true value.

Seed 1 is the tuning seed (thresholds were looked at on it); report held-out seeds
(``--seed 2`` and up).

No assertions: a measurement to track, on spectra no detector was tuned on.
"""

from __future__ import annotations

import argparse

import numpy as np

from demo_stream import PRESETS
from strayline.field import field_from_fit
from strayline.fit import FitModel, FitStatus, fit_line
from strayline.physics import (
    GAMMA_NV_HZ_PER_T,
    hyperfine_pattern,
    lorentzian,
    transition_frequencies_hz,
)

LINE = 256


def draw(preset_name: str, n: int, seed: int) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Spectra (n, n_freq) of one preset and their truth (centres, B along the NV axis)."""
    preset = PRESETS[preset_name]
    rng = np.random.default_rng(seed)
    freq = preset.freq_hz()
    # A sweep laid out around a bias (narrow lines) sees the bias plus a sample's field
    # of up to 1.5 mT; a sweep around D sees a sample's field alone, up to 4 mT.
    bias = preset.bias_along_nv_t
    # keep both dips inside a short sweep: |γB| up to 40 % of the sweep's span
    span = float(freq[-1] - freq[0])
    top = min(4e-3 if not bias else 1.5e-3, 0.4 * span / GAMMA_NV_HZ_PER_T)
    size = rng.uniform(0.1e-3, top, n)
    cos_t = rng.uniform(-1.0, 1.0, n)
    sin_t = np.sqrt(1.0 - cos_t**2)
    phi = rng.uniform(0.0, 2 * np.pi, n)
    b = size[:, None] * np.column_stack([sin_t * np.cos(phi), sin_t * np.sin(phi), cos_t])
    if bias:
        b[:, 2] += bias
    centres = np.sort(transition_frequencies_hz(b, preset.zfs_hz), axis=-1)
    offsets, weights = hyperfine_pattern(preset.hyperfine)
    # Each transition's depth varies around the preset's (they differ in practice).
    depth = preset.contrast * rng.uniform(0.7, 1.3, (n, 2))
    base = preset.count_rate_cps * preset.dwell_s
    mean = np.full((n, freq.size), base)
    sig = np.empty((n, 2))
    alias = np.full(n, np.inf)
    spacing = np.min(np.diff(np.sort(offsets))) if offsets.size > 1 else 0.0

    def dip_shape(centre: np.ndarray) -> np.ndarray:
        return sum(
            w * lorentzian(freq[None, :], centre[:, None] + off, preset.fwhm_hz)
            for off, w in zip(offsets, weights, strict=True)
        )

    for k in range(2):
        dip = dip_shape(centres[:, k])
        mean -= base * depth[:, k : k + 1] * dip
        # Matched-filter significance of this dip alone, against the truth.
        sig[:, k] = depth[:, k] * np.sqrt(base * np.sum(dip**2, axis=1))
        for shift in (-spacing, spacing) if spacing else ():
            moved = base * depth[:, k : k + 1] * (dip - dip_shape(centres[:, k] + shift))
            alias = np.minimum(alias, np.sum(moved**2, axis=1) / base)
    counts = rng.poisson(mean)
    apart = _single_dip_chi2(freq, mean, preset.hyperfine) >= 25.0
    truth = {
        "center_hz": centres,
        "field_nv_t": b[:, 2],
        "resolvable": apart & (sig.min(1) > 5) & (alias >= 25.0),
        "significance": sig.min(1),
    }
    return counts, truth


def _single_dip_chi2(freq: np.ndarray, mean: np.ndarray, hyperfine: str | None) -> np.ndarray:
    """χ² that the best single dip (free width) leaves on noise-free spectra, shape (n,)."""
    model = FitModel(n_dips=1, hyperfine=hyperfine, line_width_spread=None)
    out = []
    for start in range(0, mean.shape[0], LINE):
        fit = fit_line(freq, mean[start : start + LINE], model)
        dof = freq.size - 4
        out.append(np.where(np.isfinite(fit.chi2_red), fit.chi2_red * dof, np.inf))
    return np.concatenate(out)


def z_stats(value: np.ndarray, sigma: np.ndarray, truth: np.ndarray) -> str:
    """rms of the normalised errors and the fractions within 1, 2, 3σ, finite entries."""
    z = (value - truth) / sigma
    z = z[np.isfinite(z)]
    if z.size == 0:
        return f"{'-':>5s} {'-':>6s} {'-':>6s} {'-':>6s}"
    within = [np.mean(np.abs(z) < k) for k in (1.0, 2.0, 3.0)]
    return f"{np.sqrt(np.mean(z**2)):5.2f} " + " ".join(f"{w:6.1%}" for w in within)


def run(preset_name: str, n: int, seed: int) -> None:
    counts, truth = draw(preset_name, n, seed)
    preset = PRESETS[preset_name]
    freq = preset.freq_hz()
    model = FitModel(hyperfine=preset.hyperfine)
    status, centre, centre_sigma, field, field_sigma, bound = [], [], [], [], [], []
    for start in range(0, n, LINE):
        fit = fit_line(freq, counts[start : start + LINE], model, pair_center_hz=preset.zfs_hz)
        line_field = field_from_fit(fit, zfs_hz=preset.zfs_hz)
        status.append(fit.status)
        centre.append(fit.center_hz)
        centre_sigma.append(fit.center_sigma_hz)
        field.append(line_field.field_nv_t)
        field_sigma.append(line_field.field_nv_sigma_t)
        bound.append(line_field.field_nv_bound_t)
    st = np.concatenate(status)
    ok = st == FitStatus.OK
    resolvable = truth["resolvable"]
    c, cs = np.concatenate(centre), np.concatenate(centre_sigma)
    f, fs = np.concatenate(field), np.concatenate(field_sigma)
    noise = np.random.default_rng(seed + 1000).poisson(
        preset.count_rate_cps * preset.dwell_s, (n, freq.size)
    )
    noise_status = np.concatenate(
        [fit_line(freq, noise[i : i + LINE], model).status for i in range(0, n, LINE)]
    )
    claimed = np.isin(noise_status, [FitStatus.OK, FitStatus.MERGED, FitStatus.ONE_RESONANCE])
    merged = st == FitStatus.MERGED
    limit = np.concatenate(bound)[merged]
    bounded = np.isfinite(limit)
    held = limit[bounded] >= np.abs(truth["field_nv_t"][merged][bounded])
    bound_share = f"{held.mean():6.1%}" if held.size else f"{'-':>6s}"
    bounded_share = f"{bounded.mean():6.1%}" if merged.any() else f"{'-':>6s}"
    counts_per_sample = preset.count_rate_cps * preset.dwell_s
    print(
        f"{preset_name:11s} {counts_per_sample:6.0f} {np.median(truth['significance']):5.1f} "
        f"{resolvable.mean():7.1%} {_share(ok, resolvable):>7s} {_share(ok, ~resolvable):>7s} "
        f"{np.mean(st == FitStatus.AMBIGUOUS):6.1%} {claimed.mean():6.2%} "
        f"{merged.mean():6.1%} {bounded_share} {bound_share}"
    )
    # CW ODMR tells |B_NV| only (no bias here): compare magnitudes.
    print(f"{'':11s} centres  {z_stats(c[ok], cs[ok], truth['center_hz'][ok])}")
    print(f"{'':11s} |B_NV|   {z_stats(np.abs(f[ok]), fs[ok], np.abs(truth['field_nv_t'][ok]))}")


def _share(ok: np.ndarray, among: np.ndarray) -> str:
    """Percentage of ``ok`` among ``among``, or "-" where there is none."""
    return f"{ok[among].mean():.1%}" if among.any() else "-"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=2000, help="spectra per preset")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    print(
        f"{args.n} spectra per preset; |B| 0.1-4 mT, random direction; gamma = "
        f"{GAMMA_NV_HZ_PER_T / 1e9:.4f} GHz/T"
    )
    print(
        f"{'preset':11s} {'counts':>6s} {'S_med':>5s} {'resolv':>7s} {'yield':>7s} "
        f"{'OK else':>7s} {'ambig':>6s} {'false':>6s} {'merged':>6s} {'bnded':>6s} {'held':>6s}"
    )
    print(f"{'':11s} {'OK pixels':8s} {'rms z':>5s} {'<1s':>6s} {'<2s':>6s} {'<3s':>6s}")
    for name in PRESETS:
        run(name, args.n, args.seed)
    print(
        "S_med: median significance of the weaker dip (matched filter); resolv: both dips "
        "> 5 sigma and the pair (and any hyperfine alias) told apart at 5 sigma; yield: OK "
        "among those; OK else: OK among the rest; ambig: AMBIGUOUS among all; false: pure-"
        "noise spectra that come back with a resonance; merged: MERGED among all; bnded: "
        "MERGED pixels given an upper bound on |B_NV|; held: bounds (95 %) that hold the "
        "truth; rms z and <ks: "
        "normalised errors of OK pixels (1.0 and 68.3 / 95.4 / 99.7 % expected)"
    )


if __name__ == "__main__":
    main()
