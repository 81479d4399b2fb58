"""Field of a domain wall (or a film edge) along a line cut across it, and its fit: the
position, the sheet moment M_s t and the wall width, the width as a value with its 1σ
when the data resolve it and as an upper bound when they do not.

Model: along a cut in the direction n̂ = (cos β, sin β) that crosses the structure at
right angles, s is the distance along the cut. An out-of-plane sheet moment m(s) that
varies only with s is a sheet of current K(s) = −dm/ds flowing along t̂ = ẑ × n̂, so the
field at height d is the superposition of line currents (PHYSICS.md §5; Tetienne et al.
[1]_ for walls as two edges):

.. math::

    B_n(s) = \\frac{\\mu_0}{2\\pi} \\int K(s') \\frac{d}{(s − s')^2 + d^2} ds', \\qquad
    B_z(s) = −\\frac{\\mu_0}{2\\pi} \\int K(s') \\frac{s − s'}{(s − s')^2 + d^2} ds',

    B_{NV}(s) = c + g\\,(s − s_0) + u_n B_n + u_z B_z,

with a Bloch-type wall from up (m = +m_s, s < s0) to down, m = −m_s tanh((s − s0)/δ)
(Hubert & Schäfer [2]_, the tanh profile of a uniaxial wall; δ is the wall-width
parameter, the wall being πδ wide in Lilley's definition), so K = (m_s/δ) sech²(·) and
the sharp wall is a line current 2m_s; or a film edge, film on s < s0,
m = m_s [1 − tanh((s − s0)/δ)]/2, a line current m_s when sharp. The offset c and slope g
take the bias field and the smooth field of other features along the cut. A Néel wall's
in-plane core adds a line dipole that this model leaves out [1]_.

Width: a wall much narrower than d changes the field only at second order in δ/d (the
field is harmonic, so smoothing by a profile of variance v acts like −(v/2)∂²/∂d²), so
the data bound δ from above rather than measure it. The fit profiles χ² over δ (every
other parameter refitted at each δ): the upper bound (95 %, one-sided) is where χ² has
risen by 2.71 above its minimum; δ counts as resolved when δ = 0 lies more than 3.84
above (95 %, two-sided), and then its 1σ comes from the curvature of the fit. Both
thresholds are multiplied by χ²_red when it exceeds 1 (Press et al. [3]_, sec. 15.6).
Unresolved, the other parameters are those of the sharp wall (δ = 0: fitting δ there
would bias M_s t upwards, a wider wall needing more moment for the same peak), their σ
widened by the change between δ = 0 and the upper bound over √12 (a flat prior on the
widths the data allow) [cp].

References
----------
.. [1] J.-P. Tetienne, T. Hingant, L. J. Martínez, S. Rohart, A. Thiaville, L. Herrera
   Diez, K. Garcia, J.-P. Adam, J.-V. Kim, J.-F. Roch, I. M. Miron, G. Gaudin, L. Vila,
   B. Ocker, D. Ravelosona and V. Jacques, "The nature of domain walls in ultrathin
   ferromagnets revealed by scanning nanomagnetometry", Nat. Commun. 6, 6733 (2015).
.. [2] A. Hubert and R. Schäfer, *Magnetic Domains* (Springer, 1998), sec. 3.6.1.
.. [3] W. H. Press et al., *Numerical Recipes*, 3rd ed. (Cambridge, 2007), secs. 15.5–15.6.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import least_squares

from strayline.physics._fourier import positive_finite
from strayline.physics.constants import MU0

__all__ = ["CUT_KINDS", "WallCutFit", "fit_wall_cut", "wall_profile_field_nv_t"]

CutKind = Literal["wall", "edge"]
#: What a cut can be fitted with: a domain wall (up to down) or a film edge (film to none).
CUT_KINDS: tuple[CutKind, ...] = ("wall", "edge")

# Quadrature of the sech² current profile: trapezoid on v = (s' − s0)/δ in [−12, 12],
# step 0.05 (sech² falls to 2e-10 at |v| = 12); good while the kernel's width d/δ spans a
# few steps, i.e. δ up to the largest width fitted, _MAX_WIDTH_STANDOFFS · d.
_NODES = np.linspace(-12.0, 12.0, 481)
_WEIGHTS = 1.0 / np.cosh(_NODES) ** 2
_WEIGHTS = _WEIGHTS * (2.0 / _WEIGHTS.sum())  # ∫ sech² = 2 exactly on the nodes
_SHARP_FRACTION = 1e-4  # δ below this fraction of d: the sharp form
_MAX_WIDTH_STANDOFFS = 8.0
_WIDTH_GRID = np.concatenate([[0.0], np.geomspace(0.03, _MAX_WIDTH_STANDOFFS, 16)])
_UPPER_LEVEL = 2.705543  # χ²₁ quantile at 0.90 two-sided = 95 % one-sided
_RESOLVED_LEVEL = 3.841459  # χ²₁ quantile at 0.95
# Internal units: nm, mA, mT, mT/µm.
_SCALE = np.array([1e-9, 1e-3, 1e-3, 1e-3 / 1e-6])
_NAMES = ("position_m", "sheet_moment_a", "offset_t", "slope_t_per_m")


def _kernel(rel: np.ndarray, d: float) -> tuple[np.ndarray, np.ndarray]:
    """(B_n, B_z) of a 1 A line current along t̂ at distance ``rel`` along n̂."""
    r2 = rel * rel + d * d
    scale = MU0 / (2.0 * np.pi)
    return scale * d / r2, -scale * rel / r2


def wall_profile_field_nv_t(
    s_m: ArrayLike,
    *,
    kind: CutKind,
    standoff_m: float,
    sheet_moment_a: float,
    position_m: float,
    width_m: float,
    u_n: float,
    u_z: float,
) -> np.ndarray:
    """B_NV along a cut across a wall or film edge (no offset or slope).

    Parameters
    ----------
    s_m : array_like, shape (n,)
        Distance along the cut, m.
    kind : {"wall", "edge"}
    standoff_m : float
        NV height d, m.
    sheet_moment_a : float
        m_s = M_s t, A (signed: negative turns the wall or edge over).
    position_m : float
        s0, m.
    width_m : float
        Wall-width parameter δ ≥ 0, m.
    u_n, u_z : float
        NV axis components along the cut direction n̂ and along z.

    Returns
    -------
    ndarray, shape (n,)
        u_n B_n + u_z B_z, T (module docstring).
    """
    s = np.asarray(s_m, dtype=np.float64)
    d = positive_finite(standoff_m, "standoff_m")
    total = sheet_moment_a * (2.0 if kind == "wall" else 1.0)
    rel = s - position_m
    if width_m <= _SHARP_FRACTION * d:
        b_n, b_z = _kernel(rel, d)
        return total * (u_n * b_n + u_z * b_z)
    b_n, b_z = _kernel(rel[:, None] - width_m * _NODES[None, :], d)
    weights = _WEIGHTS * (total / 2.0)
    return (u_n * b_n + u_z * b_z) @ weights


@dataclass(frozen=True)
class WallCutFit:
    """A wall (or edge) fitted along a cut.

    Attributes
    ----------
    kind : {"wall", "edge"}
    standoff_m, standoff_sigma_m : float
        The stand-off held, and its 1σ (carried into the other σ), m.
    values : dict of str to float
        ``position_m``, ``sheet_moment_a`` (m_s ≥ 0 as a wall is turned by its sign;
        signed for an edge), ``offset_t``, ``slope_t_per_m``, ``width_m`` (the δ the
        values hold for: the best one when resolved, else 0), SI.
    sigmas : dict of str to float
        1σ of the first four (the stand-off's part and, for an unresolved width, the
        widths allowed, included), SI.
    width_resolved : bool
        δ = 0 is excluded at 95 %; then ``width_sigma_m`` is its 1σ.
    width_sigma_m : float or None
    width_upper_m : float or None
        95 % one-sided upper bound on δ when it is not resolved (None when resolved, or
        when χ² does not rise enough within 8 stand-offs).
    width_profile : tuple of (float, float)
        (δ, χ²) pairs of the profile, m.
    chi2 : float
    dof : int
    sigma_scaled : bool
        σ and thresholds scaled by χ²_red > 1.
    u_n, u_z : float
        The NV axis components the fit used.
    covariance : ndarray, shape (4, 4)
        Covariance of position, moment, offset and slope (SI; the stand-off's part not
        included), for the model's band.
    """

    kind: CutKind
    standoff_m: float
    standoff_sigma_m: float
    values: dict[str, float]
    sigmas: dict[str, float]
    width_resolved: bool
    width_sigma_m: float | None
    width_upper_m: float | None
    width_profile: tuple[tuple[float, float], ...]
    chi2: float
    dof: int
    sigma_scaled: bool
    u_n: float
    u_z: float
    covariance: np.ndarray
    _sign: float = 1.0  # −1: a down-to-up wall, reported with m_s ≥ 0

    @property
    def chi2_red(self) -> float:
        return self.chi2 / self.dof if self.dof > 0 else float("nan")

    def curve_t(self, s_m: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """The best-fit B_NV along the cut and its 1σ band (from ``covariance``), T.

        Parameters
        ----------
        s_m : array_like, shape (n,)

        Returns
        -------
        value, sigma : ndarray, shape (n,)
        """
        s = np.asarray(s_m, dtype=np.float64)
        v = self.values
        moment = v["sheet_moment_a"]
        p = np.array([v["position_m"], moment, v["offset_t"], v["slope_t_per_m"]]) / _SCALE
        # A wall was reported with m_s ≥ 0: evaluate with the sign the fit had.
        p[1] *= self._sign
        cut = _Cut(s, s, s, self.kind, (self.u_n, self.u_z))
        d, width = self.standoff_m, v["width_m"]
        value = cut.model(p, d, width)
        jac = np.empty((s.size, 4))
        for i in range(4):
            step = np.zeros(4)
            step[i] = 1e-4 * max(1.0, abs(p[i]))
            jac[:, i] = (cut.model(p + step, d, width) - cut.model(p - step, d, width)) / (
                2 * step[i] * _SCALE[i]
            )
        band = np.sqrt(np.clip(np.einsum("ni,ij,nj->n", jac, self.covariance, jac), 0.0, None))
        return value, band


@dataclass(frozen=True, eq=False)
class _Cut:
    """The samples of a cut and what the model holds: kind, NV axis components."""

    s: np.ndarray
    b: np.ndarray
    w: np.ndarray  # 1/σ
    kind: CutKind
    u: tuple[float, float]

    def model(
        self, p: np.ndarray, d: float, width: float, s: np.ndarray | None = None
    ) -> np.ndarray:
        """B_NV for internal parameters ``p`` (position, moment, offset, slope)."""
        s = self.s if s is None else s
        position, moment, offset, slope = p * _SCALE
        return (
            offset
            + slope * (s - position)
            + wall_profile_field_nv_t(
                s,
                kind=self.kind,
                standoff_m=d,
                sheet_moment_a=moment,
                position_m=position,
                width_m=width,
                u_n=self.u[0],
                u_z=self.u[1],
            )
        )

    def start(self, d: float) -> np.ndarray:
        """Sharp model on a grid of positions; offset, slope and moment solved linearly."""
        s, b, w = self.s, self.b, self.w
        best, best_rss = None, np.inf
        for s0 in s:
            g = wall_profile_field_nv_t(
                s,
                kind=self.kind,
                standoff_m=d,
                sheet_moment_a=1.0,
                position_m=float(s0),
                width_m=0.0,
                u_n=self.u[0],
                u_z=self.u[1],
            )
            design = np.column_stack([np.ones_like(s), s - s0, g]) * w[:, None]
            coef, *_ = np.linalg.lstsq(design, b * w, rcond=None)
            rss = float(np.sum((design @ coef - b * w) ** 2))
            if rss < best_rss:
                best_rss, best = rss, np.array([s0, coef[2], coef[0], coef[1]])
        assert best is not None
        return best / _SCALE

    def fit_at(
        self, p0: np.ndarray, d: float, width: float, jac: str = "2-point"
    ) -> tuple[np.ndarray, float, np.ndarray]:
        """Position, moment, offset and slope at a held d and δ (``jac``: how the
        Jacobian is differenced; "3-point" where it gives a covariance)."""
        result = least_squares(
            lambda p: (self.model(p, d, width) - self.b) * self.w,
            p0,
            jac=jac,
            x_scale="jac",
            xtol=1e-10,
            ftol=1e-10,
            gtol=1e-10,
        )
        return result.x, float(np.sum(result.fun**2)), np.asarray(result.jac)

    def width_fit(
        self, p0: np.ndarray, width0: float, d: float
    ) -> tuple[np.ndarray, float, np.ndarray]:
        """All parameters and δ (in nm, last) free, 0 ≤ δ ≤ 8 d."""
        x0 = np.append(p0, max(width0 / 1e-9, 1e-3))
        upper = _MAX_WIDTH_STANDOFFS * d / 1e-9
        lower_bounds = [-np.inf] * 4 + [0.0]
        upper_bounds = [np.inf] * 4 + [upper]
        result = least_squares(
            lambda x: (self.model(x[:4], d, x[4] * 1e-9) - self.b) * self.w,
            np.clip(x0, lower_bounds, upper_bounds),
            bounds=(lower_bounds, upper_bounds),
            jac="3-point",
            x_scale="jac",
            xtol=1e-10,
            ftol=1e-10,
            gtol=1e-10,
        )
        return result.x, float(np.sum(result.fun**2)), np.asarray(result.jac)


def _cov(jac: np.ndarray) -> np.ndarray:
    return np.linalg.pinv(jac.T @ jac)


def fit_wall_cut(
    s_m: ArrayLike,
    b_nv_t: ArrayLike,
    sigma_t: ArrayLike,
    *,
    kind: CutKind,
    standoff_m: float,
    u_n: float,
    u_z: float,
    standoff_sigma_m: float = 0.0,
) -> WallCutFit:
    """Fit a wall (or film edge) to B_NV sampled along a cut across it.

    Parameters
    ----------
    s_m : array_like, shape (n,)
        Distance along the cut, m.
    b_nv_t, sigma_t : array_like, shape (n,)
        B_NV and its 1σ, T (non-finite samples are dropped).
    kind : {"wall", "edge"}
    standoff_m : float
        NV height d, m (held; from a calibration).
    u_n, u_z : float
        NV axis along the cut direction and along z.
    standoff_sigma_m : float
        1σ of d, m: the fit is repeated at d ± σ_d and half the change of each parameter
        added to its σ in quadrature.

    Returns
    -------
    WallCutFit

    Raises
    ------
    ValueError
        If fewer than 8 usable samples remain or ``kind`` is unknown.
    """
    if kind not in CUT_KINDS:
        raise ValueError(f"kind must be one of {', '.join(CUT_KINDS)}; found {kind!r}")
    d = positive_finite(standoff_m, "standoff_m")
    sigma_d = positive_finite(standoff_sigma_m, "standoff_sigma_m", allow_zero=True)
    s_all = np.asarray(s_m, dtype=np.float64)
    b_all = np.asarray(b_nv_t, dtype=np.float64)
    sig_all = np.asarray(sigma_t, dtype=np.float64)
    keep = np.isfinite(s_all) & np.isfinite(b_all) & np.isfinite(sig_all) & (sig_all > 0)
    if np.count_nonzero(keep) < 8:
        raise ValueError(f"a cut needs at least 8 measured samples; found {np.count_nonzero(keep)}")
    cut = _Cut(s_all[keep], b_all[keep], 1.0 / sig_all[keep], kind, (float(u_n), float(u_z)))

    p = cut.start(d)
    profile: list[tuple[float, float]] = []
    fits: list[np.ndarray] = []
    for factor in _WIDTH_GRID:
        p, chi2, _ = cut.fit_at(p, d, factor * d)
        profile.append((factor * d, chi2))
        fits.append(p)
    widths = np.array([pt[0] for pt in profile])
    chi2s = np.array([pt[1] for pt in profile])
    i_best = int(np.argmin(chi2s))
    n_free = 5
    dof = cut.s.size - n_free
    x, chi2_best, jac = cut.width_fit(fits[i_best], widths[i_best], d)
    if chi2_best > chi2s[i_best]:  # the grid point was better: keep it
        x, chi2_best = np.append(fits[i_best], widths[i_best] / 1e-9), float(chi2s[i_best])
    width_best = float(x[4]) * 1e-9
    chi2_red = chi2_best / dof if dof > 0 else float("nan")
    scale = max(1.0, chi2_red) if dof > 0 else 1.0
    resolved = bool(chi2s[0] - chi2_best > _RESOLVED_LEVEL * scale and width_best > 0)
    upper = (
        None
        if resolved
        else _upper_bound(widths, chi2s, width_best, chi2_best, _UPPER_LEVEL * scale)
    )

    width_sigma = None
    if resolved:
        cov = _cov(jac) * scale
        width_sigma = float(math.sqrt(max(cov[4, 4], 0.0))) * 1e-9
        core, width_used = x[:4], width_best
    else:  # the sharp model, σ widened by the widths the data allow (docstring)
        width_used = 0.0
        core, _, jac4 = cut.fit_at(fits[0], d, 0.0, jac="3-point")
        cov = _cov(jac4) * scale
    sig = np.sqrt(np.clip(np.diag(cov)[:4], 0.0, None)) * _SCALE
    if not resolved:
        allowed = upper if upper is not None else _MAX_WIDTH_STANDOFFS * d
        wide = cut.fit_at(core, d, allowed)[0]
        sig = np.hypot(sig, np.abs(wide - core) * _SCALE / math.sqrt(12.0))
    values = dict(zip(_NAMES, (core * _SCALE).tolist(), strict=True))
    values["width_m"] = width_used
    if sigma_d > 0:
        shifted = [
            cut.fit_at(core, d + step, width_used)[0] * _SCALE for step in (sigma_d, -sigma_d)
        ]
        sig = np.hypot(sig, 0.5 * np.abs(shifted[0] - shifted[1]))
    sigmas = dict(zip(_NAMES, sig.tolist(), strict=True))
    sign = 1.0
    if kind == "wall" and values["sheet_moment_a"] < 0:  # down-to-up: report m_s ≥ 0
        values["sheet_moment_a"] = -values["sheet_moment_a"]
        sign = -1.0
    return WallCutFit(
        kind=kind,
        standoff_m=d,
        standoff_sigma_m=sigma_d,
        values=values,
        sigmas=sigmas,
        width_resolved=resolved,
        width_sigma_m=width_sigma,
        width_upper_m=upper,
        width_profile=tuple((float(a), float(c)) for a, c in profile),
        chi2=chi2_best,
        dof=dof,
        sigma_scaled=bool(dof > 0 and chi2_red > 1.0),
        u_n=cut.u[0],
        u_z=cut.u[1],
        covariance=cov[:4, :4] * np.outer(_SCALE, _SCALE),
        _sign=sign,
    )


def _upper_bound(
    widths: np.ndarray, chi2s: np.ndarray, width_best: float, chi2_best: float, rise: float
) -> float | None:
    """Smallest δ above the best where χ² has risen by ``rise`` (linear interpolation)."""
    above = widths > width_best
    w, c = widths[above], chi2s[above] - chi2_best
    prev_w, prev_c = width_best, 0.0
    for wi, ci in zip(w, c, strict=True):
        if ci >= rise:
            return float(prev_w + (wi - prev_w) * (rise - prev_c) / (ci - prev_c))
        prev_w, prev_c = float(wi), float(ci)
    return None
