"""Scenes: invented samples for the synthetic instrument.

A :class:`Scene` is either a sheet magnetisation (out of plane, sheet moment density
``m_z = M_z t`` in A) that can be evaluated on any regular grid, or an analytic field
function. Scan grids are centred on the scene origin ``(x, y) = (0, 0)``, so every scene
is independent of the scan size.

The scenes are our own scenarios:

- :func:`labyrinth` — a thin ferromagnetic film with labyrinth (maze) domains and walls
  of finite width;
- :func:`weak_domains` — the same pattern with a tiny uncompensated moment, as on an
  antiferromagnet (µT-level fields);
- :func:`calibration_stripe` — a patterned out-of-plane stripe with sharp edges;
- :func:`bubble_lattice` — a hexagonal lattice of reversed bubble domains, optionally
  disordered;
- :func:`stripe_domains` — parallel up/down stripe domains at any angle;
- :func:`dot_array` — a square array of magnetised discs on a non-magnetic background;
- :func:`film_edge` — a magnetised film ending at a straight edge (analytic field);
- :func:`wire` — a straight current-carrying wire along y (analytic field).

Domain walls
------------
Labyrinth, stripe and bubble walls follow the tanh profile ``m = m_s tanh(s / δ)``, where
``s`` is the signed distance to the wall and ``δ`` the wall-width parameter [1]_ (the
profile of a Bloch wall in a uniaxial film; the wall is ``π δ`` wide in Lilley's
definition). The edges of dots and films go from ``m_s`` to 0 with the same shape,
``m = m_s (1 - tanh(s / δ)) / 2`` (``s`` the signed distance outwards from the edge).
For the labyrinth, the walls are the zero contour of a smooth random field ``g`` (a sum
of plane waves of one wavelength with random directions and phases, which gives an
isotropic maze of one period); near the contour ``s ≈ g / |∇g|``, so
``m = m_s tanh(g / (|∇g| δ))`` has slope ``|∇m| = m_s / δ`` on every wall.

References
----------
.. [1] A. Hubert and R. Schäfer, *Magnetic Domains* (Springer, 1998), sec. 3.6.1:
   the classical wall profile ``m = tanh(s / δ)`` of a uniaxial material.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np

__all__ = [
    "SCENES",
    "Scene",
    "bubble_lattice",
    "calibration_stripe",
    "dot_array",
    "film_edge",
    "labyrinth",
    "make_scene",
    "stripe_domains",
    "weak_domains",
    "wire",
]

SheetMomentFn = Callable[[np.ndarray, np.ndarray], np.ndarray]
FieldFn = Callable[[np.ndarray, np.ndarray, float], np.ndarray]


@dataclass(frozen=True, eq=False)
class Scene:
    """An invented sample: a sheet magnetisation or an analytic field.

    Exactly one of ``sheet_moment_a`` and ``field_t`` is set.

    Attributes
    ----------
    name : str
        Short name (a key of :data:`SCENES`).
    description : str
        One sentence saying what the sample is.
    params : Mapping[str, float]
        Every parameter that defines the scene, SI units in the names (for the truth record).
    sheet_moment_a : callable or None
        ``sheet_moment_a(x_m, y_m) -> m_z_a``: out-of-plane sheet moment density on the
        regular grid spanned by ``x_m`` (shape (nx,), m) and ``y_m`` (shape (ny,), m);
        returns an ndarray of shape (ny, nx), A.
    field_t : callable or None
        ``field_t(x_m, y_m, standoff_m) -> b_xyz_t``: field at height ``standoff_m``
        above the sample surface on the grid; returns shape (3, ny, nx), T.
    """

    name: str
    description: str
    params: Mapping[str, float] = field(default_factory=dict)
    sheet_moment_a: SheetMomentFn | None = None
    field_t: FieldFn | None = None

    def __post_init__(self) -> None:
        if (self.sheet_moment_a is None) == (self.field_t is None):
            raise ValueError(
                f"scene {self.name!r}: exactly one of sheet_moment_a and field_t must be "
                f"given; found {'both' if self.sheet_moment_a is not None else 'neither'}"
            )
        object.__setattr__(self, "params", MappingProxyType(dict(self.params)))


def _check_positive(scene: str, **values: float) -> None:
    for key, value in values.items():
        if not (np.isfinite(value) and value > 0):
            raise ValueError(f"scene {scene!r}: {key} must be a finite number > 0; found {value}")


def _random_waves(
    period_m: float, n_modes: int, seed: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Wave vectors (n_modes, 2) in rad/m and phases (n_modes,) of an isotropic maze."""
    rng = np.random.default_rng(seed)
    k = 2.0 * np.pi / period_m
    # Directions evenly spread over [0, π) with a random jitter: isotropic, no gaps.
    angle = (np.arange(n_modes) + rng.uniform(0.0, 1.0, n_modes)) * np.pi / n_modes
    phase = rng.uniform(0.0, 2.0 * np.pi, n_modes)
    return k * np.cos(angle), k * np.sin(angle), phase


def _maze_moment(
    x_m: np.ndarray,
    y_m: np.ndarray,
    *,
    kx: np.ndarray,
    ky: np.ndarray,
    phase: np.ndarray,
    moment_a: float,
    wall_width_m: float,
) -> np.ndarray:
    """``m_s tanh(g / (|∇g| δ))`` for ``g = Σ cos(k·r + φ)``; shape (ny, nx), A."""
    x = np.asarray(x_m, dtype=float)
    y = np.asarray(y_m, dtype=float)
    g = np.zeros((y.size, x.size))
    gx = np.zeros_like(g)
    gy = np.zeros_like(g)
    for kxi, kyi, phi in zip(kx, ky, phase, strict=True):
        # cos(kx x + ky y + φ) from separable factors: two outer products per mode.
        ex = np.exp(1j * (kxi * x + phi))
        ey = np.exp(1j * kyi * y)
        wave = np.outer(ey, ex)
        g += wave.real
        gx -= kxi * wave.imag
        gy -= kyi * wave.imag
    grad = np.hypot(gx, gy)
    # |∇g| vanishes only at isolated saddle points; the floor keeps tanh finite there.
    grad = np.maximum(grad, 1e-6 * float(np.hypot(kx[0], ky[0])) * np.sqrt(kx.size))
    return moment_a * np.tanh(g / (grad * wall_width_m))


def labyrinth(
    *,
    sheet_moment_a: float = 0.3e-3,
    period_m: float = 400e-9,
    wall_width_m: float = 20e-9,
    n_modes: int = 48,
    seed: int = 7,
) -> Scene:
    """A thin ferromagnetic film with labyrinth domains.

    Parameters
    ----------
    sheet_moment_a : float
        Saturation sheet moment density ``M_s t``, A (0.3 mA ≈ 32 µB/nm²).
    period_m : float
        Domain period (one up and one down stripe), m.
    wall_width_m : float
        Wall-width parameter δ of the tanh profile, m.
    n_modes : int
        Number of plane waves in the random field.
    seed : int
        Seed of the random directions and phases.

    Returns
    -------
    Scene
        Up and down domains in roughly equal areas.
    """
    _check_positive(
        "labyrinth", sheet_moment_a=sheet_moment_a, period_m=period_m, wall_width_m=wall_width_m
    )
    kx, ky, phase = _random_waves(period_m, n_modes, seed)

    def moment(x_m: np.ndarray, y_m: np.ndarray) -> np.ndarray:
        return _maze_moment(
            x_m, y_m, kx=kx, ky=ky, phase=phase, moment_a=sheet_moment_a, wall_width_m=wall_width_m
        )

    return Scene(
        name="labyrinth",
        description="thin ferromagnetic film with labyrinth domains",
        params={
            "sheet_moment_a": sheet_moment_a,
            "period_m": period_m,
            "wall_width_m": wall_width_m,
            "n_modes": n_modes,
            "seed": seed,
        },
        sheet_moment_a=moment,
    )


def weak_domains(
    *,
    sheet_moment_a: float = 3e-6,
    period_m: float = 1.2e-6,
    wall_width_m: float = 60e-9,
    n_modes: int = 32,
    seed: int = 11,
) -> Scene:
    """Antiferromagnet-like domains whose small uncompensated moment gives µT fields.

    Same construction as :func:`labyrinth`, with a sheet moment of a few µA (a 50 nm
    stand-off above a 3 µA edge gives ~12 µT) and wider, slower domains.

    Parameters
    ----------
    sheet_moment_a : float
        Uncompensated sheet moment density, A.
    period_m, wall_width_m, n_modes, seed
        As in :func:`labyrinth`.

    Returns
    -------
    Scene
    """
    base = labyrinth(
        sheet_moment_a=sheet_moment_a,
        period_m=period_m,
        wall_width_m=wall_width_m,
        n_modes=n_modes,
        seed=seed,
    )
    return Scene(
        name="weak_domains",
        description="antiferromagnet-like domains with a small uncompensated moment",
        params=base.params,
        sheet_moment_a=base.sheet_moment_a,
    )


def calibration_stripe(
    *,
    sheet_moment_a: float = 1e-3,
    width_m: float = 2e-6,
    center_x_m: float = 0.0,
) -> Scene:
    """A patterned stripe of out-of-plane film along y, with sharp edges.

    The edges sit at ``center_x_m ± width_m / 2``. On a grid, each pixel holds the moment
    averaged over its width along x (exact area fraction), so an edge inside a pixel gives
    that pixel a fractional value and nothing else is smoothed.

    Parameters
    ----------
    sheet_moment_a : float
        Sheet moment density ``M_s t`` inside the stripe, A.
    width_m : float
        Stripe width, m.
    center_x_m : float
        Stripe centre, m.

    Returns
    -------
    Scene
    """
    _check_positive("calibration_stripe", sheet_moment_a=sheet_moment_a, width_m=width_m)
    left_m = center_x_m - width_m / 2.0
    right_m = center_x_m + width_m / 2.0

    def moment(x_m: np.ndarray, y_m: np.ndarray) -> np.ndarray:
        x = np.asarray(x_m, dtype=float)
        pitch = float(x[1] - x[0]) if x.size > 1 else width_m
        lo = x - pitch / 2.0
        hi = x + pitch / 2.0
        covered = np.clip(np.minimum(hi, right_m) - np.maximum(lo, left_m), 0.0, None) / pitch
        return np.broadcast_to(sheet_moment_a * covered, (np.size(y_m), x.size)).copy()

    return Scene(
        name="calibration_stripe",
        description="patterned out-of-plane magnetised stripe with sharp edges",
        params={
            "sheet_moment_a": sheet_moment_a,
            "width_m": width_m,
            "center_x_m": center_x_m,
            "left_edge_m": left_m,
            "right_edge_m": right_m,
        },
        sheet_moment_a=moment,
    )


_TABLE = 64  # sites per side of the repeating disorder table


def _site_table(
    seed: int, jitter_m: float, spread: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-site random displacements (m) and radius factors, shape (_TABLE, _TABLE) each.

    Site ``(i, j)`` of a lattice takes entry ``[j % _TABLE, i % _TABLE]``: a disorder
    that is fixed by ``seed`` on any grid and repeats only every ``_TABLE`` sites.
    Displacements are uniform in ``[-jitter_m, jitter_m]`` per axis, radius factors
    uniform in ``[1 - spread, 1 + spread]``.
    """
    rng = np.random.default_rng(seed)
    dx = rng.uniform(-jitter_m, jitter_m, (_TABLE, _TABLE))
    dy = rng.uniform(-jitter_m, jitter_m, (_TABLE, _TABLE))
    factor = 1.0 + rng.uniform(-spread, spread, (_TABLE, _TABLE))
    return dx, dy, factor


def _check_seed(scene: str, seed: float) -> int:
    if not (np.isfinite(seed) and float(seed).is_integer() and seed >= 0):
        raise ValueError(f"scene {scene!r}: seed must be a whole number >= 0; found {seed}")
    return int(seed)


def _check_range(scene: str, key: str, value: float, *, lo: float, hi: float, text: str) -> None:
    if not (np.isfinite(value) and lo <= value <= hi):
        raise ValueError(f"scene {scene!r}: {key} must be {text}; found {value:g}")


def bubble_lattice(
    *,
    sheet_moment_a: float = 0.5e-3,
    spacing_m: float = 600e-9,
    radius_m: float = 150e-9,
    wall_width_m: float = 15e-9,
    disorder_m: float = 0.0,
    radius_spread: float = 0.0,
    seed: int = 0,
) -> Scene:
    """A hexagonal lattice of reversed (down) bubble domains in an up film.

    A site sits at the origin; the lattice vectors are ``(a, 0)`` and ``(a/2, a√3/2)``.
    ``m = m_s tanh((r - R) / δ)`` with ``r`` the distance to the nearest site. With
    disorder, each site ``i`` moves by up to ``disorder_m`` along each axis and has its
    own radius ``R_i = R (1 + radius_spread u_i)`` (``u_i`` uniform in [-1, 1]), and
    ``m = m_s tanh(min_i (r_i - R_i) / δ)``: overlapping bubbles merge.

    Parameters
    ----------
    sheet_moment_a : float
        Saturation sheet moment density, A.
    spacing_m : float
        Distance between neighbouring bubbles, m.
    radius_m : float
        Bubble radius (where m changes sign), m.
    wall_width_m : float
        Wall-width parameter δ, m.
    disorder_m : float
        Largest displacement of a site along x and along y, m; at most ``spacing_m / 4``.
    radius_spread : float
        Relative spread of the bubble radii, in [0, 0.5].
    seed : int
        Seed of the disorder (no effect without disorder).

    Returns
    -------
    Scene
        Without disorder (the defaults), exactly the ordered lattice.
    """
    name = "bubble_lattice"
    _check_positive(
        name,
        sheet_moment_a=sheet_moment_a,
        spacing_m=spacing_m,
        radius_m=radius_m,
        wall_width_m=wall_width_m,
    )
    if radius_m >= spacing_m / 2.0:
        raise ValueError(
            f"scene 'bubble_lattice': radius_m must be < spacing_m / 2 = {spacing_m / 2:g}; "
            f"found {radius_m:g}"
        )
    _check_range(
        name,
        "disorder_m",
        disorder_m,
        lo=0.0,
        hi=spacing_m / 4.0,
        text=f"in [0, spacing_m / 4 = {spacing_m / 4:g}]",
    )
    _check_range(name, "radius_spread", radius_spread, lo=0.0, hi=0.5, text="in [0, 0.5]")
    if radius_m * (1.0 + radius_spread) >= spacing_m / 2.0:
        raise ValueError(
            f"scene 'bubble_lattice': radius_m × (1 + radius_spread) must be < spacing_m / 2 "
            f"= {spacing_m / 2:g}; found {radius_m * (1.0 + radius_spread):g}"
        )
    seed = _check_seed(name, seed)
    a = spacing_m
    b = spacing_m * np.sqrt(3.0)

    def ordered(x_m: np.ndarray, y_m: np.ndarray) -> np.ndarray:
        x = np.asarray(x_m, dtype=float)[None, :]
        y = np.asarray(y_m, dtype=float)[:, None]
        # The hexagonal lattice is two rectangular (a × a√3) lattices, the second shifted
        # by (a/2, a√3/2); the nearest site is the nearer of the two nearest points.
        dx0 = x - a * np.round(x / a)
        dy0 = y - b * np.round(y / b)
        xs, ys = x - a / 2.0, y - b / 2.0
        dx1 = xs - a * np.round(xs / a)
        dy1 = ys - b * np.round(ys / b)
        r = np.sqrt(np.minimum(dx0**2 + dy0**2, dx1**2 + dy1**2))
        return sheet_moment_a * np.tanh((r - radius_m) / wall_width_m)

    dx_t, dy_t, factor_t = _site_table(seed, disorder_m, radius_spread)
    h = b / 2.0  # row spacing a√3/2

    def disordered(x_m: np.ndarray, y_m: np.ndarray) -> np.ndarray:
        x = np.asarray(x_m, dtype=float)[None, :]
        y = np.asarray(y_m, dtype=float)[:, None]
        # Site (i, j) sits at (a (i + j/2), j h) before its displacement. The nearest
        # ordered site is within a/√3; with displacements <= a/4 per axis and radii
        # < a/2, any site more than two rows or two columns away is farther (in r - R)
        # than that one [num], so 5 x 5 candidates around it suffice.
        j0 = np.round(y / h).astype(np.int64)
        best = np.full((y.size, x.size), np.inf)
        for dj in range(-2, 3):
            j = j0 + dj
            i0 = np.round(x / a - j / 2.0).astype(np.int64)
            for di in range(-2, 3):
                i = i0 + di
                jj, ii = j % _TABLE, i % _TABLE
                cx = a * (i + j / 2.0) + dx_t[jj, ii]
                cy = j * h + dy_t[jj, ii]
                s = np.hypot(x - cx, y - cy) - radius_m * factor_t[jj, ii]
                np.minimum(best, s, out=best)
        return sheet_moment_a * np.tanh(best / wall_width_m)

    is_ordered = disorder_m == 0.0 and radius_spread == 0.0
    return Scene(
        name=name,
        description="hexagonal lattice of reversed bubble domains in an up-magnetised film",
        params={
            "sheet_moment_a": sheet_moment_a,
            "spacing_m": spacing_m,
            "radius_m": radius_m,
            "wall_width_m": wall_width_m,
            "disorder_m": disorder_m,
            "radius_spread": radius_spread,
            "seed": seed,
        },
        sheet_moment_a=ordered if is_ordered else disordered,
    )


def stripe_domains(
    *,
    sheet_moment_a: float = 0.5e-3,
    period_m: float = 500e-9,
    angle_rad: float = 0.0,
    wall_width_m: float = 15e-9,
    duty: float = 0.5,
    offset_m: float = 0.0,
) -> Scene:
    """Parallel up and down stripe domains whose walls run at ``angle_rad`` from x.

    With ``t̂ = (cos α, sin α)`` the direction of the walls and
    ``s = -x sin α + y cos α - offset_m`` the distance across them, up domains of width
    ``duty × period_m`` start at ``s = 0`` and repeat every ``period_m``;
    ``m = m_s tanh(w / δ)`` with ``w`` the signed distance to the nearest wall (positive
    in up domains). At ``angle_rad = 0`` the walls are parallel to the fast (x) axis and
    ``m`` does not depend on x at all.

    Parameters
    ----------
    sheet_moment_a : float
        Saturation sheet moment density, A.
    period_m : float
        One up and one down domain, m.
    angle_rad : float
        Angle of the walls from the x axis, rad.
    wall_width_m : float
        Wall-width parameter δ, m.
    duty : float
        Fraction of each period that is up, in (0, 1).
    offset_m : float
        Shift of the pattern across the walls, m (0: a wall through the origin).

    Returns
    -------
    Scene
    """
    name = "stripe_domains"
    _check_positive(
        name, sheet_moment_a=sheet_moment_a, period_m=period_m, wall_width_m=wall_width_m
    )
    if not 0.0 < duty < 1.0:
        raise ValueError(f"scene {name!r}: duty must be in (0, 1); found {duty}")
    for key, value in (("angle_rad", angle_rad), ("offset_m", offset_m)):
        if not np.isfinite(value):
            raise ValueError(f"scene {name!r}: {key} must be finite; found {value}")
    sin_a, cos_a = float(np.sin(angle_rad)), float(np.cos(angle_rad))
    half_up = duty * period_m / 2.0

    def moment(x_m: np.ndarray, y_m: np.ndarray) -> np.ndarray:
        x = np.asarray(x_m, dtype=float)[None, :]
        y = np.asarray(y_m, dtype=float)[:, None]
        s = y * cos_a - x * sin_a - offset_m
        # Position relative to the nearest up-domain centre, in [-P/2, P/2); the nearest
        # wall is then always one of that domain's two walls, at |t| = duty P / 2.
        t = np.mod(s - half_up + period_m / 2.0, period_m) - period_m / 2.0
        return sheet_moment_a * np.tanh((half_up - np.abs(t)) / wall_width_m)

    return Scene(
        name=name,
        description="parallel up and down stripe domains",
        params={
            "sheet_moment_a": sheet_moment_a,
            "period_m": period_m,
            "angle_rad": angle_rad,
            "wall_width_m": wall_width_m,
            "duty": duty,
            "offset_m": offset_m,
        },
        sheet_moment_a=moment,
    )


def dot_array(
    *,
    sheet_moment_a: float = 1e-3,
    pitch_m: float = 500e-9,
    radius_m: float = 120e-9,
    angle_rad: float = 0.0,
    wall_width_m: float = 8e-9,
    jitter_m: float = 0.0,
    seed: int = 0,
) -> Scene:
    """A square array of up-magnetised discs on a non-magnetic background.

    A dot sits at the origin and the lattice vectors are ``pitch_m (cos α, sin α)`` and
    ``pitch_m (-sin α, cos α)``. ``m = m_s (1 - tanh(min_i (r_i - R) / δ)) / 2``, with
    ``r_i`` the distance to dot ``i``; the background holds no moment (``m`` falls below
    ``10⁻¹² m_s`` at 14 δ outside a disc). With jitter, each dot moves by up to
    ``jitter_m`` along each lattice axis.

    Parameters
    ----------
    sheet_moment_a : float
        Sheet moment density ``M_s t`` of the discs, A.
    pitch_m : float
        Lattice constant, m.
    radius_m : float
        Disc radius (where m = m_s / 2), m; less than ``pitch_m / 2``.
    angle_rad : float
        Rotation of the lattice from the x axis, rad.
    wall_width_m : float
        Edge-width parameter δ, m.
    jitter_m : float
        Largest displacement of a dot along each lattice axis, m; at most ``pitch_m / 4``.
    seed : int
        Seed of the jitter (no effect without jitter).

    Returns
    -------
    Scene
    """
    name = "dot_array"
    _check_positive(
        name,
        sheet_moment_a=sheet_moment_a,
        pitch_m=pitch_m,
        radius_m=radius_m,
        wall_width_m=wall_width_m,
    )
    if radius_m >= pitch_m / 2.0:
        raise ValueError(
            f"scene {name!r}: radius_m must be < pitch_m / 2 = {pitch_m / 2:g}; found {radius_m:g}"
        )
    _check_range(
        name,
        "jitter_m",
        jitter_m,
        lo=0.0,
        hi=pitch_m / 4.0,
        text=f"in [0, pitch_m / 4 = {pitch_m / 4:g}]",
    )
    if not np.isfinite(angle_rad):
        raise ValueError(f"scene {name!r}: angle_rad must be finite; found {angle_rad}")
    seed = _check_seed(name, seed)
    sin_a, cos_a = float(np.sin(angle_rad)), float(np.cos(angle_rad))
    du_t, dv_t, _ = _site_table(seed, jitter_m, 0.0)
    p = pitch_m

    def moment(x_m: np.ndarray, y_m: np.ndarray) -> np.ndarray:
        x = np.asarray(x_m, dtype=float)[None, :]
        y = np.asarray(y_m, dtype=float)[:, None]
        u = x * cos_a + y * sin_a  # lattice coordinates
        v = y * cos_a - x * sin_a
        i0 = np.round(u / p).astype(np.int64)
        j0 = np.round(v / p).astype(np.int64)
        # The nearest ordered dot is within p/√2, a jittered one within 1.06 p; dots two
        # or more sites away along an axis are at least 1.25 p away: 3 x 3 candidates.
        best = np.full(np.broadcast_shapes(u.shape, v.shape), np.inf)
        for dj in range(-1, 2):
            j = j0 + dj
            for di in range(-1, 2):
                i = i0 + di
                jj, ii = j % _TABLE, i % _TABLE
                s = np.hypot(u - (i * p + du_t[jj, ii]), v - (j * p + dv_t[jj, ii])) - radius_m
                np.minimum(best, s, out=best)
        return sheet_moment_a * 0.5 * (1.0 - np.tanh(best / wall_width_m))

    return Scene(
        name=name,
        description="square array of magnetised discs on a non-magnetic background",
        params={
            "sheet_moment_a": sheet_moment_a,
            "pitch_m": pitch_m,
            "radius_m": radius_m,
            "angle_rad": angle_rad,
            "wall_width_m": wall_width_m,
            "jitter_m": jitter_m,
            "seed": seed,
        },
        sheet_moment_a=moment,
    )


def film_edge(
    *,
    sheet_moment_a: float = 1e-3,
    angle_rad: float = np.pi / 2.0,
    offset_m: float = 0.0,
    wall_width_m: float = 10e-9,
) -> Scene:
    """A uniformly magnetised (+z) film that ends at a straight edge (analytic field).

    The edge runs along ``t̂ = (cos α, sin α)`` and the film lies on its left, i.e. where
    ``s = x sin α - y cos α - offset_m < 0``; ``n̂ = (sin α, -cos α)`` points from the
    film out across the edge, and ``offset_m`` moves the edge along ``n̂`` (the default,
    α = π/2, is the film on ``x < 0``). Across the edge ``m = m_s (1 - tanh(s / δ)) / 2``.

    Parameters
    ----------
    sheet_moment_a : float
        Sheet moment density ``I_s = M_s t`` of the film, A (may be negative: a down film).
    angle_rad : float
        Direction of the edge from the x axis, rad.
    offset_m : float
        Distance of the edge from the origin along ``n̂``, m.
    wall_width_m : float
        Edge-width parameter δ, m.

    Returns
    -------
    Scene

    Notes
    -----
    The field is computed directly rather than from a sampled sheet: a half-plane does
    not fit the periodic map of :func:`demo_stream.tip.render_field_t`, which would add
    an opposite edge in the margin around the scan. A sharp edge of a thin film at
    ``s_e`` is a line current ``I_s`` along ``t̂`` (its bound current), so at height
    ``d`` ([2]_; PHYSICS.md §5)

    .. math:: B_n = \\frac{\\mu_0 I_s}{2\\pi} \\frac{d}{(s - s_e)^2 + d^2}, \\qquad
              B_z = -\\frac{\\mu_0 I_s}{2\\pi} \\frac{s - s_e}{(s - s_e)^2 + d^2}.

    The soft edge spreads that current over ``s_e`` with the weight
    ``-∂m/∂s_e / m_s = sech²(s_e / δ) / (2 δ)``; the field is that superposition,
    integrated by the trapezoid rule on ``|s_e| ≤ 20 δ`` in steps of ``min(δ, d) / 8``
    (weights normalised so that the total current is exactly ``I_s``).

    References
    ----------
    .. [2] T. Hingant et al., "Measuring the magnetic moment density in patterned
       ultrathin ferromagnets with submicrometer resolution", Phys. Rev. Applied 4,
       014003 (2015) — the edge of a thin film as a calibration geometry.
    """
    name = "film_edge"
    _check_positive(name, wall_width_m=wall_width_m)
    for key, value in (
        ("sheet_moment_a", sheet_moment_a),
        ("angle_rad", angle_rad),
        ("offset_m", offset_m),
    ):
        if not np.isfinite(value):
            raise ValueError(f"scene {name!r}: {key} must be finite; found {value}")
    sin_a, cos_a = float(np.sin(angle_rad)), float(np.cos(angle_rad))

    def field_t(x_m: np.ndarray, y_m: np.ndarray, standoff_m: float) -> np.ndarray:
        from strayline.physics import line_current_field_t

        x = np.asarray(x_m, dtype=float)[None, :]
        y = np.asarray(y_m, dtype=float)[:, None]
        s = x * sin_a - y * cos_a - offset_m
        step = min(wall_width_m, standoff_m) / 8.0
        n_half = int(np.ceil(20.0 * wall_width_m / step))
        edges = step * np.arange(-n_half, n_half + 1)
        weight = 1.0 / np.cosh(edges / wall_width_m) ** 2
        weight /= weight.sum()
        b_n = np.zeros(s.shape)
        b_z = np.zeros(s.shape)
        for s_e, w in zip(edges, weight, strict=True):
            bn_i, bz_i = line_current_field_t(s, standoff_m, sheet_moment_a * w, s_e)
            b_n += bn_i
            b_z += bz_i
        return np.stack([b_n * sin_a, -b_n * cos_a, b_z])

    return Scene(
        name=name,
        description="uniformly magnetised film ending at a straight edge",
        params={
            "sheet_moment_a": sheet_moment_a,
            "angle_rad": angle_rad,
            "offset_m": offset_m,
            "wall_width_m": wall_width_m,
        },
        field_t=field_t,
    )


def wire(*, current_a: float = 1e-3, x0_m: float = 0.0) -> Scene:
    """A straight wire along y on the sample surface, carrying ``current_a`` along +y.

    The field at height ``d`` comes from
    :func:`strayline.physics.strayfield.line_current_field_t` (Biot–Savart for an
    infinite straight wire: ``|B| = μ0 I / (2π r)``).

    Parameters
    ----------
    current_a : float
        Current, A (may be negative).
    x0_m : float
        Wire position along x, m.

    Returns
    -------
    Scene
    """
    if not np.isfinite(current_a):
        raise ValueError(f"scene 'wire': current_a must be finite; found {current_a}")

    def field_t(x_m: np.ndarray, y_m: np.ndarray, standoff_m: float) -> np.ndarray:
        from strayline.physics import line_current_field_t

        x = np.asarray(x_m, dtype=float)
        bx, bz = line_current_field_t(x, standoff_m, current_a, x0_m)
        ny = np.size(y_m)
        out = np.zeros((3, ny, x.size))
        out[0] = np.broadcast_to(bx, x.shape)
        out[2] = np.broadcast_to(bz, x.shape)
        return out

    return Scene(
        name="wire",
        description="straight current-carrying wire along y",
        params={"current_a": current_a, "x0_m": x0_m},
        field_t=field_t,
    )


SCENES: Mapping[str, Callable[..., Scene]] = MappingProxyType(
    {
        "labyrinth": labyrinth,
        "weak_domains": weak_domains,
        "calibration_stripe": calibration_stripe,
        "bubble_lattice": bubble_lattice,
        "stripe_domains": stripe_domains,
        "dot_array": dot_array,
        "film_edge": film_edge,
        "wire": wire,
    }
)


def make_scene(name: str, **params: float) -> Scene:
    """Build the scene called ``name`` with keyword overrides of its defaults.

    Raises
    ------
    ValueError
        Unknown scene name or parameter, with the accepted choices in the message.
    """
    try:
        factory = SCENES[name]
    except KeyError:
        raise ValueError(f"scene must be one of {', '.join(SCENES)}; found {name!r}") from None
    import inspect

    accepted = list(inspect.signature(factory).parameters)
    unknown = sorted(set(params) - set(accepted))
    if unknown:
        raise ValueError(
            f"scene {name!r}: parameters must be among {', '.join(accepted)}; "
            f"found {', '.join(unknown)}"
        )
    return factory(**params)
