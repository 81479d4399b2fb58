"""Pure numerics of the products stage: a trace's maps on a regular grid, gap filling,
the vector field and the out-of-plane sheet moment.

Nothing here touches disk, logs or reads the clock; :mod:`strayline.products._read`
builds a :class:`TraceMaps` from a store and :mod:`strayline.products` writes the results.

References
----------
.. [1] E. A. Lima and B. P. Weiss, "Obtaining vector magnetic field maps from
   single-component measurements of geological samples", J. Geophys. Res. 114, B06102
   (2009).
.. [2] D. A. Broadway et al., "Improved current density and magnetization reconstruction
   through vector magnetic field measurements", Phys. Rev. Applied 14, 024076 (2020).
.. [3] I. A. Beardsley, "Reconstruction of the magnetization in a thin film by a
   combination of Lorentz microscopy and external field measurements", IEEE Trans.
   Magn. 25, 671 (1989).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from strayline.physics import vector_from_projection
from strayline.physics.sheet_moment import SheetMomentMap, reconstruct_sheet_moment

__all__ = [
    "TraceMaps",
    "VectorField",
    "assemble_trace",
    "contrast_map",
    "fill_nearest",
    "line_positions_m",
    "moment_arrays",
    "reconstruct_vector",
]


_SINGLE_PIXEL_M = 1e-9


@dataclass(frozen=True, eq=False)
class TraceMaps:
    """One trace direction's maps over the committed line range, coordinates ascending.

    Attributes
    ----------
    direction : {"forward", "backward"}
    x_m : ndarray, shape (nx,)
        Fast-axis pixel positions, m, strictly increasing.
    y_m : ndarray, shape (ny,)
        Slow-axis line positions, m, strictly increasing (unwritten lines inside the
        range get positions interpolated from the written ones).
    line_index : ndarray of int, shape (ny,)
        Store line index of each row.
    committed : ndarray of bool, shape (ny,)
        Whether each row's line is committed (rows of other lines hold NaN / not-written).
    maps : Mapping[str, ndarray]
        Store maps by name, each shape (ny, nx) in the row/column order of ``y_m``/``x_m``.
    pixel_m : (float, float)
        Grid pitch (pixel_y_m, pixel_x_m), m, used by the Fourier products.
    """

    direction: str
    x_m: np.ndarray
    y_m: np.ndarray
    line_index: np.ndarray
    committed: np.ndarray
    maps: Mapping[str, np.ndarray]
    pixel_m: tuple[float, float]

    @property
    def shape(self) -> tuple[int, int]:
        return (int(self.y_m.size), int(self.x_m.size))

    @property
    def n_lines_committed(self) -> int:
        return int(np.count_nonzero(self.committed))

    @property
    def valid(self) -> np.ndarray:
        """Pixels with a measured field along the NV axis, bool, shape (ny, nx)."""
        return self.committed[:, None] & np.isfinite(self.maps["field_nv_t"])


def line_positions_m(y_m: np.ndarray, written: np.ndarray, fallback_pitch_m: float) -> np.ndarray:
    """Slow-axis positions of every line, from those of the written ones.

    Parameters
    ----------
    y_m : ndarray, shape (n,)
        Stored positions, m (NaN where the line was not written).
    written : ndarray of bool, shape (n,)
        Lines whose position is known.
    fallback_pitch_m : float
        Line pitch used when fewer than two lines are written (the fast-axis pitch:
        square pixels, common practice), m.

    Returns
    -------
    ndarray, shape (n,)
        Least-squares straight line y = a + b·i through the written positions, evaluated
        at every index i; with one written line, a + pitch·(i − i₀).
    """
    index = np.arange(y_m.size, dtype=np.float64)
    known = written & np.isfinite(y_m)
    if np.count_nonzero(known) >= 2:
        slope, intercept = np.polyfit(index[known], y_m[known], 1)
        if abs(slope) > 0.0:
            return intercept + slope * index
    if np.any(known):
        i0 = int(np.flatnonzero(known)[0])
        return y_m[i0] + fallback_pitch_m * (index - i0)
    return fallback_pitch_m * index


def assemble_trace(
    direction: str,
    x_m: np.ndarray,
    y_m: np.ndarray,
    committed_lines: np.ndarray,
    maps: Mapping[str, np.ndarray],
) -> TraceMaps | None:
    """Crop a trace's maps to its committed line range and orient both axes ascending.

    Parameters
    ----------
    direction : str
    x_m : ndarray, shape (n_pixels,)
        Fast-axis positions of the map columns, m.
    y_m : ndarray, shape (n_lines_planned,)
        Stored slow-axis positions, m (NaN for lines never written).
    committed_lines : ndarray of int, shape (k,)
        Indices of the committed lines.
    maps : Mapping[str, ndarray]
        Whole store maps, each shape (n_lines_planned, n_pixels).

    Returns
    -------
    TraceMaps or None
        None when no line is committed.

    Raises
    ------
    ValueError
        If the fast-axis positions are not finite and strictly monotonic.
    """
    lines = np.unique(np.asarray(committed_lines, dtype=np.int64))
    if lines.size == 0:
        return None
    x = np.asarray(x_m, dtype=np.float64)
    steps = np.diff(x)
    if not np.all(np.isfinite(x)) or not (np.all(steps > 0) or np.all(steps < 0)):
        raise ValueError(
            f"{direction}/x must be finite and strictly monotonic to form a grid; "
            f"found {x.size} positions from {x[0]!r} to {x[-1]!r}"
        )
    # One pixel per line has no pitch of its own: take the line pitch (square pixels),
    # or 1 nm if there is a single line too, so extents and wavevectors stay finite.
    pitch_x = float(np.median(np.abs(steps))) if steps.size else _SINGLE_PIXEL_M
    first, last = int(lines[0]), int(lines[-1])
    rows = np.arange(first, last + 1)
    committed = np.isin(rows, lines)
    y_all = line_positions_m(
        np.asarray(y_m, dtype=np.float64), np.isin(np.arange(len(y_m)), lines), pitch_x
    )
    y = y_all[first : last + 1]
    pitch_y = float(abs(y[1] - y[0])) if y.size >= 2 else pitch_x
    if not steps.size:
        pitch_x = pitch_y
    cropped = {}
    for name, values in maps.items():
        block = np.array(values[first : last + 1], copy=True)
        if block.dtype.kind == "f":
            block[~committed] = np.nan
        cropped[name] = block
    col_order = slice(None) if x.size < 2 or steps[0] > 0 else slice(None, None, -1)
    row_order = slice(None) if y.size < 2 or y[1] > y[0] else slice(None, None, -1)
    return TraceMaps(
        direction=direction,
        x_m=x[col_order].copy(),
        y_m=y[row_order].copy(),
        line_index=rows[row_order].copy(),
        committed=committed[row_order].copy(),
        maps={name: block[row_order, col_order].copy() for name, block in cropped.items()},
        pixel_m=(pitch_y, pitch_x),
    )


def contrast_map(trace: TraceMaps) -> np.ndarray:
    """Mean depth of the fitted dips per pixel (NaN where none), shape (ny, nx)."""
    pair = np.stack([trace.maps["contrast_lo"], trace.maps["contrast_hi"]])
    finite = np.isfinite(pair)
    count = finite.sum(axis=0)
    total = np.where(finite, pair, 0.0).sum(axis=0)
    out = np.full(count.shape, np.nan)
    np.divide(total, count, out=out, where=count > 0)
    return out


def fill_nearest(
    values: np.ndarray, valid: np.ndarray, pixel_m: tuple[float, float] = (1.0, 1.0)
) -> np.ndarray:
    """Each invalid pixel takes the value of the nearest valid one (Euclidean, in metres).

    Parameters
    ----------
    values : ndarray, shape (ny, nx)
    valid : ndarray of bool, shape (ny, nx)
        At least one True.
    pixel_m : (float, float)
        (pixel_y_m, pixel_x_m), so "nearest" is measured in the sample plane.

    Returns
    -------
    ndarray, shape (ny, nx)
        A finite copy of ``values`` wherever ``valid`` is.

    Notes
    -----
    Nearest-neighbour filling keeps the field continuous at the edges of a gap, so the
    Fourier transform sees no artificial step there (a zero or median fill would add one);
    the filled pixels are flagged by the caller (common practice).
    """
    if not np.any(valid):
        raise ValueError("fill_nearest needs at least one valid pixel; found none")
    _, (iy, ix) = ndimage.distance_transform_edt(
        ~valid, sampling=pixel_m, return_distances=True, return_indices=True
    )
    return np.asarray(values, dtype=np.float64)[iy, ix]


@dataclass(frozen=True, eq=False)
class VectorField:
    """Field vector (and, with a standoff, sheet moment) reconstructed from B_NV.

    Attributes
    ----------
    b_xyz_t : ndarray, shape (3, ny, nx)
        (Bx, By, Bz), T, without their uniform parts.
    filled : ndarray of bool, shape (ny, nx)
        Pixels whose B_NV was filled in (no measurement) before transforming.
    m_z_a : ndarray, shape (ny, nx), or None
        Out-of-plane sheet moment density, A, without its mean; None without a standoff.
    k_cut_rad_per_m : float or None
        Cut-off of the Hann low-pass window used for ``m_z_a``, rad/m.
    moment : SheetMomentMap or None
        ``m_z_a`` with its uncertainty map and round-trip residual (None without a
        standoff).
    """

    b_xyz_t: np.ndarray
    filled: np.ndarray
    m_z_a: np.ndarray | None
    k_cut_rad_per_m: float | None
    moment: SheetMomentMap | None = None


def reconstruct_vector(
    b_nv_t: np.ndarray,
    valid: np.ndarray,
    *,
    pixel_m: tuple[float, float],
    nv_theta_rad: float,
    nv_phi_rad: float,
    standoff_m: float | None,
    sigma_nv_t: np.ndarray | None = None,
    standoff_sigma_m: float = 0.0,
) -> VectorField:
    """Bx, By, Bz from a map of B_NV, then m_z with its error bars when the standoff is
    known.

    Parameters
    ----------
    b_nv_t : ndarray, shape (ny, nx)
        Field along the NV axis, T (NaN where not measured).
    valid : ndarray of bool, shape (ny, nx)
        Measured pixels; the others are filled with :func:`fill_nearest` first.
    pixel_m : (float, float)
        (pixel_y_m, pixel_x_m), m; axes ascending.
    nv_theta_rad, nv_phi_rad : float
        NV axis in the scan frame, rad.
    standoff_m : float or None
        NV–sample distance d, m; None skips the sheet moment.
    sigma_nv_t : ndarray, shape (ny, nx), optional
        1σ of B_NV, T (filled like the field; a measured pixel without a finite σ takes
        the median σ); None: the uncertainty map counts the standoff's σ only.
    standoff_sigma_m : float
        1σ of d, m.

    Returns
    -------
    VectorField

    Notes
    -----
    B_NV(k) = [u_z − i(u_x k_x + u_y k_y)/k] B_z(k), solved for B_z(k), then
    B_{x,y}(k) = −i (k_{x,y}/k) B_z(k) (Lima & Weiss [1]_). Out-of-plane assumption:
    m_z(k) = 2 e^{kd} W(k) B_z(k)/(μ0 k) with a Hann window W cut at k_c = π/d, taken from
    B_NV in one filter after the border's median is subtracted, with its uncertainty map
    and round trip (:func:`strayline.physics.sheet_moment.reconstruct_sheet_moment`;
    Beardsley [3]_, Broadway et al. [2]_). Each axis is zero-padded by its own length.
    """
    valid = np.asarray(valid, dtype=bool)
    filled_values = fill_nearest(b_nv_t, valid, pixel_m)
    b_xyz = vector_from_projection(filled_values, nv_theta_rad, nv_phi_rad, pixel_m)
    if standoff_m is None:
        return VectorField(b_xyz_t=b_xyz, filled=~valid, m_z_a=None, k_cut_rad_per_m=None)
    if sigma_nv_t is None:
        sigma = np.zeros_like(filled_values)
    else:
        raw = np.asarray(sigma_nv_t, dtype=np.float64)
        known = valid & np.isfinite(raw) & (raw >= 0)
        typical = float(np.median(raw[known])) if np.any(known) else 0.0
        sigma = fill_nearest(np.where(known, raw, typical), valid, pixel_m)
    moment = reconstruct_sheet_moment(
        filled_values,
        sigma,
        nv_theta_rad=nv_theta_rad,
        nv_phi_rad=nv_phi_rad,
        pixel_m=pixel_m,
        standoff_m=standoff_m,
        standoff_sigma_m=standoff_sigma_m,
        measured=valid,
    )
    return VectorField(
        b_xyz_t=b_xyz,
        filled=~valid,
        m_z_a=moment.m_z_a,
        k_cut_rad_per_m=moment.k_cut_rad_per_m,
        moment=moment,
    )


def moment_arrays(vector: VectorField) -> list[tuple[str, np.ndarray, str, str]]:
    """The sheet-moment arrays of a trace's vector zarr group: (name, values, units,
    long name) each; none without a standoff."""
    if vector.moment is None:
        return []
    moment = vector.moment
    return [
        (
            "m_z_a",
            moment.m_z_a,
            "A",
            "out-of-plane sheet moment density M_z t (mean removed; Hann low-pass)",
        ),
        (
            "m_z_sigma_a",
            moment.sigma_a,
            "A",
            "1 sigma of m_z_a: field sigma map, background and standoff sigma in quadrature",
        ),
        (
            "m_z_sigma_standoff_a",
            moment.sigma_standoff_a,
            "A",
            "part of m_z_sigma_a from the standoff's 1 sigma",
        ),
        (
            "residual_nv_t",
            moment.residual_nv_t,
            "T",
            "B_NV minus B_NV forward-modelled from m_z_a (measured pixels; means removed)",
        ),
    ]
