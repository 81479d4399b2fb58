"""Fit of a straight structure's field to a whole B_NV map: the NV's stand-off d, the
structure's strength (M_s t or a current), its position and direction, a uniform offset,
and optionally the NV angles, each with a 1σ and the goodness of fit.

Model (:mod:`strayline.physics.structure_field`):

.. math:: B_{NV}(x, y) = c + u_n B_n(s; d, I) + u_z B_z(s; d, I),
          \\qquad s = x \\sin α − y \\cos α − p,

fitted to every measured pixel at once by weighted least squares (``scipy.optimize.
least_squares``, trust-region reflective), each pixel weighted by the 1σ of its field:
χ² = Σ [(B_model − B_NV)/σ]². The uniform offset c takes any bias field.

Starting values, so that the fit needs no guess from the user: the direction α is the
one along which the map varies least (the binned profile across the structure explains
the most variance, searched every degree); the profile across it then gives d, p and I
on a grid of (p, d) with c and I solved linearly at each point; a stripe's second edge is
found the same way in what the first leaves.

Uncertainties: the covariance (JᵀJ)⁻¹ of the weighted residuals at the minimum (Jacobian
by central differences), multiplied by the reduced χ² when that is above 1 (the σ map
then understates the scatter; :attr:`StructureFit.sigma_scaled` says so). Pixels more
than ``clip_z`` (scaled) σ from the first fit — a fit that locked onto a hyperfine alias,
a speck of dust — are left out once and the fit repeated; they are counted.

References
----------
.. [1] T. Hingant et al., "Measuring the magnetic moment density in patterned ultrathin
   ferromagnets with submicrometer resolution", Phys. Rev. Applied 4, 014003 (2015) —
   the thin-film edge fitted for I_s and d.
.. [2] W. H. Press, S. A. Teukolsky, W. T. Vetterling and B. P. Flannery, *Numerical
   Recipes*, 3rd ed. (Cambridge, 2007), sec. 15.5 — the covariance of a nonlinear
   least-squares fit, and its rescaling by χ²/ν when the errors are not known well.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np
from scipy.optimize import OptimizeResult, least_squares

from strayline.physics._fourier import positive_finite
from strayline.physics.constants import MU0
from strayline.physics.hamiltonian import nv_axis
from strayline.physics.strayfield import line_current_field_t
from strayline.physics.structure_field import (
    STRUCTURE_MODELS,
    StraightStructure,
    StructureModel,
    structure_field_nv_t,
)

__all__ = ["PARAMETER_UNITS", "StructureFit", "fit_structure_map"]

#: Every parameter a structure fit can report, with its SI unit.
PARAMETER_UNITS: Mapping[str, str] = MappingProxyType(
    {
        "standoff_m": "m",
        "sheet_moment_a": "A",
        "current_a": "A",
        "position_m": "m",
        "angle_rad": "rad",
        "width_m": "m",
        "offset_t": "T",
        "nv_theta_rad": "rad",
        "nv_phi_rad": "rad",
    }
)
# Internal units of the solver (nm, mA, rad, mT): every parameter O(1–1000), so the
# Jacobian's columns are comparable and the steps of the finite differences sensible.
_SCALE = {
    "standoff_m": 1e-9,
    "sheet_moment_a": 1e-3,
    "current_a": 1e-3,
    "position_m": 1e-9,
    "angle_rad": 1.0,
    "width_m": 1e-9,
    "offset_t": 1e-3,
    "nv_theta_rad": 1.0,
    "nv_phi_rad": 1.0,
}
_BOUNDS = {  # internal units
    "standoff_m": (0.05, 1e4),
    "width_m": (0.05, np.inf),
    "nv_theta_rad": (0.0, math.pi),
}
_ANGLE_STEPS = 180
_DEFAULT_CLIP_Z = 5.0
_MIN_PIXELS_PER_PARAMETER = 3


@dataclass(frozen=True, eq=False)
class StructureFit:
    """The result of :func:`fit_structure_map`.

    Attributes
    ----------
    model : {"film-edge", "stripe", "wire"}
    values : Mapping[str, float]
        Every parameter of the model (fitted and held), SI units (:data:`PARAMETER_UNITS`).
        Normalised: a film edge or wire has strength ≥ 0 (its direction turned by π
        otherwise, the same field), angles in [0, 2π) (a stripe's in [0, π)).
    sigmas : Mapping[str, float]
        1σ of each fitted parameter, SI units; held parameters are absent.
    fitted : tuple of str
        The fitted parameters, in the order of ``covariance``.
    covariance : ndarray, shape (n_fitted, n_fitted)
        Their covariance, SI units (scaled by χ²_red when ``sigma_scaled``).
    chi2 : float
        Σ of squared weighted residuals over the used pixels.
    dof : int
        Used pixels minus fitted parameters.
    sigma_scaled : bool
        The covariance was multiplied by χ²_red > 1.
    n_pixels : int
        Pixels used.
    n_clipped : int
        Measured pixels left out as outliers.
    converged : bool
        The solver met a convergence test.
    message : str
        The solver's message.
    model_nv_t : ndarray, shape (ny, nx)
        The best-fit map, T, on the whole grid.
    used : ndarray of bool, shape (ny, nx)
        The pixels the fit used.
    thickness_m : float or None
        Film thickness held in the model, m.
    """

    model: StructureModel
    values: Mapping[str, float]
    sigmas: Mapping[str, float]
    fitted: tuple[str, ...]
    covariance: np.ndarray
    chi2: float
    dof: int
    sigma_scaled: bool
    n_pixels: int
    n_clipped: int
    converged: bool
    message: str
    model_nv_t: np.ndarray
    used: np.ndarray
    thickness_m: float | None = None
    _strength_name: str = field(default="sheet_moment_a", repr=False)

    @property
    def chi2_red(self) -> float:
        """χ²/ν (NaN without degrees of freedom)."""
        return self.chi2 / self.dof if self.dof > 0 else float("nan")

    @property
    def structure(self) -> StraightStructure:
        """The best-fit structure."""
        v = self.values
        return StraightStructure(
            model=self.model,
            standoff_m=v["standoff_m"],
            strength_a=v[self._strength_name],
            position_m=v["position_m"],
            angle_rad=v["angle_rad"],
            width_m=v.get("width_m"),
            thickness_m=self.thickness_m,
        )


def _parameter_names(model: StructureModel) -> tuple[str, ...]:
    names = ["standoff_m", STRUCTURE_MODELS[model], "position_m", "angle_rad"]
    if model == "stripe":
        names.append("width_m")
    return (*names, "offset_t", "nv_theta_rad", "nv_phi_rad")


@dataclass(frozen=True)
class _Model:
    """The model being fitted: which structure, its strength's name, a held thickness."""

    model: StructureModel
    strength_name: str
    thickness_m: float | None

    def evaluate(self, values: Mapping[str, float], x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """B_NV = c + u·B of the structure ``values`` describe, at points (x, y)."""
        structure = StraightStructure(
            model=self.model,
            standoff_m=values["standoff_m"],
            strength_a=values[self.strength_name],
            position_m=values["position_m"],
            angle_rad=values["angle_rad"],
            width_m=values.get("width_m"),
            thickness_m=self.thickness_m,
        )
        return values["offset_t"] + structure_field_nv_t(
            structure, x, y, values["nv_theta_rad"], values["nv_phi_rad"]
        )


@dataclass(frozen=True, eq=False)
class _Pixels:
    """The pixels a fit uses: positions, field, and weight 1/σ² (or 1/σ)."""

    x: np.ndarray
    y: np.ndarray
    b: np.ndarray
    w: np.ndarray


# -- starting values ----------------------------------------------------------------------


def _best_direction(
    x: np.ndarray, y: np.ndarray, b: np.ndarray, w: np.ndarray, bin_m: float
) -> float:
    """α in [0, π) whose binned profile across the structure explains most of the map."""
    best_angle, best_score = 0.0, -np.inf
    for angle in np.arange(_ANGLE_STEPS) * (np.pi / _ANGLE_STEPS):
        s = x * np.sin(angle) - y * np.cos(angle)
        index = np.floor((s - s.min()) / bin_m).astype(np.int64)
        weight = np.bincount(index, weights=w)
        total = np.bincount(index, weights=w * b)
        filled = weight > 0
        # Between-bin sum of squares; the total is the same for every direction.
        score = float(np.sum(total[filled] ** 2 / weight[filled]))
        if score > best_score:
            best_angle, best_score = float(angle), score
    return best_angle


def _binned_profile(
    s: np.ndarray, b: np.ndarray, w: np.ndarray, bin_m: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Weighted means of ``b`` in bins of ``s``: centres, means, weights."""
    index = np.floor((s - s.min()) / bin_m).astype(np.int64)
    weight = np.bincount(index, weights=w)
    total_s = np.bincount(index, weights=w * s)
    total_b = np.bincount(index, weights=w * b)
    filled = weight > 0
    return total_s[filled] / weight[filled], total_b[filled] / weight[filled], weight[filled]


def _edge_basis(
    s: np.ndarray, s0: np.ndarray, d: np.ndarray, u: tuple[float, float], t: float | None
) -> np.ndarray:
    """u_n B_n + u_z B_z of a unit-strength edge (1 A) at each (s0, d) pair, on ``s``;
    ``u`` = (u_n, u_z)."""
    rel = s[None, None, :] - s0[:, None, None]
    dd = d[None, :, None]
    if t is None:
        b_n, b_z = line_current_field_t(rel, dd, 1.0)
    else:
        b_n, b_z = _slab_edge(rel, dd, t)
    return u[0] * b_n + u[1] * b_z


def _slab_edge(rel: np.ndarray, d: np.ndarray, t: float) -> tuple[np.ndarray, np.ndarray]:
    """The slab edge of :func:`strayline.physics.strayfield.film_edge_field_t` for 1 A,
    broadcasting over an array of d."""
    mu0_ms = MU0 / t
    b_n = mu0_ms / (4 * np.pi) * np.log((rel**2 + (d + t) ** 2) / (rel**2 + d**2))
    b_z = -mu0_ms / (2 * np.pi) * (np.arctan2(d + t, rel) - np.arctan2(d, rel))
    return b_n, b_z


def _best_edge(
    profile: tuple[np.ndarray, np.ndarray, np.ndarray],
    s0_grid: np.ndarray,
    d_grid: np.ndarray,
    u: tuple[float, float],
    t: float | None,
) -> tuple[float, float, float, float]:
    """(s0, d, strength, offset) of the one edge that best fits a binned profile
    (centres, means, weights)."""
    s, b, w = profile
    g = _edge_basis(s, s0_grid, d_grid, u, t)  # (n_s0, n_d, n_bins)
    sw, sb, sbb = w.sum(), (w * b).sum(), (w * b * b).sum()
    sg = (g * w).sum(axis=-1)
    sgg = (g * g * w).sum(axis=-1)
    sgb = (g * (w * b)).sum(axis=-1)
    det = sw * sgg - sg**2
    with np.errstate(divide="ignore", invalid="ignore"):
        amp = (sw * sgb - sg * sb) / det
        off = (sb - amp * sg) / sw
        # Weighted residual sum of squares of b − off − amp·g.
        rss = sbb - off * sb - amp * sgb
    rss = np.where(np.isfinite(rss) & (det > 0), rss, np.inf)
    i, j = np.unravel_index(int(np.argmin(rss)), rss.shape)
    return float(s0_grid[i]), float(d_grid[j]), float(amp[i, j]), float(off[i, j])


def _start(
    model: StructureModel,
    pixels: _Pixels,
    pitch_m: float,
    axis: tuple[float, float],
    thickness_m: float | None,
) -> dict[str, float]:
    """Starting values (SI) from the map itself (module docstring); ``pixels.w`` = 1/σ²."""
    x, y = pixels.x, pixels.y
    angle = _best_direction(x, y, pixels.b, pixels.w, pitch_m)
    s = x * np.sin(angle) - y * np.cos(angle)
    profile = _binned_profile(s, pixels.b, pixels.w, pitch_m)
    centres = profile[0]
    ux, uy, uz = nv_axis(*axis)
    u = (float(ux * np.sin(angle) - uy * np.cos(angle)), float(uz))
    s0_grid = centres[:: max(1, centres.size // 200)]
    span = float(centres.max() - centres.min()) if centres.size > 1 else pitch_m
    d_grid = np.geomspace(max(0.3 * pitch_m, 1e-9), max(span, 2 * pitch_m), 40)
    s1, d1, amp1, off1 = _best_edge(profile, s0_grid, d_grid, u, thickness_m)
    strength_name = STRUCTURE_MODELS[model]
    start = {
        "standoff_m": d1,
        strength_name: amp1,
        "position_m": s1,
        "angle_rad": angle,
        "offset_t": off1,
        "nv_theta_rad": axis[0],
        "nv_phi_rad": axis[1],
    }
    if model == "stripe":
        g1 = _edge_basis(centres, np.array([s1]), np.array([d1]), u, thickness_m)
        left = (centres, profile[1] - off1 - amp1 * g1[0, 0], profile[2])
        s2, _, _, _ = _best_edge(left, s0_grid, np.array([d1]), u, thickness_m)
        if abs(s2 - s1) < pitch_m:  # no second edge to be seen: a stripe wider than the map
            s2 = s1 - span
        start["position_m"] = 0.5 * (s1 + s2)
        start["width_m"] = abs(s1 - s2)
        # The +w/2 edge carries +I_s along t̂: the first edge's sign if it is the right one.
        start[strength_name] = amp1 if s1 > s2 else -amp1
    return start


def _hold_strength(
    start: dict[str, float], model: StructureModel, strength_name: str, strength_a: float
) -> None:
    """Put a known strength into the starting values without turning the field over: an
    edge or wire whose start has the other sign is the same field turned by π; a stripe's
    sign is its magnetisation (up or down), kept from the map."""
    if model == "stripe":
        start[strength_name] = math.copysign(abs(strength_a), start[strength_name])
        return
    if start[strength_name] * strength_a < 0:
        start["angle_rad"] += math.pi
        start["position_m"] = -start["position_m"]
    start[strength_name] = strength_a


# -- the fit ------------------------------------------------------------------------------


def _normalise(values: dict[str, float], model: StructureModel, strength_name: str) -> None:
    """Strength ≥ 0 (edge, wire) or angle in [0, π) (stripe): the same field either way."""
    if model == "stripe":
        turns = math.floor(values["angle_rad"] / math.pi)
        values["angle_rad"] -= turns * math.pi
        if turns % 2:
            values["position_m"] = -values["position_m"]
        return
    if values[strength_name] < 0:
        values[strength_name] = -values[strength_name]
        values["angle_rad"] += math.pi
        values["position_m"] = -values["position_m"]
    values["angle_rad"] %= 2.0 * math.pi


def fit_structure_map(
    b_nv_t: np.ndarray,
    sigma_t: np.ndarray,
    x_m: np.ndarray,
    y_m: np.ndarray,
    *,
    model: StructureModel,
    nv_theta_rad: float,
    nv_phi_rad: float,
    valid: np.ndarray | None = None,
    strength_a: float | None = None,
    fit_theta: bool = False,
    fit_phi: bool = False,
    thickness_m: float | None = None,
    clip_z: float = _DEFAULT_CLIP_Z,
) -> StructureFit:
    """Fit a straight structure's field to a map of B_NV.

    Parameters
    ----------
    b_nv_t : ndarray, shape (ny, nx)
        Field along the NV axis, T (NaN where not measured).
    sigma_t : ndarray, shape (ny, nx)
        Its 1σ, T.
    x_m : ndarray, shape (nx,)
        Column positions, m (a regular grid).
    y_m : ndarray, shape (ny,)
        Row positions, m.
    model : {"film-edge", "stripe", "wire"}
    nv_theta_rad, nv_phi_rad : float
        NV axis, rad: held, or the start when fitted.
    valid : ndarray of bool, shape (ny, nx), optional
        Pixels that may be used (a mask of failed fits); always limited to pixels with a
        finite field and a finite σ > 0.
    strength_a : float, optional
        A known sheet moment (or current), A, held fixed; None fits it.
    fit_theta, fit_phi : bool
        Also fit the NV polar angle / azimuth.
    thickness_m : float, optional
        Known film thickness, m (film edge, stripe); None: a thin film.
    clip_z : float
        Outlier threshold in (scaled) σ, > 0.

    Returns
    -------
    StructureFit

    Raises
    ------
    ValueError
        If the maps disagree in shape, too few pixels remain, or more of I, θ and φ are
        to be fitted than a straight structure determines (two; module docstring of
        :mod:`strayline.physics.structure_field`).
    """
    if model not in STRUCTURE_MODELS:
        raise ValueError(f"model must be one of {', '.join(STRUCTURE_MODELS)}; found {model!r}")
    b = np.asarray(b_nv_t, dtype=np.float64)
    sigma = np.asarray(sigma_t, dtype=np.float64)
    x_axis = np.asarray(x_m, dtype=np.float64)
    y_axis = np.asarray(y_m, dtype=np.float64)
    if b.ndim != 2 or sigma.shape != b.shape or b.shape != (y_axis.size, x_axis.size):
        raise ValueError(
            "b_nv_t and sigma_t must be maps of shape (len(y_m), len(x_m)) = "
            f"({y_axis.size}, {x_axis.size}); found {b.shape} and {sigma.shape}"
        )
    positive_finite(clip_z, "clip_z")
    free_amplitudes = (strength_a is None) + fit_theta + fit_phi
    if free_amplitudes > 2:
        raise ValueError(
            "a straight structure determines two of its strength and the NV angles θ, φ: "
            "hold the strength at its known value, or fit one angle only"
        )
    strength_name = STRUCTURE_MODELS[model]
    use = np.isfinite(b) & np.isfinite(sigma) & (sigma > 0)
    if valid is not None:
        use &= np.asarray(valid, dtype=bool)
    names = _parameter_names(model)
    held = {"nv_theta_rad": not fit_theta, "nv_phi_rad": not fit_phi}
    held[strength_name] = strength_a is not None
    fitted = tuple(n for n in names if not held.get(n, False))
    if np.count_nonzero(use) < _MIN_PIXELS_PER_PARAMETER * len(fitted):
        raise ValueError(
            f"too few measured pixels for a {model} fit: need at least "
            f"{_MIN_PIXELS_PER_PARAMETER * len(fitted)}; found {np.count_nonzero(use)}"
        )
    gx, gy = np.meshgrid(x_axis, y_axis)
    pitch = _pitch(x_axis, y_axis)
    axis = (float(nv_theta_rad), float(nv_phi_rad))
    weight = np.where(use, 1.0 / np.where(use, sigma, 1.0), 0.0)

    def pixels(mask: np.ndarray) -> _Pixels:
        return _Pixels(gx[mask], gy[mask], b[mask], weight[mask])

    start = _start(
        model, _Pixels(gx[use], gy[use], b[use], weight[use] ** 2), pitch, axis, thickness_m
    )
    if strength_a is not None:
        _hold_strength(start, model, strength_name, float(strength_a))
    setup = _Model(model, strength_name, thickness_m)
    values, chi2, jac, result = _solve(setup, start, fitted, pixels(use))
    n_clipped = 0
    residual = (setup.evaluate(values, gx, gy) - b) / sigma
    dof = int(np.count_nonzero(use)) - len(fitted)
    scale = math.sqrt(max(1.0, chi2 / dof)) if dof > 0 else 1.0
    outliers = use & (np.abs(residual) > clip_z * scale)
    if np.any(outliers):
        n_clipped = int(np.count_nonzero(outliers))
        use = use & ~outliers
        values, chi2, jac, result = _solve(setup, values, fitted, pixels(use))
        dof = int(np.count_nonzero(use)) - len(fitted)

    chi2_red = chi2 / dof if dof > 0 else float("nan")
    cov_internal = _covariance(jac)
    sigma_scaled = bool(dof > 0 and chi2_red > 1.0)
    if sigma_scaled:
        cov_internal = cov_internal * chi2_red
    scales = np.array([_SCALE[n] for n in fitted])
    covariance = cov_internal * np.outer(scales, scales)
    _normalise(values, model, strength_name)
    model_map = setup.evaluate(values, gx, gy)
    return StructureFit(
        model=model,
        values=MappingProxyType(dict(values)),
        sigmas=MappingProxyType(
            {n: float(math.sqrt(max(covariance[i, i], 0.0))) for i, n in enumerate(fitted)}
        ),
        fitted=fitted,
        covariance=covariance,
        chi2=float(chi2),
        dof=dof,
        sigma_scaled=sigma_scaled,
        n_pixels=int(np.count_nonzero(use)),
        n_clipped=n_clipped,
        converged=bool(result.status > 0),
        message=str(result.message),
        model_nv_t=model_map,
        used=use,
        thickness_m=thickness_m,
        _strength_name=strength_name,
    )


def _pitch(x_axis: np.ndarray, y_axis: np.ndarray) -> float:
    steps = [np.abs(np.diff(a)) for a in (x_axis, y_axis) if a.size > 1]
    if not steps:
        raise ValueError("a map of one pixel has no pitch")
    return float(min(np.median(s) for s in steps))


def _solve(
    setup: _Model,
    start: Mapping[str, float],
    fitted: tuple[str, ...],
    pixels: _Pixels,
) -> tuple[dict[str, float], float, np.ndarray, OptimizeResult]:
    """Least squares over ``fitted`` (internal units); the rest held at ``start``;
    ``pixels.w`` = 1/σ."""
    values = dict(start)

    def unpack(p: np.ndarray) -> dict[str, float]:
        out = dict(values)
        for name, v in zip(fitted, p, strict=True):
            out[name] = float(v) * _SCALE[name]
        return out

    def residuals(p: np.ndarray) -> np.ndarray:
        return (setup.evaluate(unpack(p), pixels.x, pixels.y) - pixels.b) * pixels.w

    p0 = np.array([values[n] / _SCALE[n] for n in fitted])
    lower = np.array([_BOUNDS.get(n, (-np.inf, np.inf))[0] for n in fitted])
    upper = np.array([_BOUNDS.get(n, (-np.inf, np.inf))[1] for n in fitted])
    result = least_squares(
        residuals,
        np.clip(p0, lower, upper),
        bounds=(lower, upper),
        jac="3-point",
        method="trf",
        x_scale="jac",
        xtol=1e-10,
        ftol=1e-10,
        gtol=1e-10,
        max_nfev=200 * (len(fitted) + 1),
    )
    return unpack(result.x), float(np.sum(result.fun**2)), np.asarray(result.jac), result


def _covariance(jac: np.ndarray) -> np.ndarray:
    """(JᵀJ)⁻¹ by SVD; a direction the data do not constrain gets an infinite variance."""
    _, s, vt = np.linalg.svd(jac, full_matrices=False)
    tiny = s.max() * max(jac.shape) * np.finfo(float).eps if s.size else 0.0
    kept = s > tiny
    inv = np.zeros_like(s)
    inv[kept] = 1.0 / s[kept] ** 2
    cov = (vt.T * inv) @ vt
    if not np.all(kept):
        unconstrained = np.any(np.abs(vt[~kept]) > 1e-6, axis=0)
        cov[unconstrained, :] = np.inf
        cov[:, unconstrained] = np.inf
    return cov
