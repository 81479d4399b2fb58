"""Batched ODMR fits: every spectrum of a line at once.

Pure functions over arrays; returns a frozen :class:`LineFit`.

Model (the same as :func:`strayline.physics.spectrum.lorentzian_dips`)::

    mu(f) = (b + s (f - f_ref)) * (1 - sum_i C_i sum_m w_m L(f; f_i + o_m, G_i))
    L(f; f0, G) = (G/2)^2 / ((f - f0)^2 + (G/2)^2)

with f_ref the mean of the frequency grid, C_i the contrast of dip i, G_i its FWHM, b the
off-resonance counts per sample, s the baseline slope and (o_m, w_m) the hyperfine pattern
of each dip (one component at 0 with weight 1 when no hyperfine structure is modelled).

The fit itself is one compiled call over all spectra (:mod:`strayline.fit._kernel`:
Levenberg–Marquardt on the Poisson likelihood, analytic Jacobian, box bounds); starting
points come from :mod:`strayline.fit._guess`. Everything that depends on the
:class:`FitModel` is settled when the model is built, so :func:`fit_line` only scales the
grid and runs.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from enum import IntEnum
from typing import Literal

import numpy as np

from strayline._numbers import median
from strayline.fit._guess import DipGuess, guess_dips
from strayline.fit._kernel import MAX_ITER, lm_batch
from strayline.fit._layout import Layout as _Layout
from strayline.fit._refits import (
    MIN_POOLED,
    best_alias,
    looser_prior,
    profile_sigma,
)
from strayline.physics import GAMMA_NV_HZ_PER_T, hyperfine_pattern

#: Tolerance (standard deviations) of the one-dip fits that only test a close pair.
TEST_XTOL = 0.1

__all__ = ["FitModel", "FitStatus", "LineFit", "fit_line"]


class FitStatus(IntEnum):
    """Outcome of one spectrum's fit. A failed fit is a value, never an exception."""

    OK = 0
    NO_RESONANCE = 1  # no dip above the noise
    MERGED = 2  # the two dips could not be separated (|gamma B_par| below ~ half a linewidth)
    AT_BOUND = 3  # a parameter ended on its bound
    NOT_CONVERGED = 4  # iteration limit reached
    LOW_COUNTS = 5  # too few photons to fit
    ONE_RESONANCE = 6  # two-dip model asked for, only one dip inside the window
    AMBIGUOUS = 7  # another solution, a hyperfine spacing away, fits about as well


#: Statuses that are measurements: a fitted field, or (merged dips) a bound on it.
MEASURED = frozenset({FitStatus.OK, FitStatus.MERGED})


def failed_fits(status: np.ndarray) -> np.ndarray:
    """Where a pixel's fit failed: its status is no measurement (:data:`MEASURED`). A
    merged pixel is not a failure: its field is below resolution and bounded."""
    return ~np.isin(np.asarray(status), [int(s) for s in MEASURED])


@dataclass(frozen=True, eq=False)
class LineFit:
    """Fit results for the n_pixels spectra of one line.

    Dip columns are ordered by frequency (column 0 = lower resonance). For the one-dip
    model, column 1 is NaN. Sigmas are 1σ.

    Attributes
    ----------
    center_hz, center_sigma_hz : ndarray, shape (n_pixels, 2)
        Resonance frequencies, Hz.
    contrast, contrast_sigma : ndarray, shape (n_pixels, 2)
        Fractional dip depth (0.1 = 10 %).
    fwhm_hz, fwhm_sigma_hz : ndarray, shape (n_pixels, 2)
        Full width at half maximum, Hz (equal columns when widths are shared).
    baseline, baseline_sigma : ndarray, shape (n_pixels,)
        Off-resonance counts per sample.
    slope : ndarray, shape (n_pixels,)
        Baseline slope, counts per sample per Hz (0 when not fitted).
    chi2_red : ndarray, shape (n_pixels,)
        Reduced χ² of the fit.
    status : ndarray of uint8, shape (n_pixels,)
        :class:`FitStatus` codes.
    n_iter : ndarray of int32, shape (n_pixels,)
        Iterations used (every refit of the spectrum included).
    line_fwhm_hz : float
        The line's FWHM as the matched filter measured it, Hz (NaN when no spectrum was
        searched for dips).
    """

    center_hz: np.ndarray
    center_sigma_hz: np.ndarray
    contrast: np.ndarray
    contrast_sigma: np.ndarray
    fwhm_hz: np.ndarray
    fwhm_sigma_hz: np.ndarray
    baseline: np.ndarray
    baseline_sigma: np.ndarray
    slope: np.ndarray
    chi2_red: np.ndarray
    status: np.ndarray
    n_iter: np.ndarray
    line_fwhm_hz: float = math.nan

    @property
    def n_pixels(self) -> int:
        return int(self.status.shape[0])


Weighting = Literal["poisson", "unweighted"]
Hyperfine = Literal["14N", "15N"] | None


@dataclass(frozen=True)
class FitModel:
    """What to fit and how; settled once, then used for every line.

    Attributes
    ----------
    n_dips : {1, 2}
        Number of resonances in the window.
    shared_width : bool
        One FWHM for both dips (True) or one each.
    hyperfine : {None, "14N", "15N"}
        Resolve each dip into its nitrogen hyperfine components (fixed spacing, equal
        shares of the contrast; :func:`strayline.physics.spectrum.hyperfine_pattern`).
    fit_slope : bool
        Fit a linear baseline slope (otherwise the slope is 0).
    fwhm_bounds_hz : (float, float)
        Allowed FWHM, Hz.
    contrast_bounds : (float, float)
        Allowed contrast (fraction).
    center_bounds_hz : (float, float) or None
        Allowed resonance frequencies, Hz; None = the frequency window of the line (a given
        range is intersected with the window).
    weighting : {"poisson", "unweighted"}
        "poisson": maximum likelihood for Poisson counts (weights 1/max(mu, 1)), 1σ from
        the Fisher information. "unweighted": least squares, 1σ scaled by the residual
        variance.
    max_iter : int
        Iteration limit per spectrum (NOT_CONVERGED beyond it).
    xtol_sigma : float
        Stop when the distance to the minimum is below this many standard deviations
        (0.01σ adds 0.005 % to a parameter's variance; 1e-3 cost one more iteration per
        pass for nothing measurable).
    min_counts : float
        Mean counts per sample below which a spectrum is LOW_COUNTS and not fitted.
    min_significance : float
        A dip is real when contrast ≥ min_significance × its 1σ (else NO_RESONANCE, or
        ONE_RESONANCE when the other dip is real).
    partner_significance : float
        Two-dip model: a pair of dips at least max(FWHM, 4 ``pair_tolerance_hz``) apart
        whose midpoint lies within ``pair_tolerance_hz`` of the pair centre is kept when its
        weaker dip reaches this many σ and z₀² + z₁² ≥ min_significance² +
        partner_significance² (see :func:`fit_line`).
    pair_tolerance_hz : float
        How far the midpoint (f₋ + f₊)/2 of a pair may lie from the pair centre. It moves
        by 3(γB⊥)²/(2D): +3.7 MHz at B⊥ = 3 mT, +10 MHz at 5 mT (PHYSICS.md §2), plus
        temperature (−74 kHz/K) and strain.
    transverse_field_max_t : float
        Largest field transverse to the NV axis the sample may have, T: the midpoint may
        lie a further 3(γB⊥)²/(2D) *above* the pair centre (the transverse field only
        raises it; PHYSICS.md §2). 0 adds nothing (fields of a few mT are within
        ``pair_tolerance_hz``); strong-field samples need it (+41 MHz at 10 mT).
    line_width_spread : float or None
        Relative 1σ by which the true FWHM may differ between the pixels of one line. The
        linewidth is set by the NV and the microwave and laser powers, which a line does
        not change (common practice), so the line's FWHM (measured by the matched filter
        on its clearest dips) enters every pixel's fit as a Gaussian prior of this
        relative width. This tames noise-driven narrow-width solutions at low counts;
        at high counts the data outweigh it. None fits every width freely.
    false_dip_rate : float
        Chance that a spectrum of pure noise shows a dip: the detection threshold of the
        matched filter over the sweep is set from it by the look-elsewhere effect
        (:mod:`strayline.fit._detect`). Spectra without a detected dip are NO_RESONANCE.
    false_partner_rate : float
        Chance that noise fakes a partner inside the mirror window of a real dip (the
        window where a Zeeman partner must lie, ``2 pair_tolerance_hz`` wide); sets the
        partner's detection threshold the same way.
    split_chi2 : float
        Likelihood-ratio χ² by which a solution must beat its rival: two close dips
        against one broadened dip, a centre against its hyperfine alias. 9.2 is the 1 %
        point of χ² with two degrees of freedom (the two extra parameters of a second
        dip); as posterior odds between two solutions with equal priors it is 1 : 100.
    sigma_kappa : float
        Correction of the centres' 1σ for dips at or above ``profile_below``: each is
        widened by √(1 + κ/z²), z the significance (contrast / 1σ) of its dip. The inverse
        information is the leading term of an estimator's variance, whose next term falls
        off as 1/z² (the likelihood is not quite quadratic over the centre's spread); κ is
        calibrated by simulation on a family of random sweeps, widths, counts and
        contrasts (tuning seeds; ``benchmarks/sigma_calibration.py``). 0 reports the
        inverse information alone.
    profile_below : float
        Centres of dips weaker than this significance take their 1σ from the profile
        likelihood (:func:`~strayline.fit._refits.profile_sigma`), which follows the
        likelihood where it is far from quadratic. With κ = 9 and 6, the rms of
        (fitted − true)/σ of OK centres on held-out seeds of that family is 1.02 (1.15
        with neither) and 99.4 % lie within 3σ (98.9 %). 0 turns the profile off.
    pair_center_hz : float or None
        Expected midpoint (f₋ + f₊)/2 of the two resonances (≈ D), Hz; None = the middle of
        the line's frequency window. A single dip within half the line's FWHM (plus 3σ
        of its centre) of it, and within ``merge_radius_hz``, is two merged resonances
        (MERGED); farther away it is ONE_RESONANCE.
    merge_radius_hz : float
        See ``pair_center_hz``.
    """

    n_dips: int = 2
    shared_width: bool = True
    hyperfine: Hyperfine = None
    fit_slope: bool = False
    fwhm_bounds_hz: tuple[float, float] = (0.1e6, 60e6)
    contrast_bounds: tuple[float, float] = (0.0, 0.6)
    center_bounds_hz: tuple[float, float] | None = None
    weighting: Weighting = "poisson"
    max_iter: int = 100
    xtol_sigma: float = 1e-2
    min_counts: float = 3.0
    min_significance: float = 4.0
    partner_significance: float = 2.5
    false_dip_rate: float = 0.005
    false_partner_rate: float = 0.05
    split_chi2: float = 9.2
    sigma_kappa: float = 9.0
    profile_below: float = 6.0
    pair_center_hz: float | None = None
    merge_radius_hz: float = 20e6
    pair_tolerance_hz: float = 10e6
    transverse_field_max_t: float = 0.0
    line_width_spread: float | None = 0.1
    _main: _Layout = field(init=False, repr=False, compare=False)
    _single: _Layout = field(init=False, repr=False, compare=False)
    _hf_off_hz: np.ndarray = field(init=False, repr=False, compare=False)
    _hf_w: np.ndarray = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        problems = []
        if self.n_dips not in (1, 2):
            problems.append(f"n_dips must be 1 or 2; found {self.n_dips!r}")
        if self.hyperfine not in (None, "14N", "15N"):
            problems.append(f"hyperfine must be None, '14N' or '15N'; found {self.hyperfine!r}")
        if self.weighting not in ("poisson", "unweighted"):
            problems.append(
                f"weighting must be 'poisson' or 'unweighted'; found {self.weighting!r}"
            )
        lo_w, hi_w = self.fwhm_bounds_hz
        if not 0.0 < lo_w < hi_w:
            problems.append(f"fwhm_bounds_hz must be 0 < low < high; found {(lo_w, hi_w)}")
        lo_c, hi_c = self.contrast_bounds
        if not 0.0 <= lo_c < hi_c < 1.0:
            problems.append(f"contrast_bounds must be 0 <= low < high < 1; found {(lo_c, hi_c)}")
        if self.center_bounds_hz is not None and not (
            self.center_bounds_hz[0] < self.center_bounds_hz[1]
        ):
            problems.append(f"center_bounds_hz must be low < high; found {self.center_bounds_hz}")
        if self.max_iter < 1:
            problems.append(f"max_iter must be >= 1; found {self.max_iter}")
        if not self.xtol_sigma > 0.0:
            problems.append(f"xtol_sigma must be > 0; found {self.xtol_sigma}")
        if not 0.0 < self.partner_significance <= self.min_significance:
            problems.append(
                "partner_significance must be > 0 and <= min_significance = "
                f"{self.min_significance}; found {self.partner_significance}"
            )
        if self.line_width_spread is not None and not self.line_width_spread > 0.0:
            problems.append(
                f"line_width_spread must be > 0 or None; found {self.line_width_spread}"
            )
        for name in ("false_dip_rate", "false_partner_rate"):
            rate = getattr(self, name)
            if not 0.0 < rate < 0.5:
                problems.append(f"{name} must lie in (0, 0.5); found {rate}")
        if not self.profile_below >= 0.0:
            problems.append(f"profile_below must be >= 0; found {self.profile_below}")
        if not self.sigma_kappa >= 0.0:
            problems.append(f"sigma_kappa must be >= 0; found {self.sigma_kappa}")
        if not self.pair_tolerance_hz >= 0.0:
            problems.append(f"pair_tolerance_hz must be >= 0; found {self.pair_tolerance_hz}")
        if not (math.isfinite(self.transverse_field_max_t) and self.transverse_field_max_t >= 0):
            problems.append(
                f"transverse_field_max_t must be a finite number >= 0; found "
                f"{self.transverse_field_max_t}"
            )
        if problems:
            raise ValueError("FitModel: " + "; ".join(problems))
        n_widths = 1 if self.shared_width else self.n_dips
        off, w = hyperfine_pattern(self.hyperfine)
        object.__setattr__(self, "_main", _Layout(self.n_dips, n_widths, self.fit_slope))
        object.__setattr__(self, "_single", _Layout(1, 1, self.fit_slope))
        object.__setattr__(self, "_hf_off_hz", np.array(off))
        object.__setattr__(self, "_hf_w", np.array(w))


def _bounds(
    layout: _Layout,
    model: FitModel,
    x: np.ndarray,
    *,
    half_hz: float,
    ref_hz: float,
    fwhm_lo_hz: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Box bounds of a kernel row in scaled units, shape (n_par,) each."""
    nd, nw = layout.n_dips, layout.n_widths
    lo = np.full(layout.n_par, -np.inf)
    hi = np.full(layout.n_par, np.inf)
    c_lo, c_hi = x[0], x[-1]
    if model.center_bounds_hz is not None:
        c_lo = max(c_lo, (model.center_bounds_hz[0] - ref_hz) / half_hz)
        c_hi = min(c_hi, (model.center_bounds_hz[1] - ref_hz) / half_hz)
        if c_hi <= c_lo:  # the narrowed range misses this window: keep the window
            c_lo, c_hi = x[0], x[-1]
    lo[:nd], hi[:nd] = c_lo, c_hi
    lo[nd : 2 * nd], hi[nd : 2 * nd] = model.contrast_bounds
    lo[2 * nd : 2 * nd + nw] = fwhm_lo_hz / half_hz
    hi[2 * nd : 2 * nd + nw] = model.fwhm_bounds_hz[1] / half_hz
    lo[layout.i_baseline] = 0.0
    return lo, hi


def _start(layout: _Layout, guess: DipGuess, rows: np.ndarray, split: np.ndarray) -> np.ndarray:
    """Kernel starting rows, shape (len(rows), n_par).

    Two-dip rows with one dip found (``split``) start as a symmetric pair around it: two
    dips a quarter FWHM either side, 0.8 of the line's width and 0.7 of its contrast each
    (their sum then has about the depth and width of the single dip).
    """
    nd = layout.n_dips
    c = guess.center[rows]
    k = guess.contrast[rows]
    w = guess.fwhm
    p = np.zeros((rows.shape[0], layout.n_par))
    if nd == 1:
        p[:, 0], p[:, 1], p[:, 2] = c[:, 0], k[:, 0], w
    else:
        sp = split[rows]
        c_pair = np.where(sp[:, None], c[:, :1] + np.array([-0.25, 0.25]) * w, np.sort(c, axis=1))
        order = np.argsort(c, axis=1)
        k_pair = np.where(sp[:, None], 0.7 * k[:, :1], np.take_along_axis(k, order, axis=1))
        p[:, 0:2] = c_pair
        p[:, 2:4] = k_pair
        w_pair = np.where(sp, 0.8 * w, w)
        p[:, 4 : 4 + layout.n_widths] = w_pair[:, None]
    p[:, layout.i_baseline] = guess.baseline[rows]
    return p


def _run(
    layout: _Layout,
    *,
    model: FitModel,
    x: np.ndarray,
    y: np.ndarray,
    p0: np.ndarray,
    half_hz: float,
    ref_hz: float,
    fwhm_lo_hz: float,
    width_prior: tuple[float, float] = (0.0, 0.0),
    pin: tuple[np.ndarray, np.ndarray] | None = None,
    xtol_sigma: float | None = None,
) -> dict[str, np.ndarray]:
    """Run the kernel on the rows of ``y``; returns the raw (scaled) results.

    ``width_prior`` = (centre, inverse variance) of a Gaussian prior on the widths, scaled
    units; (0, 0) for none. Converges to ``xtol_sigma`` (default ``model.xtol_sigma``); σ
    from the observed information. ``pin`` = (parameter index, value) per row holds that
    parameter.
    """
    lo1, hi1 = _bounds(layout, model, x, half_hz=half_hz, ref_hz=ref_hz, fwhm_lo_hz=fwhm_lo_hz)
    lo = np.ascontiguousarray(np.broadcast_to(lo1, p0.shape))
    hi = np.ascontiguousarray(np.broadcast_to(hi1, p0.shape))
    if pin is not None:  # hold parameter pin[0][r] of row r at pin[1][r]
        rows = np.arange(p0.shape[0])
        lo[rows, pin[0]] = hi[rows, pin[0]] = pin[1]
    p = np.ascontiguousarray(np.clip(p0, lo, hi))
    sigma, chi2, objective, n_iter, code = lm_batch(
        x,
        y,
        p,
        lo,
        hi,
        layout.n_dips,
        layout.n_widths,
        model._hf_off_hz / half_hz,
        model._hf_w,
        int(layout.has_slope),
        int(model.weighting == "poisson"),
        float(width_prior[0]),
        float(width_prior[1]),
        int(model.max_iter),
        float(model.xtol_sigma if xtol_sigma is None else xtol_sigma),
    )
    at_bound = np.any((p == lo) | (p == hi), axis=1)
    return {
        "p": p,
        "sigma": sigma,
        "chi2": chi2,
        "objective": objective,
        "n_iter": n_iter,
        "code": code,
        "at_bound": at_bound,
    }


def transverse_shift_hz(b_perp_t: float, zfs: float) -> float:
    """Rise of the midpoint (f₋ + f₊)/2 of the two resonances in a transverse field,
    3(γB⊥)²/(2D), Hz (second-order perturbation theory of the spin Hamiltonian;
    PHYSICS.md §2)."""
    return 3.0 * (GAMMA_NV_HZ_PER_T * b_perp_t) ** 2 / (2.0 * zfs)


def _merge_rows(
    mask: np.ndarray, where_true: dict[str, np.ndarray], where_false: dict[str, np.ndarray]
) -> dict[str, np.ndarray]:
    """Kernel results of two disjoint row sets put back in the order of ``mask``."""
    out = {}
    for k, a in where_true.items():
        b = where_false[k]
        merged = np.empty((mask.shape[0], *a.shape[1:]), dtype=np.result_type(a, b))
        merged[mask] = a
        merged[~mask] = b
        out[k] = merged
    return out


def _significance(res: dict[str, np.ndarray], nd: int) -> np.ndarray:
    """Per dip: contrast / its 1σ (0 where σ is not finite or the contrast is 0), (n, nd)."""
    con = res["p"][:, nd : 2 * nd]
    sig = res["sigma"][:, nd : 2 * nd]
    good = np.isfinite(sig) & (sig > 0.0) & (con > 0.0)
    return np.where(good, con / np.where(good, sig, 1.0), 0.0)


def _pair_kept(
    res: dict[str, np.ndarray],
    model: FitModel,
    *,
    n_widths: int,
    detected_two: np.ndarray,
    pair_x: float,
    tol_x: float,
) -> np.ndarray:
    """Two-dip rows that stay two dips, shape (n,).

    The two resonances of one NV lie symmetric about D (PHYSICS.md §2), so a pair is kept
    only with its midpoint within ``tol_x`` of the pair centre; two dips far from that
    symmetry are not one NV's pair (a noise dip beside a real one, most often) and fall
    to the one-dip fit. Symmetric pairs are kept when the fitted dips are at least half a
    FWHM apart and both reach ``min_significance``, or when the matched filter found the
    partner (``detected_two``) at least two FWHM from the first dip and the weaker fitted
    dip still reaches ``partner_significance``. Closer dips get no such allowance, since
    noise readily splits one broad dip into two (common practice); they must also beat
    one broadened dip (:func:`fit_line`). The allowance once started at max(FWHM, 4 tol)
    so that the partner's window excluded the first dip; with the partner scored
    orthogonally to the first dip and the one-dip test for close pairs, two FWHM serves,
    and pairs of a short sweep (80 MHz at 4 K, 6 MHz lines) are no longer lost (yield on
    the demo's cryo-film preset 76 % → 96 %).
    """
    p = res["p"]
    z = _significance(res, 2)
    sep = np.abs(p[:, 1] - p[:, 0])
    width = np.max(p[:, 4 : 4 + n_widths], axis=1)
    z_min = np.min(z, axis=1)
    symmetric = np.abs(0.5 * (p[:, 0] + p[:, 1]) - pair_x) <= tol_x
    both = (z_min >= model.min_significance) & (sep >= 0.5 * width)
    far = sep >= 2.0 * width  # closer pairs face the one-broadened-dip test instead
    partner = detected_two & far & (z_min >= model.partner_significance)
    return symmetric & (both | partner)


def _close(res: dict[str, np.ndarray], layout: _Layout) -> np.ndarray:
    """Two-dip rows whose dips lie within two FWHM of each other, shape (n,)."""
    if layout.n_dips == 1:
        return np.zeros(res["p"].shape[0], dtype=bool)
    p = res["p"]
    width = np.max(p[:, 4 : 4 + layout.n_widths], axis=1)
    return np.abs(p[:, 1] - p[:, 0]) < 2.0 * width


class _Out:
    """Mutable assembly area for a LineFit (n pixels)."""

    def __init__(self, n: int, sigma_kappa: float) -> None:
        self.sigma_kappa = sigma_kappa
        nan2 = np.full((n, 2), np.nan)
        self.center, self.center_s = nan2.copy(), nan2.copy()
        self.contrast, self.contrast_s = nan2.copy(), nan2.copy()
        self.fwhm, self.fwhm_s = nan2.copy(), nan2.copy()
        self.baseline, self.baseline_s = np.full(n, np.nan), np.full(n, np.nan)
        self.slope = np.zeros(n)
        self.chi2 = np.full(n, np.nan)
        self.status = np.full(n, FitStatus.NO_RESONANCE, dtype=np.uint8)
        self.n_iter = np.zeros(n, dtype=np.int32)
        self.line_fwhm_hz = math.nan

    def put(
        self,
        rows: np.ndarray,
        layout: _Layout,
        res: dict[str, np.ndarray],
        half: float,
        ref: float,
    ) -> None:
        """Write fitted rows, dips ordered by frequency."""
        nd, nw = layout.n_dips, layout.n_widths
        p, s = res["p"], res["sigma"]
        order = np.argsort(p[:, :nd], axis=1)

        def take(a: np.ndarray) -> np.ndarray:
            return np.take_along_axis(a, order, axis=1)

        self.center[rows, :nd] = ref + half * take(p[:, :nd])
        self.contrast[rows, :nd] = take(p[:, nd : 2 * nd])
        self.contrast_s[rows, :nd] = take(s[:, nd : 2 * nd])
        z = np.abs(self.contrast[rows, :nd]) / self.contrast_s[rows, :nd]
        with np.errstate(divide="ignore", invalid="ignore"):
            widen = np.sqrt(1.0 + self.sigma_kappa / (z * z))
        widen = np.where(np.isfinite(widen), widen, 1.0)
        if "profiled" in res:
            widen = np.where(take(res["profiled"]), 1.0, widen)
        self.center_s[rows, :nd] = half * take(s[:, :nd]) * widen
        if nw == 1:
            self.fwhm[rows, :nd] = half * p[:, 2 * nd : 2 * nd + 1]
            self.fwhm_s[rows, :nd] = half * s[:, 2 * nd : 2 * nd + 1]
        else:
            self.fwhm[rows, :nd] = half * take(p[:, 2 * nd : 2 * nd + nw])
            self.fwhm_s[rows, :nd] = half * take(s[:, 2 * nd : 2 * nd + nw])
        self.baseline[rows] = p[:, layout.i_baseline]
        self.baseline_s[rows] = s[:, layout.i_baseline]
        self.slope[rows] = p[:, layout.i_baseline + 1] / half if layout.has_slope else 0.0
        self.chi2[rows] = res["chi2"]
        self.n_iter[rows] = res["n_iter"]

    def freeze(self) -> LineFit:
        return LineFit(
            center_hz=self.center,
            center_sigma_hz=self.center_s,
            contrast=self.contrast,
            contrast_sigma=self.contrast_s,
            fwhm_hz=self.fwhm,
            fwhm_sigma_hz=self.fwhm_s,
            baseline=self.baseline,
            baseline_sigma=self.baseline_s,
            slope=self.slope,
            chi2_red=self.chi2,
            status=self.status,
            n_iter=self.n_iter,
            line_fwhm_hz=self.line_fwhm_hz,
        )


def _mark_ambiguous(status: np.ndarray, rows: np.ndarray, ambiguous: np.ndarray) -> None:
    """OK rows among ``rows`` whose solution has a rival become AMBIGUOUS."""
    target = rows[ambiguous]
    status[target[status[target] == FitStatus.OK]] = FitStatus.AMBIGUOUS


def _quality(res: dict[str, np.ndarray], good: FitStatus) -> np.ndarray:
    """NOT_CONVERGED, else AT_BOUND, else ``good``; shape (n,)."""
    status = np.full(res["code"].shape, good, dtype=np.uint8)
    status[res["at_bound"]] = FitStatus.AT_BOUND
    status[res["code"] == MAX_ITER] = FitStatus.NOT_CONVERGED
    return status


def fit_line(
    freq_hz: np.ndarray,
    counts: np.ndarray,
    model: FitModel | None = None,
    *,
    pair_center_hz: float | None = None,
) -> LineFit:
    """Fit every ODMR spectrum of one scan line.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freq,)
        Microwave frequencies, Hz, strictly increasing (may be non-uniform).
    counts : ndarray, shape (n_pixels, n_freq)
        Photon counts per sample (any real or integer dtype).
    model : FitModel, optional
        What to fit; default ``FitModel()`` (two dips, shared width, Poisson weights).
    pair_center_hz : float, optional
        Expected midpoint of the two resonances for this line, Hz (D at the line's
        temperature); overrides ``model.pair_center_hz``.

    Returns
    -------
    LineFit
        One row per pixel. Fitted quantities are NaN where the status says there is no
        such value: LOW_COUNTS and NO_RESONANCE rows carry only the baseline (the mean
        counts and its 1σ); MERGED and ONE_RESONANCE rows (two-dip model) carry the single
        visible dip in column 0.

    Raises
    ------
    ValueError
        For a wrong call: arrays of the wrong dimensions or shapes, too few frequencies
        for the model, a frequency grid that is not finite and strictly increasing. Bad
        spectra never raise; they get a status.

    Notes
    -----
    Spectra whose mean is below ``model.min_counts`` (or that hold non-finite values)
    are LOW_COUNTS. The others are searched for dips by a matched filter at the line's
    width (:func:`strayline.fit._guess.guess_dips`), with the threshold set by the
    look-elsewhere effect for ``false_dip_rate``; without a dip they are NO_RESONANCE.
    The rest are fitted together by :func:`strayline.fit._kernel.lm_batch`. With the
    two-dip model, a fit that is not a significant Zeeman pair (:func:`_pair_kept`) is
    refitted with one dip, and so is a pair closer than two FWHM, which stays a pair only
    when two dips beat one broadened dip by ``split_chi2`` in likelihood-ratio χ²; a single
    dip is MERGED when it lies within half the line's FWHM of the pair centre,
    ONE_RESONANCE otherwise. With resolved hyperfine lines, every kept fit is also tried
    one hyperfine spacing either side (:func:`~strayline.fit._refits.best_alias`): the
    best solution is kept, and a rival within ``split_chi2`` makes the pixel AMBIGUOUS.

    With ``line_width_spread`` set, every width has the line's FWHM (as the matched filter
    measured it on the line's clearest dips) as a Gaussian prior, in one pass to
    ``xtol_sigma`` with σ from the observed information. Before the matched filter gave
    the line's width, a first pass without the prior had to pool it (the kept fits'
    median), which at low signal came out narrow (8.7 MHz for 10 MHz lines at 4σ dips)
    and cost a third of the fit's time.
    """
    model = FitModel() if model is None else model
    freq = np.asarray(freq_hz, dtype=np.float64)
    y = np.ascontiguousarray(counts, dtype=np.float64)
    if not y.flags.writeable:  # read-only arrays would compile another kernel specialisation
        y = y.copy()
    layout = model._main
    if freq.ndim != 1:
        raise ValueError(f"freq_hz must have shape (n_freq,); found shape {freq.shape}")
    if y.ndim != 2 or y.shape[1] != freq.shape[0]:
        raise ValueError(
            f"counts must have shape (n_pixels, n_freq) = (n_pixels, {freq.shape[0]}); "
            f"found shape {y.shape}"
        )
    n_min = max(8, layout.n_par + 2)
    if freq.shape[0] < n_min:
        raise ValueError(f"freq_hz must hold at least {n_min} frequencies; found {freq.shape[0]}")
    if not (np.all(np.isfinite(freq)) and np.all(np.diff(freq) > 0.0)):
        raise ValueError("freq_hz must be finite and strictly increasing; it is not")

    n_pix, n_freq = y.shape
    ref = float(np.mean(freq))
    half = 0.5 * float(freq[-1] - freq[0])
    x = (freq - ref) / half
    out = _Out(n_pix, model.sigma_kappa)

    finite = np.all(np.isfinite(y), axis=1)
    mean = np.where(finite, np.mean(np.where(finite[:, None], y, 0.0), axis=1), np.nan)
    with np.errstate(invalid="ignore"):
        low = ~finite | (mean < model.min_counts)
    # Rows that end without dips carry the constant-model baseline (the mean) and its 1σ.
    if model.weighting == "poisson":
        mean_s = np.sqrt(np.maximum(mean, 1.0) / n_freq)
    else:
        mean_s = np.std(y, axis=1, ddof=1) / np.sqrt(n_freq)
    out.baseline[:] = mean
    out.baseline_s[:] = np.where(finite, mean_s, np.nan)
    with np.errstate(invalid="ignore"):
        out.chi2[:] = (
            np.sum((y - mean[:, None]) ** 2, axis=1) / np.maximum(mean, 1.0) / (n_freq - 1)
        )
    out.status[low] = FitStatus.LOW_COUNTS

    cand = np.flatnonzero(~low)
    if cand.size == 0:
        return out.freeze()
    hf_off = model._hf_off_hz / half
    if pair_center_hz is None:
        pair_center_hz = model.pair_center_hz
    pair_center = ref if pair_center_hz is None else float(pair_center_hz)
    # The window of the pair's midpoint, [D − tol, D + tol + 3(γB⊥max)²/(2D)]: the
    # transverse field only raises it (PHYSICS.md §2); its centre and half-width here.
    lift_hz = transverse_shift_hz(model.transverse_field_max_t, pair_center)
    pair_x = (pair_center + 0.5 * lift_hz - ref) / half
    tol_x = (model.pair_tolerance_hz + 0.5 * lift_hz) / half
    fwhm_lo = max(model.fwhm_bounds_hz[0], median(np.diff(freq)))
    c_lo, c_hi = _bounds(layout, model, x, half_hz=half, ref_hz=ref, fwhm_lo_hz=fwhm_lo)
    guess = guess_dips(
        x,
        y[cand],
        hf_off=hf_off,
        hf_w=model._hf_w,
        fwhm_bounds=(fwhm_lo / half, model.fwhm_bounds_hz[1] / half),
        contrast_max=model.contrast_bounds[1],
        poisson=model.weighting == "poisson",
        false_dip_rate=model.false_dip_rate,
        false_partner_rate=model.false_partner_rate,
        center_range=(float(c_lo[0]), float(c_hi[0])),
        # the partner's mirror image 2·pc − c₁ moves by twice the midpoint's tolerance
        pair_center=pair_x if layout.n_dips == 2 else np.nan,
        mirror_tol=2.0 * tol_x,
    )
    out.line_fwhm_hz = guess.fwhm * half
    fit_rows = np.flatnonzero(guess.n_found > 0)  # indices into cand
    if fit_rows.size == 0:
        return out.freeze()
    split = guess.n_found == 1
    two_found = guess.n_found[fit_rows] == 2
    # The line's width (the matched filter's) as a Gaussian prior on every pixel's width.
    spread = model.line_width_spread
    # (none when the width was not measured on separate pairs: it may be merged pairs')
    prior = (
        None
        if spread is None or not guess.fwhm_trusted
        else (guess.fwhm, 1.0 / (spread * guess.fwhm) ** 2)
    )
    res = _run(
        layout,
        model=model,
        x=x,
        y=y[cand[fit_rows]],
        p0=_start(layout, guess, fit_rows, split),
        half_hz=half,
        ref_hz=ref,
        fwhm_lo_hz=fwhm_lo,
        width_prior=(0.0, 0.0) if prior is None else prior,
    )
    nd = layout.n_dips

    def kept_rows(r: dict[str, np.ndarray]) -> np.ndarray:
        if nd == 1:
            return _significance(r, 1)[:, 0] >= model.min_significance
        return _pair_kept(
            r, model, n_widths=layout.n_widths, detected_two=two_found, pair_x=pair_x, tol_x=tol_x
        )

    keep = kept_rows(res)
    if prior is not None and spread is not None:
        apart = keep & ~_close(res, layout)  # clearly separate pairs show the width best
        judged = apart if np.count_nonzero(apart) >= MIN_POOLED else keep
        looser = looser_prior(res, judged, 2 * nd, prior, spread)
        if looser is not None:  # the widths truly differ along this line: refit
            first_iter = res["n_iter"]
            prior = looser
            res = _run(
                layout,
                model=model,
                x=x,
                y=y[cand[fit_rows]],
                p0=res["p"],
                half_hz=half,
                ref_hz=ref,
                fwhm_lo_hz=fwhm_lo,
                width_prior=prior,
            )
            res["n_iter"] = res["n_iter"] + first_iter
            keep = kept_rows(res)
    ambiguous = np.zeros(keep.shape, dtype=bool)

    def profiled(rows: np.ndarray) -> dict[str, np.ndarray]:
        """The kept rows' results, weak centres' 1σ from the profile likelihood."""
        kept_res = {k: v[rows] for k, v in res.items()}
        if model.profile_below <= 0.0 or not np.any(rows):
            return kept_res
        at = np.flatnonzero(rows)

        def refit_held(
            sub: np.ndarray, p0: np.ndarray, pin: tuple[np.ndarray, np.ndarray]
        ) -> dict[str, np.ndarray]:
            return _run(
                layout,
                model=model,
                x=x,
                y=y[cand[fit_rows[at[sub]]]],
                p0=p0,
                half_hz=half,
                ref_hz=ref,
                fwhm_lo_hz=fwhm_lo,
                width_prior=(0.0, 0.0) if prior is None else prior,
                pin=pin,
            )

        centre_sigma = profile_sigma(layout, kept_res, model.profile_below, refit_held, prior)
        z = np.abs(kept_res["p"][:, nd : 2 * nd]) / kept_res["sigma"][:, nd : 2 * nd]
        kept_res["profiled"] = z < model.profile_below
        kept_res["sigma"] = kept_res["sigma"].copy()
        kept_res["sigma"][:, :nd] = centre_sigma
        return kept_res

    if model.hyperfine is not None:
        spacing = float(np.min(np.diff(np.sort(model._hf_off_hz)))) / half

        def refit(rows: np.ndarray, p0: np.ndarray) -> dict[str, np.ndarray]:
            return _run(
                layout,
                model=model,
                x=x,
                y=y[cand[fit_rows[keep][rows]]],
                p0=p0,
                half_hz=half,
                ref_hz=ref,
                fwhm_lo_hz=fwhm_lo,
                width_prior=(0.0, 0.0) if prior is None else prior,
            )

        kept_res, rivalled = best_alias(
            layout, {k: v[keep] for k, v in res.items()}, spacing, refit, model.split_chi2
        )
        for k in res:
            res[k][keep] = kept_res[k]
        ambiguous[keep] = rivalled
        keep = kept_rows(res)
    if nd == 1:
        kept = cand[fit_rows[keep]]
        out.put(kept, layout, profiled(keep), half, ref)
        out.status[kept] = _quality({k: v[keep] for k, v in res.items()}, FitStatus.OK)
        _mark_ambiguous(out.status, kept, ambiguous[keep])
        return out.freeze()

    # Two-dip fits that did not give two separate, significant dips, and close pairs
    # (which one broadened dip may explain as well): one dip.
    close = keep & _close(res, layout)
    single_at = np.flatnonzero(~keep | close)
    single = model._single

    def fit_one_dip(at: np.ndarray, p0: np.ndarray, xtol: float | None) -> dict[str, np.ndarray]:
        return _run(
            single,
            model=model,
            x=x,
            y=y[cand[fit_rows[at]]],
            p0=p0,
            half_hz=half,
            ref_hz=ref,
            fwhm_lo_hz=fwhm_lo,
            xtol_sigma=xtol,
        )

    # Close pairs are only tested at first: to TEST_XTOL, the one-dip objective is within
    # TEST_XTOL² of its minimum, far below split_chi2; those that become one dip are then
    # refined to the model's tolerance.
    tested = close[single_at]
    p1 = _start(single, guess, fit_rows[single_at], split)
    res1 = _merge_rows(
        tested,
        fit_one_dip(single_at[tested], p1[tested], TEST_XTOL),
        fit_one_dip(single_at[~tested], p1[~tested], None),
    )
    # A close pair stays a pair when two dips beat one by the likelihood ratio.
    gain = res1["objective"] - res["objective"][single_at]
    one = ~keep[single_at] | (gain < model.split_chi2)
    refine = tested & one
    if np.any(refine):
        fine = fit_one_dip(single_at[refine], res1["p"][refine], None)
        for k in res1:
            res1[k][refine] = fine[k] if k != "n_iter" else res1[k][refine] + fine[k]
    keep[single_at[~one]] = True
    keep[single_at[one]] = False
    kept = cand[fit_rows[keep]]
    out.put(kept, layout, profiled(keep), half, ref)
    out.status[kept] = _quality({k: v[keep] for k, v in res.items()}, FitStatus.OK)
    _mark_ambiguous(out.status, kept, ambiguous[keep])
    res1 = {k: v[one] for k, v in res1.items()}
    single_rows = fit_rows[single_at[one]]
    sig1 = _significance(res1, 1)[:, 0] >= model.min_significance
    rows1 = cand[single_rows[sig1]]
    res1 = {k: v[sig1] for k, v in res1.items()}
    out.put(rows1, single, res1, half, ref)
    # Two merged resonances make one dip centred on their midpoint; a dip farther than
    # half the line's width (and its 3σ) from it is one resonance of a separate pair
    # whose partner went unseen, and says nothing about a small splitting.
    near = np.minimum(model.merge_radius_hz, 0.5 * out.line_fwhm_hz + 3.0 * out.center_s[rows1, 0])
    merged = np.abs(out.center[rows1, 0] - pair_center) <= near
    status = _quality(res1, FitStatus.ONE_RESONANCE)
    status[(status == FitStatus.ONE_RESONANCE) & merged] = FitStatus.MERGED
    out.status[rows1] = status
    return out.freeze()
