"""Magnetic field at the NV from fitted resonances.

Pure functions over arrays; returns a frozen :class:`LineField`.

Two resonances f₋ < f₊ give the field along the NV axis exactly, through the closed-form
inversion of Balasubramanian et al. [1]_
(:func:`strayline.physics.inversion.field_from_resonances`): B∥ = sign · |B| cos θ. One
resonance gives B∥ = sign · (f − D)/γ on the upper branch and sign · (D − f)/γ on the
lower one, first order in the field ([2]_, Sec. 2); a lone dip of the two-dip model
(ONE_RESONANCE) takes the branch on its side of D.

Why the exact inversion rather than the D-independent splitting (f₊ − f₋)/(2γ): at
D = 2.870 GHz the splitting estimate is off by 0.001 % of |B| at 1 mT, 30°, but by 0.09 %
at 10 mT, 54.7°, 0.55 % at 10 mT, 80°, 0.49 % at 1 mT, 90° and 4.8 % at 10 mT, 90°
(there f₊ − f₋ = (γB⊥)²/D reads as a false 0.48 mT); values computed with
:func:`strayline.physics.hamiltonian.transition_frequencies_hz`. The inversion is exact
to 2e-7 of |B| or better at any angle up to 10 mT when D is right. Its price is its
dependence on D (a 1 K error in D, 74 kHz, moves |B| by −95 µT and θ by −4.4° at 1 mT,
54.7°; PHYSICS.md §2), so D must come from the temperature or from the mean of both lines
measured elsewhere. For noisy pairs that admit no field ((γB)² < 0 or cos²θ outside
[0, 1]) the inversion clips and stays finite.

Two resonances closer than about half a linewidth merge into one dip (MERGED); such a
pixel still measures something: its dip is no wider than a pair of a bounded splitting
allows, which gives an upper bound on |B∥| at a stated one-sided level
(:func:`merged_field_bound_t`).

References
----------
.. [1] G. Balasubramanian et al., "Nanoscale imaging magnetometry with diamond spins under
   ambient conditions", Nature 455, 648 (2008), Methods.
.. [2] L. Rondin, J.-P. Tetienne, T. Hingant, J.-F. Roch, P. Maletinsky and V. Jacques,
   "Magnetometry with nitrogen-vacancy defects in diamond", Rep. Prog. Phys. 77, 056503
   (2014).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Literal

import numpy as np
from scipy.optimize import least_squares
from scipy.special import ndtri

from strayline.fit import FitStatus, LineFit
from strayline.physics import GAMMA_NV_HZ_PER_T, field_from_resonances

__all__ = [
    "FIELD_BOUND_LEVEL",
    "LineField",
    "field_from_fit",
    "merged_field_bound_t",
    "merged_fwhm_ratio",
]

Branch = Literal["upper", "lower"]

# Step of the central differences that linearise the inversion, Hz: small against any
# linewidth, large against rounding of GHz values (relative 3e-7).
_STEP_HZ = 1e3

#: One-sided confidence level of the upper bound on |B∥| where the resonances merged.
FIELD_BOUND_LEVEL = 0.95
# Φ⁻¹(level) of the standard normal (scipy.special.ndtri is what scipy.stats.norm.ppf
# evaluates; 1.645 for 95 %).
_BOUND_Z = float(ndtri(FIELD_BOUND_LEVEL))
# Relative 1σ of the line's FWHM as the unbroadened width of a merged pixel (see
# merged_field_bound_t, Notes).
_REFERENCE_WIDTH_SPREAD = 0.15
# The table of g: splittings 0 … 2 FWHM in steps of 0.02 (linear interpolation between
# them is good to 1e-4 in g, as g'' ≤ 2), each from a single-Lorentzian fit over ±10 FWHM
# sampled every 0.01 FWHM (the window of a 200 MHz sweep over 10 MHz lines; a window of
# ±3 FWHM raises g(0.6) by 0.6 %, one of ±50 FWHM lowers it by 0.02 %).
_SPLIT_MAX_FWHM = 2.0
# Bounds beyond a splitting of one FWHM are not given (see merged_field_bound_t, Notes).
_BOUND_SPLIT_MAX_FWHM = 1.0
_SPLIT_STEPS = 101
_GRID_HALF_FWHM = 10.0
_GRID_POINTS = 2001


@dataclass(frozen=True, eq=False)
class LineField:
    """Field results for the n_pixels of one line (all arrays shape (n_pixels,), 1σ).

    Attributes
    ----------
    field_nv_t, field_nv_sigma_t
        Field projected on the NV axis, T.
    field_nv_bound_t
        Where the two resonances merged into one dip (status MERGED): an upper bound on
        |B∥| at the one-sided level :data:`FIELD_BOUND_LEVEL`, T
        (:func:`merged_field_bound_t`); NaN on every other row.
    field_abs_t, field_abs_sigma_t
        Field magnitude |B|, T (NaN with one resonance).
    angle_rad, angle_sigma_rad
        Angle between B and the NV axis, rad (NaN with one resonance).
    center_mean_hz, center_mean_sigma_hz
        (f₋ + f₊)/2, Hz: follows D (temperature, strain) and B⊥ (NaN with one resonance).
    status
        Fit status codes passed through (uint8).
    """

    field_nv_t: np.ndarray
    field_nv_sigma_t: np.ndarray
    field_nv_bound_t: np.ndarray
    field_abs_t: np.ndarray
    field_abs_sigma_t: np.ndarray
    angle_rad: np.ndarray
    angle_sigma_rad: np.ndarray
    center_mean_hz: np.ndarray
    center_mean_sigma_hz: np.ndarray
    status: np.ndarray


def _lorentzian_sum_fit(split: float, x: np.ndarray, start: np.ndarray) -> np.ndarray:
    """(height, FWHM) of the single Lorentzian centred at 0 that fits, by unweighted least
    squares over ``x``, the sum of two unit-height unit-FWHM Lorentzians at ±split/2."""
    u1, u2 = 2.0 * x + split, 2.0 * x - split
    target = 1.0 / (1.0 + u1 * u1) + 1.0 / (1.0 + u2 * u2)

    def residual(p: np.ndarray) -> np.ndarray:
        u = 2.0 * x / p[1]
        return p[0] / (1.0 + u * u) - target

    def jacobian(p: np.ndarray) -> np.ndarray:
        u = 2.0 * x / p[1]
        shape = 1.0 / (1.0 + u * u)
        return np.column_stack([shape, p[0] * shape * shape * 2.0 * u * u / p[1]])

    fitted = least_squares(residual, start, jac=jacobian, xtol=1e-12, ftol=1e-12, gtol=1e-12)
    return np.asarray(fitted.x, dtype=np.float64)


@functools.cache
def _merged_width_table() -> tuple[np.ndarray, np.ndarray]:
    """(split r, width ratio g(r)), each shape (_SPLIT_STEPS,), r in FWHM; read-only.

    Built on first use (about 0.4 s) and kept for the life of the process.
    """
    x = np.linspace(-_GRID_HALF_FWHM, _GRID_HALF_FWHM, _GRID_POINTS)
    split = np.linspace(0.0, _SPLIT_MAX_FWHM, _SPLIT_STEPS)
    ratio = np.empty_like(split)
    p = np.array([2.0, 1.0])
    for i, r in enumerate(split):
        p = _lorentzian_sum_fit(float(r), x, p)  # warm start from the previous splitting
        ratio[i] = p[1]
    ratio[0] = 1.0  # the sum of two coincident dips is one Lorentzian of the same width
    split.flags.writeable = False
    ratio.flags.writeable = False
    return split, ratio


def merged_fwhm_ratio(split_fwhm: np.ndarray | float) -> np.ndarray:
    """g(r): FWHM of the single Lorentzian that best fits two equal Lorentzian dips split by
    r, in units of their own FWHM; g(0) = 1, increasing (g(0.6) = 1.33, g(2) = 3.36).

    Parameters
    ----------
    split_fwhm : array_like
        Splitting r = s/Γ₀, in units of the dips' FWHM, within 0 … 2.

    Returns
    -------
    ndarray, the shape of ``split_fwhm``
        g(r), interpolated in a table of unweighted least-squares fits of height and width
        to the noise-free sum (:func:`scipy.optimize.least_squares`); NaN outside 0 … 2.
    """
    split, ratio = _merged_width_table()
    r = np.asarray(split_fwhm, dtype=np.float64)
    return np.asarray(np.interp(r, split, ratio, left=np.nan, right=np.nan))


def merged_field_bound_t(
    fwhm_hz: np.ndarray,
    fwhm_sigma_hz: np.ndarray,
    line_fwhm_hz: float,
    *,
    offset_hz: np.ndarray | None = None,
    offset_sigma_hz: np.ndarray | None = None,
) -> np.ndarray:
    """Upper bound on |B∥| (one-sided, level :data:`FIELD_BOUND_LEVEL`) from merged dips.

    Parameters
    ----------
    fwhm_hz, fwhm_sigma_hz : ndarray, shape (n,)
        FWHM G_m of the single dip fitted (free width) where the two resonances merged,
        and its 1σ, Hz.
    line_fwhm_hz : float
        The line's own FWHM G₀, Hz (the width of its unbroadened dips).
    offset_hz, offset_sigma_hz : ndarray, shape (n,), optional
        The dip's centre minus D, and its 1σ, Hz: a dip off D may be one resonance of a
        pair whose partner went unseen (below).

    Returns
    -------
    ndarray, shape (n,)
        |B∥| ≤ this, T. NaN where an input is not finite, G₀ ≤ 0, or the bound would lie
        beyond a splitting of one G₀ (a dip that wide is not a small field; Notes).

    Notes
    -----
    Two equal Lorentzian dips of FWHM G₀ split by s look, to a fit of one Lorentzian,
    like one Lorentzian of FWHM G₀ g(s/G₀), with g increasing from g(0) = 1
    (:func:`merged_fwhm_ratio`). The measured width ratio q = G_m/G₀ therefore bounds the
    splitting: with z = Φ⁻¹(level) (1.645),

        q̂    = max(q, 1)
        σ_q  = √((σ_G/G₀)² + (κ q̂)²),     κ = 0.15
        q_up = q̂ + z σ_q
        s_up = G₀ g⁻¹(q_up)
        |B∥| ≤ s_up / (2γ)

    since f± = D ± γB∥ to first order in the field (Rondin et al. [2]_, Sec. 2; the shift
    3(γB⊥)²/(2D) moves both lines alike and leaves s alone). Taking max(q, 1) gives a dip
    that looks no wider than the line the resolution bound rather than zero. A q_up
    beyond g(1) = 1.82 gets NaN: a dip that wide is a pair split by about a linewidth or
    more that the noise kept the fit from separating, not a small field, and there the
    table of equal Lorentzians bounds poorly (on the demo's weak-wide preset, dips
    0.7–1.3× of 9 % deep at 600 counts, such dips split by 1–2 FWHM fitted 2.2 G₀ wide
    where the table says 2.55, and only a third of their bounds held the truth).

    At low signal a fit of one dip to a pair split by about a linewidth may settle on one
    of the two (narrower than the line, off D by about s/2) rather than on their sum.
    Given the dip's offset c − D and its 1σ, the bound is therefore at least
    2(|c − D| + z σ_c): a lone resonance of a pair lies s/2 from D (again to first
    order). On the demo's weak-wide preset (``benchmarks/fit_coverage.py``), where such
    dips made most of the failures, this took the share of bounds that hold the truth
    from 92.6 % to 95.9 %.

    The κ term is the uncertainty of G₀ as the pixel's unbroadened width. G₀ is measured
    on the line's clearest dips, and where those are themselves merged pairs it is too
    wide. The worst case is a line merged throughout at one splitting r (a weakly
    magnetic region): G₀ = g(r) Γ, every dip looks as wide as the line (q ≈ 1), yet each
    hides s = r Γ = G₀ r/g(r). κ = 0.15 covers this with no other uncertainty up to
    r = 0.79, where g(r/g(r)) − 1 = z κ = 0.247. The true width also varies a little
    between pixels (the fitter's own width prior allows 10 %).

    Measured coverage (share of MERGED rows whose bound is at least the true
    |B∥| = s/(2γ)) on simulated lines of 256 spectra (two dips of FWHM Γ = 9–10 MHz per
    line, 10–15 % contrast, each dip 0.7–1.3× that depth on every other line, 600–2000
    counts per point, 201 points over 200 MHz, :func:`strayline.fit.fit_line`):

    ==================  =========  ===========  ===========  ===========  ===========
    splittings (Γ)      G₀/Γ       MERGED rows  κ = 0        κ = 0.1      κ = 0.15
    ==================  =========  ===========  ===========  ===========  ===========
    0–0.6, 160 lines    1.02–1.15  39 332       96.0 (89)    99.8 (98.8)  100.0 (100)
    0.4–0.65, 40 lines  1.22–1.31  9 006        64 (56)      98.0 (91)    100.0 (100)
    0–1.0, 60 lines     1.11–1.29  11 841       89 (72)      98.6 (93)    99.8 (98.1)
    0.6–0.9, 40 lines   1.45–1.58  5 853        35 (30)      84 (74)      99.2 (96.4)
    ==================  =========  ===========  ===========  ===========  ===========

    (per cent of MERGED rows covered, overall and, in brackets, in the worst 0.1 Γ bin of
    splitting; with κ = 0.15 equal and unequal depths within 0.5 points of each other). Where G₀ is
    close to the true width the bound is conservative; its median in the first family is
    0.64 Γ/(2γ) (0.47 Γ/(2γ) with κ = 0).

    g is tabulated for equal dips. Unequal depths broaden less at the same splitting:
    two dips of depths 0.7 : 1.3 split by 0.2, 0.6 or 1.0 Γ are as wide as equal dips
    split 5 %, 8 % or 16 % less (computed the way g is). The simulated unequal depths
    (each dip 0.7–1.3× independently) were covered as well as equal ones, within the
    margin κ gives. With resolved hyperfine lines the fitted width is a component's, and
    the table (plain Lorentzians) is an approximation.

    References
    ----------
    .. [2] L. Rondin et al., Rep. Prog. Phys. 77, 056503 (2014).
    """
    g0 = float(line_fwhm_hz)
    width = np.asarray(fwhm_hz, dtype=np.float64)
    width_sigma = np.asarray(fwhm_sigma_hz, dtype=np.float64)
    if not (np.isfinite(g0) and g0 > 0.0):
        return np.full(np.broadcast(width, width_sigma).shape, np.nan)
    q = np.maximum(width / g0, 1.0)
    sigma_q = np.hypot(width_sigma / g0, _REFERENCE_WIDTH_SPREAD * q)
    split, ratio = _merged_width_table()
    with np.errstate(invalid="ignore"):
        split_up = g0 * np.interp(q + _BOUND_Z * sigma_q, ratio, split, right=np.nan)
        split_up[split_up > _BOUND_SPLIT_MAX_FWHM * g0] = np.nan
        if offset_hz is not None and offset_sigma_hz is not None:
            lone = 2.0 * (np.abs(offset_hz) + _BOUND_Z * np.asarray(offset_sigma_hz))
            split_up = np.where(np.isfinite(lone), np.maximum(split_up, lone), np.nan)
    return split_up / (2.0 * GAMMA_NV_HZ_PER_T)


def _pair_field(
    f_lo: np.ndarray, f_hi: np.ndarray, zfs_hz: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(B∥ ≥ 0, |B|, θ) of resonance pairs, each shape (n,)."""
    b_abs, angle = field_from_resonances(f_lo, f_hi, zfs_hz)
    return b_abs * np.cos(angle), b_abs, angle


def field_from_fit(
    fit: LineFit,
    *,
    zfs_hz: float,
    sign: float = +1.0,
    branch: Branch = "upper",
) -> LineField:
    """Field along the NV axis (and |B|, angle, line mean) from a line's fitted resonances.

    Parameters
    ----------
    fit : LineFit
        The line's fit; ``center_hz`` and ``center_sigma_hz`` have shape (n_pixels, 2).
    zfs_hz : float
        Zero-field splitting D, Hz (from the temperature, or measured in the scan).
    sign : float
        +1 or −1: the sign of B∥, which CW ODMR cannot tell; it comes from a known bias
        field (common practice).
    branch : {"upper", "lower"}
        Which transition the resonance of a one-dip fit (status OK, one column) is:
        f₊ = D + γB∥ ("upper") or f₋ = D − γB∥. A lone dip of the two-dip model
        (ONE_RESONANCE) ignores it and takes the branch on its side of D.

    Returns
    -------
    LineField
        Arrays of shape (n_pixels,). Rows with two resonances (status OK, both columns)
        get every quantity; rows with one (ONE_RESONANCE, or OK from a one-dip fit) get
        B∥ only; MERGED rows get the line mean (the merged centre) and an upper bound on
        |B∥| (``field_nv_bound_t``, :func:`merged_field_bound_t` from the dip's fitted
        width and ``fit.line_fwhm_hz``); rows with other statuses are NaN. ``status`` is
        the fit's, passed through.

    Notes
    -----
    Two resonances: B∥ = sign · |B| cos θ with (|B|, θ) from Balasubramanian et al. [1]_,
    Methods (their (γB)², Δ and cos²θ equations, evaluated by
    :func:`strayline.physics.inversion.field_from_resonances`). One resonance:
    B∥ = ±(f − D)/γ ([2]_, Sec. 2), which neglects the (γB⊥)²·3/(2D) shift of both lines
    (15 µT of error per mT² of B⊥). A one-dip window sweeps one chosen transition, which
    may cross D when B∥ changes sign, so its branch is given. A two-dip window sees both
    transitions; when only one is significant its branch is unknown, and the sign
    convention of the pairs (B∥ = sign · |B| cos θ, |B| cos θ ≥ 0) makes it f₊ above D and
    f₋ below: B∥ = sign · |f − D|/γ, consistent with the pairs of the same map.

    A pair whose mean (f₋ + f₊)/2 lies at or below D (noise, or D set too high) admits no
    transverse field; there B∥ = sign · (f₊ − f₋)/(2γ), the θ = 0 solution, which is the
    consistent point nearest to it, rather than the inversion's clipped |B| = 0.

    1σ: the inversion is linearised by central differences of ±1 kHz in f₋ and f₊, and
    the two centres are taken as uncorrelated: their fits share the width and baseline,
    but a centre's derivative is odd about the dip while the width's and baseline's are
    even, so for separated dips the coupling cancels (measured on 20 000 simulated
    spectra of 600 counts per point, dips 80-250 MHz apart, FWHM 10 MHz: median
    correlation from the fit's covariance 9e-5, correlation of the actual centre errors
    −0.004). The line mean has
    σ = ½ √(σ₋² + σ₊²); the one-resonance B∥ has σ = σ_f / γ.

    References
    ----------
    .. [1] G. Balasubramanian et al., Nature 455, 648 (2008), Methods.
    .. [2] L. Rondin et al., Rep. Prog. Phys. 77, 056503 (2014).
    """
    if sign not in (1.0, -1.0):
        raise ValueError(f"sign must be +1 or -1; found {sign!r}")
    if branch not in ("upper", "lower"):
        raise ValueError(f"branch must be 'upper' or 'lower'; found {branch!r}")
    n = fit.n_pixels
    center = np.asarray(fit.center_hz, dtype=np.float64)
    sig = np.asarray(fit.center_sigma_hz, dtype=np.float64)
    status = np.asarray(fit.status)
    nan = np.full(n, np.nan)
    b_nv, b_nv_s = nan.copy(), nan.copy()
    b_abs, b_abs_s = nan.copy(), nan.copy()
    angle, angle_s = nan.copy(), nan.copy()
    mean, mean_s = nan.copy(), nan.copy()

    finite = np.isfinite(center)
    two = (status == FitStatus.OK) & finite[:, 0] & finite[:, 1]
    one = ((status == FitStatus.OK) | (status == FitStatus.ONE_RESONANCE)) & (
        finite[:, 0] & ~finite[:, 1]
    )
    merged = (status == FitStatus.MERGED) & finite[:, 0]

    if np.any(two):
        f_lo, f_hi = center[two, 0], center[two, 1]
        s_lo, s_hi = sig[two, 0], sig[two, 1]
        par, mag, ang = _pair_field(f_lo, f_hi, zfs_hz)
        d_lo = np.subtract(
            _pair_field(f_lo + _STEP_HZ, f_hi, zfs_hz), _pair_field(f_lo - _STEP_HZ, f_hi, zfs_hz)
        ) / (2 * _STEP_HZ)
        d_hi = np.subtract(
            _pair_field(f_lo, f_hi + _STEP_HZ, zfs_hz), _pair_field(f_lo, f_hi - _STEP_HZ, zfs_hz)
        ) / (2 * _STEP_HZ)
        var = (d_lo * s_lo) ** 2 + (d_hi * s_hi) ** 2  # shape (3, n_two)
        par_s = np.sqrt(var[0])
        # A pair whose mean lies below D admits no transverse field: the inversion would
        # clip |B| to 0. The consistent point nearest to it is θ = 0, where
        # B∥ = (f₊ − f₋)/(2γ) exactly, with σ = ½√(σ₋² + σ₊²)/γ.
        axial = 0.5 * (f_lo + f_hi) <= zfs_hz
        par = np.where(axial, 0.5 * (f_hi - f_lo) / GAMMA_NV_HZ_PER_T, par)
        par_s = np.where(axial, 0.5 * np.hypot(s_lo, s_hi) / GAMMA_NV_HZ_PER_T, par_s)
        b_nv[two], b_nv_s[two] = sign * par, par_s
        b_abs[two], b_abs_s[two] = mag, np.sqrt(var[1])
        angle[two], angle_s[two] = ang, np.sqrt(var[2])
        mean[two] = 0.5 * (f_lo + f_hi)
        mean_s[two] = 0.5 * np.hypot(s_lo, s_hi)

    branch_sign = np.where(
        status[one] == FitStatus.ONE_RESONANCE,
        np.where(center[one, 0] >= zfs_hz, 1.0, -1.0),
        1.0 if branch == "upper" else -1.0,
    )
    b_nv[one] = sign * branch_sign * (center[one, 0] - zfs_hz) / GAMMA_NV_HZ_PER_T
    b_nv_s[one] = sig[one, 0] / GAMMA_NV_HZ_PER_T
    mean[merged], mean_s[merged] = center[merged, 0], sig[merged, 0]
    bound = nan.copy()
    if np.any(merged):
        fwhm = np.asarray(fit.fwhm_hz, dtype=np.float64)[merged, 0]
        fwhm_s = np.asarray(fit.fwhm_sigma_hz, dtype=np.float64)[merged, 0]
        bound[merged] = merged_field_bound_t(
            fwhm,
            fwhm_s,
            fit.line_fwhm_hz,
            offset_hz=center[merged, 0] - zfs_hz,
            offset_sigma_hz=sig[merged, 0],
        )

    return LineField(
        field_nv_t=b_nv,
        field_nv_sigma_t=b_nv_s,
        field_nv_bound_t=bound,
        field_abs_t=b_abs,
        field_abs_sigma_t=b_abs_s,
        angle_rad=angle,
        angle_sigma_rad=angle_s,
        center_mean_hz=mean,
        center_mean_sigma_hz=mean_s,
        status=status.astype(np.uint8, copy=True),
    )
