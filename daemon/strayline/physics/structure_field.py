"""Field of straight calibration structures on a scan grid: a film edge, a stripe (two
edges) and a straight wire, projected on the NV axis.

Geometry (scan frame, maps indexed ``[iy, ix]``): the structure runs along
t̂ = (cos α, sin α); n̂ = (sin α, −cos α) points across it, and

.. math:: s = x \\sin α − y \\cos α − p

is the signed distance from the structure's line, ``p`` = ``position_m`` moving that line
along n̂. The NV sits at height d above the film's top surface (above the wire's axis).

- **film edge** — a +z film of sheet moment I_s = M_s t on the side s < 0. Its bound
  current M × n̂ is a line current I_s along +t̂ at s = 0 (thin film, t ≪ d), so
  B_n = (μ0 I_s/2π) d/(s² + d²), B_z = −(μ0 I_s/2π) s/(s² + d²) (Hingant et al. [1]_;
  PHYSICS.md §5); with a known thickness t the exact slab edge of
  :func:`strayline.physics.strayfield.film_edge_field_t` is used instead.
- **stripe** — film on |s| < w/2: an edge at s = +w/2 (film on its s < side) and one at
  s = −w/2 (film on its s > side), i.e. line currents +I_s and −I_s along t̂.
- **wire** — a straight wire along t̂ through s = 0 carrying I along +t̂: the same field
  as a thin-film edge, B = μ0 I/(2π r) (Biot–Savart).

The field has no component along t̂, so B_NV = u_n B_n + u_z B_z with u_n = u·n̂. One
straight structure therefore measures two amplitudes, I u_n and I u_z: of I, θ and φ at
most two can be found from it (the fit refuses more), and φ only up to the mirror image
about n̂ (u·t̂ is invisible).

References
----------
.. [1] T. Hingant, J.-P. Tetienne, L. J. Martínez, K. Garcia, D. Ravelosona, J.-F. Roch
   and V. Jacques, "Measuring the magnetic moment density in patterned ultrathin
   ferromagnets with submicrometer resolution", Phys. Rev. Applied 4, 014003 (2015).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike

from strayline.physics._fourier import positive_finite
from strayline.physics.hamiltonian import nv_axis
from strayline.physics.strayfield import film_edge_field_t, line_current_field_t

__all__ = [
    "STRUCTURE_MODELS",
    "StraightStructure",
    "StructureModel",
    "structure_field_nv_t",
    "structure_field_t",
]

StructureModel = Literal["film-edge", "stripe", "wire"]
#: The straight structures a tip can be calibrated on, and the name of each one's strength.
STRUCTURE_MODELS: Mapping[str, str] = {
    "film-edge": "sheet_moment_a",
    "stripe": "sheet_moment_a",
    "wire": "current_a",
}


@dataclass(frozen=True)
class StraightStructure:
    """A straight structure and the NV that looks at it.

    Attributes
    ----------
    model : {"film-edge", "stripe", "wire"}
    standoff_m : float
        NV height d above the film's top surface (the wire's axis), m.
    strength_a : float
        Sheet moment I_s = M_s t (film edge, stripe) or current I (wire), A; signed.
    position_m : float
        Offset p of the structure's line (a stripe's centre line) along n̂, m.
    angle_rad : float
        Direction α of t̂ from the scan x axis, rad.
    width_m : float or None
        Stripe width w, m (stripe only).
    thickness_m : float or None
        Film thickness t, m (film edge, stripe); None: thin film.
    """

    model: StructureModel
    standoff_m: float
    strength_a: float
    position_m: float
    angle_rad: float
    width_m: float | None = None
    thickness_m: float | None = None

    def __post_init__(self) -> None:
        if self.model not in STRUCTURE_MODELS:
            raise ValueError(
                f"model must be one of {', '.join(STRUCTURE_MODELS)}; found {self.model!r}"
            )
        positive_finite(self.standoff_m, "standoff_m")
        for name in ("strength_a", "position_m", "angle_rad"):
            if not np.isfinite(getattr(self, name)):
                raise ValueError(f"{name} must be finite; found {getattr(self, name)!r}")
        if self.model == "stripe":
            if self.width_m is None:
                raise ValueError("a stripe needs width_m; found None")
            positive_finite(self.width_m, "width_m")
        if self.thickness_m is not None:
            if self.model == "wire":
                raise ValueError("thickness_m applies to films, not to a wire")
            positive_finite(self.thickness_m, "thickness_m")


def _edge_nz(
    s: np.ndarray, standoff_m: float, strength_a: float, thickness_m: float | None
) -> tuple[np.ndarray, np.ndarray]:
    """(B_n, B_z) of one film edge at s = 0, film on s < 0."""
    if thickness_m is None:
        return line_current_field_t(s, standoff_m, strength_a)
    return film_edge_field_t(s, standoff_m, strength_a, thickness_m)


def _field_nz(structure: StraightStructure, s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(B_n, B_z) at signed distances ``s`` from the structure's line."""
    d, strength, t = structure.standoff_m, structure.strength_a, structure.thickness_m
    if structure.model == "wire":
        return line_current_field_t(s, d, strength)
    if structure.model == "film-edge":
        return _edge_nz(s, d, strength, t)
    half = 0.5 * float(structure.width_m)  # type: ignore[arg-type]  # checked in __post_init__
    bn_right, bz_right = _edge_nz(s - half, d, strength, t)
    bn_left, bz_left = _edge_nz(s + half, d, strength, t)
    return bn_right - bn_left, bz_right - bz_left


def _signed_distance(
    structure: StraightStructure, x_m: ArrayLike, y_m: ArrayLike
) -> tuple[np.ndarray, float, float]:
    x = np.asarray(x_m, dtype=np.float64)
    y = np.asarray(y_m, dtype=np.float64)
    sin_a, cos_a = float(np.sin(structure.angle_rad)), float(np.cos(structure.angle_rad))
    return x * sin_a - y * cos_a - structure.position_m, sin_a, cos_a


def structure_field_t(structure: StraightStructure, x_m: ArrayLike, y_m: ArrayLike) -> np.ndarray:
    """Field (Bx, By, Bz) of a straight structure at the NV's height.

    Parameters
    ----------
    structure : StraightStructure
    x_m, y_m : array_like, broadcastable shapes (...)
        Point coordinates, m (for a grid: ``x[None, :]`` and ``y[:, None]``).

    Returns
    -------
    ndarray, shape (3, ...)
        (Bx, By, Bz), T.

    Notes
    -----
    B = B_n n̂ + B_z ẑ with n̂ = (sin α, −cos α, 0) (module docstring; Hingant et al. 2015
    for the edge, Biot–Savart for the wire).
    """
    s, sin_a, cos_a = _signed_distance(structure, x_m, y_m)
    b_n, b_z = _field_nz(structure, s)
    return np.stack([b_n * sin_a, -b_n * cos_a, b_z])


def structure_field_nv_t(
    structure: StraightStructure,
    x_m: ArrayLike,
    y_m: ArrayLike,
    nv_theta_rad: float,
    nv_phi_rad: float,
) -> np.ndarray:
    """Projection on the NV axis, B_NV = u·B, of a straight structure's field.

    Parameters
    ----------
    structure : StraightStructure
    x_m, y_m : array_like
        As in :func:`structure_field_t`.
    nv_theta_rad, nv_phi_rad : float
        NV axis (see :func:`strayline.physics.hamiltonian.nv_axis`), rad.

    Returns
    -------
    ndarray, shape (...)
        B_NV, T.

    Notes
    -----
    B_NV = u_n B_n + u_z B_z, u_n = u_x sin α − u_y cos α (module docstring).
    """
    s, sin_a, cos_a = _signed_distance(structure, x_m, y_m)
    b_n, b_z = _field_nz(structure, s)
    ux, uy, uz = nv_axis(nv_theta_rad, nv_phi_rad)
    return (ux * sin_a - uy * cos_a) * b_n + uz * b_z
