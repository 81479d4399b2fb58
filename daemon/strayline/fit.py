"""Batched ODMR fits: every spectrum of a line at once.

Pure functions over arrays; returns a frozen :class:`LineFit`.

Model (the same as :func:`strayline.physics.spectrum.lorentzian_dips`)::

    mu(f) = (b + s (f - f_ref)) * (1 - sum_i C_i sum_m w_m L(f; f_i + o_m, G_i))
    L(f; f0, G) = (G/2)^2 / ((f - f0)^2 + (G/2)^2)

with f_ref the mean of the frequency grid, C_i the contrast of dip i, G_i its FWHM, b the
off-resonance counts per sample, s the baseline slope and (o_m, w_m) the hyperfine pattern
of each dip (one component at 0 with weight 1 when no hyperfine structure is modelled).

The fit itself is one compiled call over all spectra (:mod:`strayline._fit_kernel`:
Levenberg–Marquardt on the Poisson likelihood, analytic Jacobian, box bounds); starting
points come from :mod:`strayline._fit_guess`. Everything that depends on the
:class:`FitModel` is settled when the model is built, so :func:`fit_line` only scales the
grid and runs.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import IntEnum
from typing import Literal

import numpy as np

from strayline._fit_guess import DipGuess, guess_dips
from strayline._fit_kernel import MAX_ITER, lm_batch
from strayline.physics.spectrum import hyperfine_pattern

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
        Iterations used.
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

    @property
    def n_pixels(self) -> int:
        return int(self.status.shape[0])


Weighting = Literal["poisson", "unweighted"]
Hyperfine = Literal["14N", "15N"] | None


@dataclass(frozen=True)
class _Layout:
    """Where each parameter sits in a kernel row."""

    n_dips: int
    n_widths: int
    has_slope: bool

    @property
    def n_par(self) -> int:
        return 2 * self.n_dips + self.n_widths + 1 + int(self.has_slope)

    @property
    def i_baseline(self) -> int:
        return 2 * self.n_dips + self.n_widths


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
        Stop when the distance to the minimum is below this many standard deviations.
    min_counts : float
        Mean counts per sample below which a spectrum is LOW_COUNTS and not fitted.
    min_significance : float
        A dip is real when contrast ≥ min_significance × its 1σ (else NO_RESONANCE, or
        ONE_RESONANCE when the other dip is real).
    guess_sigmas : float
        Depth, in noise units of the lightly smoothed spectrum, for the starting-point
        search to count a dip.
    pair_center_hz : float or None
        Expected midpoint (f₋ + f₊)/2 of the two resonances (≈ D), Hz; None = the middle of
        the line's frequency window. A single dip within ``merge_radius_hz`` of it is two
        merged resonances (MERGED), farther away it is ONE_RESONANCE.
    merge_radius_hz : float
        See ``pair_center_hz``.
    """

    n_dips: int = 2
    shared_width: bool = True
    hyperfine: Hyperfine = None
    fit_slope: bool = False
    fwhm_bounds_hz: tuple[float, float] = (1e6, 60e6)
    contrast_bounds: tuple[float, float] = (0.0, 0.6)
    center_bounds_hz: tuple[float, float] | None = None
    weighting: Weighting = "poisson"
    max_iter: int = 100
    xtol_sigma: float = 1e-3
    min_counts: float = 3.0
    min_significance: float = 4.0
    guess_sigmas: float = 4.0
    pair_center_hz: float | None = None
    merge_radius_hz: float = 20e6
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
        if problems:
            raise ValueError("FitModel: " + "; ".join(problems))
        n_widths = 1 if self.shared_width else self.n_dips
        off, w = hyperfine_pattern(self.hyperfine)
        object.__setattr__(self, "_main", _Layout(self.n_dips, n_widths, self.fit_slope))
        object.__setattr__(self, "_single", _Layout(1, 1, self.fit_slope))
        object.__setattr__(self, "_hf_off_hz", np.array(off))
        object.__setattr__(self, "_hf_w", np.array(w))


def _bounds(
    layout: _Layout, model: FitModel, x: np.ndarray, half_hz: float, ref_hz: float
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
    lo[2 * nd : 2 * nd + nw] = model.fwhm_bounds_hz[0] / half_hz
    hi[2 * nd : 2 * nd + nw] = model.fwhm_bounds_hz[1] / half_hz
    lo[layout.i_baseline] = 0.0
    return lo, hi


def _start(layout: _Layout, guess: DipGuess, rows: np.ndarray, split: np.ndarray) -> np.ndarray:
    """Kernel starting rows, shape (len(rows), n_par).

    Two-dip rows with one dip found (``split``) start as a symmetric pair around it: two
    dips a quarter FWHM either side, 0.8 of its width and 0.7 of its contrast each (their
    sum then has about the depth and width of the single dip).
    """
    nd = layout.n_dips
    c = guess.center[rows]
    k = guess.contrast[rows]
    w = guess.fwhm[rows]
    b = guess.baseline[rows]
    p = np.zeros((rows.shape[0], layout.n_par))
    if nd == 1:
        p[:, 0], p[:, 1], p[:, 2] = c[:, 0], k[:, 0], w[:, 0]
    else:
        sp = split[rows]
        c_pair = np.where(
            sp[:, None], c[:, :1] + np.array([-0.25, 0.25]) * w[:, :1], np.sort(c, axis=1)
        )
        order = np.argsort(c, axis=1)
        k_pair = np.where(sp[:, None], 0.7 * k[:, :1], np.take_along_axis(k, order, axis=1))
        w_pair = np.where(sp[:, None], 0.8 * w[:, :1], np.take_along_axis(w, order, axis=1))
        p[:, 0:2] = c_pair
        p[:, 2:4] = k_pair
        if layout.n_widths == 1:
            p[:, 4] = np.mean(w_pair, axis=1)
        else:
            p[:, 4:6] = w_pair
    p[:, layout.i_baseline] = b
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
) -> dict[str, np.ndarray]:
    """Run the kernel on the rows of ``y``; returns the raw (scaled) results."""
    lo, hi = _bounds(layout, model, x, half_hz, ref_hz)
    p = np.ascontiguousarray(np.clip(p0, lo, hi))
    sigma, chi2, n_iter, code = lm_batch(
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
        int(model.max_iter),
        float(model.xtol_sigma),
    )
    at_bound = np.any((p == lo) | (p == hi), axis=1)
    return {
        "p": p,
        "sigma": sigma,
        "chi2": chi2,
        "n_iter": n_iter,
        "code": code,
        "at_bound": at_bound,
    }


def _significant(res: dict[str, np.ndarray], nd: int, k: float) -> np.ndarray:
    """Per dip: contrast ≥ k σ with a finite σ, shape (n, nd)."""
    con = res["p"][:, nd : 2 * nd]
    sig = res["sigma"][:, nd : 2 * nd]
    return np.isfinite(sig) & (con >= k * sig) & (con > 0.0)


class _Out:
    """Mutable assembly area for a LineFit (n pixels)."""

    def __init__(self, n: int) -> None:
        nan2 = np.full((n, 2), np.nan)
        self.center, self.center_s = nan2.copy(), nan2.copy()
        self.contrast, self.contrast_s = nan2.copy(), nan2.copy()
        self.fwhm, self.fwhm_s = nan2.copy(), nan2.copy()
        self.baseline, self.baseline_s = np.full(n, np.nan), np.full(n, np.nan)
        self.slope = np.zeros(n)
        self.chi2 = np.full(n, np.nan)
        self.status = np.full(n, FitStatus.NO_RESONANCE, dtype=np.uint8)
        self.n_iter = np.zeros(n, dtype=np.int32)

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
        self.center_s[rows, :nd] = half * take(s[:, :nd])
        self.contrast[rows, :nd] = take(p[:, nd : 2 * nd])
        self.contrast_s[rows, :nd] = take(s[:, nd : 2 * nd])
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
        )


def _quality(res: dict[str, np.ndarray], good: FitStatus) -> np.ndarray:
    """NOT_CONVERGED, else AT_BOUND, else ``good``; shape (n,)."""
    status = np.full(res["code"].shape, good, dtype=np.uint8)
    status[res["at_bound"]] = FitStatus.AT_BOUND
    status[res["code"] == MAX_ITER] = FitStatus.NOT_CONVERGED
    return status


def fit_line(freq_hz: np.ndarray, counts: np.ndarray, model: FitModel | None = None) -> LineFit:
    """Fit every ODMR spectrum of one scan line.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freq,)
        Microwave frequencies, Hz, strictly increasing (may be non-uniform).
    counts : ndarray, shape (n_pixels, n_freq)
        Photon counts per sample (any real or integer dtype).
    model : FitModel, optional
        What to fit; default ``FitModel()`` (two dips, shared width, Poisson weights).

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
    are LOW_COUNTS. The others get starting points (:func:`strayline._fit_guess.guess_dips`);
    without any significant dip they are NO_RESONANCE. The rest are fitted together by
    :func:`strayline._fit_kernel.lm_batch`. With the two-dip model, a fit whose dips are
    closer than half the FWHM, or one of whose dips is not significant, is refitted with
    one dip; that dip is MERGED when it lies within ``merge_radius_hz`` of the pair centre,
    ONE_RESONANCE otherwise.
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
    out = _Out(n_pix)

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
    guess = guess_dips(
        x,
        y[cand],
        hf_off=hf_off,
        hf_w=model._hf_w,
        fwhm_bounds=(model.fwhm_bounds_hz[0] / half, model.fwhm_bounds_hz[1] / half),
        contrast_max=model.contrast_bounds[1],
        guess_sigmas=model.guess_sigmas,
    )
    fit_rows = np.flatnonzero(guess.n_found > 0)  # indices into cand
    if fit_rows.size == 0:
        return out.freeze()
    split = guess.n_found == 1
    res = _run(
        layout,
        model=model,
        x=x,
        y=y[cand[fit_rows]],
        p0=_start(layout, guess, fit_rows, split),
        half_hz=half,
        ref_hz=ref,
    )
    nd = layout.n_dips
    sig = _significant(res, nd, model.min_significance)
    if nd == 1:
        keep = sig[:, 0]
    else:
        p = res["p"]
        sep = np.abs(p[:, 1] - p[:, 0])
        wmax = np.max(p[:, 4 : 4 + layout.n_widths], axis=1)
        keep = sig[:, 0] & sig[:, 1] & (sep >= 0.5 * wmax)
    kept = cand[fit_rows[keep]]
    out.put(kept, layout, {k: v[keep] for k, v in res.items()}, half, ref)
    out.status[kept] = _quality({k: v[keep] for k, v in res.items()}, FitStatus.OK)
    if nd == 1:
        return out.freeze()

    # Two-dip fits that did not give two separate, significant dips: one dip.
    single_rows = fit_rows[~keep]
    if single_rows.size == 0:
        return out.freeze()
    single = model._single
    res1 = _run(
        single,
        model=model,
        x=x,
        y=y[cand[single_rows]],
        p0=_start(single, guess, single_rows, split),
        half_hz=half,
        ref_hz=ref,
    )
    sig1 = _significant(res1, 1, model.min_significance)[:, 0]
    rows1 = cand[single_rows[sig1]]
    res1 = {k: v[sig1] for k, v in res1.items()}
    out.put(rows1, single, res1, half, ref)
    pair_center = ref if model.pair_center_hz is None else float(model.pair_center_hz)
    merged = np.abs(out.center[rows1, 0] - pair_center) <= model.merge_radius_hz
    status = _quality(res1, FitStatus.ONE_RESONANCE)
    status[(status == FitStatus.ONE_RESONANCE) & merged] = FitStatus.MERGED
    out.status[rows1] = status
    return out.freeze()
