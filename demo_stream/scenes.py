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
- :func:`bubble_lattice` — a hexagonal lattice of reversed bubble domains;
- :func:`wire` — a straight current-carrying wire along y (analytic field).

Domain walls
------------
Labyrinth and bubble walls follow the tanh profile ``m = m_s tanh(s / δ)``, where ``s``
is the signed distance to the wall and ``δ`` the wall-width parameter [1]_ (the profile
of a Bloch wall in a uniaxial film; the wall is ``π δ`` wide in Lilley's definition).
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
    "labyrinth",
    "make_scene",
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


def bubble_lattice(
    *,
    sheet_moment_a: float = 0.5e-3,
    spacing_m: float = 600e-9,
    radius_m: float = 150e-9,
    wall_width_m: float = 15e-9,
) -> Scene:
    """A hexagonal lattice of reversed (down) bubble domains in an up film.

    A site sits at the origin; the lattice vectors are ``(a, 0)`` and ``(a/2, a√3/2)``.
    ``m = m_s tanh((r - R) / δ)`` with ``r`` the distance to the nearest site.

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

    Returns
    -------
    Scene
    """
    _check_positive(
        "bubble_lattice",
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
    a = spacing_m
    b = spacing_m * np.sqrt(3.0)

    def moment(x_m: np.ndarray, y_m: np.ndarray) -> np.ndarray:
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

    return Scene(
        name="bubble_lattice",
        description="hexagonal lattice of reversed bubble domains in an up-magnetised film",
        params={
            "sheet_moment_a": sheet_moment_a,
            "spacing_m": spacing_m,
            "radius_m": radius_m,
            "wall_width_m": wall_width_m,
        },
        sheet_moment_a=moment,
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
