"""Pure numerics of line cuts through a trace's field map: the pixels a cut takes, and a
cut placed across the strongest wall automatically.

A cut from A to B with a band width w takes every measured pixel whose centre lies
within w·pitch/2 of the segment AB (measured at right angles) and between its ends; each
pixel is one sample, at its own distance s along AB (its centre projected onto AB), so
the samples keep their own σ and are independent (no pixel is used twice, nothing is
interpolated). A straight wall crossed at right angles gives the same field at equal s,
so the band only adds samples.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from strayline.products._maps import TraceMaps, fill_nearest

__all__ = ["CutSamples", "cut_across_strongest_wall", "sample_cut"]


@dataclass(frozen=True, eq=False)
class CutSamples:
    """The pixels of one cut, ordered along it.

    Attributes
    ----------
    start_m, end_m : (float, float)
        The cut's ends (x, y), m.
    s_m : ndarray, shape (n,)
        Distance of each pixel along the cut from ``start_m``, m.
    b_nv_t, sigma_t : ndarray, shape (n,)
        The pixels' field along the NV axis and its 1σ, T.
    x_m, y_m : ndarray, shape (n,)
        The pixels' centres, m.
    width_px : int
        Band width, pixels.
    """

    start_m: tuple[float, float]
    end_m: tuple[float, float]
    s_m: np.ndarray
    b_nv_t: np.ndarray
    sigma_t: np.ndarray
    x_m: np.ndarray
    y_m: np.ndarray
    width_px: int

    @property
    def direction_rad(self) -> float:
        """Direction of the cut from the x axis, rad."""
        return math.atan2(self.end_m[1] - self.start_m[1], self.end_m[0] - self.start_m[0])

    @property
    def length_m(self) -> float:
        return math.hypot(self.end_m[0] - self.start_m[0], self.end_m[1] - self.start_m[1])


def sample_cut(
    trace: TraceMaps,
    start_m: tuple[float, float],
    end_m: tuple[float, float],
    *,
    width_px: int = 1,
) -> CutSamples:
    """The measured pixels of a cut from ``start_m`` to ``end_m`` (module docstring).

    Raises
    ------
    ValueError
        If the ends coincide, the width is not a whole number ≥ 1, or no measured pixel
        lies on the cut.
    """
    if int(width_px) != width_px or width_px < 1:
        raise ValueError(f"width_px must be a whole number ≥ 1; found {width_px!r}")
    x0, y0 = (float(v) for v in start_m)
    x1, y1 = (float(v) for v in end_m)
    length = math.hypot(x1 - x0, y1 - y0)
    if not length > 0:
        raise ValueError(f"a cut needs two different ends; found {start_m} and {end_m}")
    cx, cy = (x1 - x0) / length, (y1 - y0) / length
    gx, gy = np.meshgrid(trace.x_m, trace.y_m)
    along = (gx - x0) * cx + (gy - y0) * cy
    across = -(gx - x0) * cy + (gy - y0) * cx
    half_band = 0.5 * width_px * min(trace.pixel_m)
    sigma = np.asarray(trace.maps["field_nv_sigma_t"], dtype=np.float64)
    take = (
        trace.valid
        & (np.abs(across) <= half_band * (1 + 1e-9))
        & (along >= -1e-12)
        & (along <= length * (1 + 1e-12))
        & np.isfinite(sigma)
        & (sigma > 0)
    )
    if not np.any(take):
        raise ValueError(
            f"no measured pixel lies on the cut from ({x0 * 1e9:.0f}, {y0 * 1e9:.0f}) nm to "
            f"({x1 * 1e9:.0f}, {y1 * 1e9:.0f}) nm"
        )
    order = np.argsort(along[take], kind="stable")
    return CutSamples(
        start_m=(x0, y0),
        end_m=(x1, y1),
        s_m=along[take][order],
        b_nv_t=np.asarray(trace.maps["field_nv_t"], dtype=np.float64)[take][order],
        sigma_t=sigma[take][order],
        x_m=gx[take][order],
        y_m=gy[take][order],
        width_px=int(width_px),
    )


def cut_across_strongest_wall(
    trace: TraceMaps, half_length_m: float
) -> tuple[tuple[float, float], tuple[float, float]]:
    """Ends of a cut through the strongest gradient of the map, along that gradient.

    The field map (gaps filled, smoothed by a Gaussian of one pixel) is differentiated;
    the pixel of largest |∇B_NV|, at least ``half_length_m`` (or a quarter of the map,
    if less) inside the map, is the wall's place. Its normal is the principal axis of the
    gradient's structure tensor averaged over a Gaussian of two pixels around it (the
    field of a straight wall varies only across it, so every gradient near it points
    along its normal, whatever the NV axis) [cp]. The cut runs ``half_length_m`` to
    either side, shortened to stay in the map.

    Raises
    ------
    ValueError
        If the map has no measured pixel.
    """
    valid = trace.valid
    if not np.any(valid):
        raise ValueError("the map has no measured pixel to find a wall in")
    filled = fill_nearest(trace.maps["field_nv_t"], valid, trace.pixel_m)
    smooth = ndimage.gaussian_filter(filled, 1.0, mode="nearest")
    gy, gx = np.gradient(smooth, trace.pixel_m[0], trace.pixel_m[1])
    strength = np.hypot(gx, gy)
    xg, yg = np.meshgrid(trace.x_m, trace.y_m)
    span_x = trace.x_m[-1] - trace.x_m[0]
    span_y = trace.y_m[-1] - trace.y_m[0]
    margin_x = min(half_length_m, span_x / 4)
    margin_y = min(half_length_m, span_y / 4)
    inside = (
        valid
        & (xg >= trace.x_m[0] + margin_x)
        & (xg <= trace.x_m[-1] - margin_x)
        & (yg >= trace.y_m[0] + margin_y)
        & (yg <= trace.y_m[-1] - margin_y)
    )
    if not np.any(inside):
        inside = valid
    iy, ix = np.unravel_index(int(np.argmax(np.where(inside, strength, -np.inf))), strength.shape)
    px, py = float(trace.x_m[ix]), float(trace.y_m[iy])
    tensor = np.array(
        [
            [
                ndimage.gaussian_filter(gx * gx, 2.0, mode="nearest")[iy, ix],
                ndimage.gaussian_filter(gx * gy, 2.0, mode="nearest")[iy, ix],
            ],
            [0.0, ndimage.gaussian_filter(gy * gy, 2.0, mode="nearest")[iy, ix]],
        ]
    )
    tensor[1, 0] = tensor[0, 1]
    _, vectors = np.linalg.eigh(tensor)
    cx, cy = _refine_normal(trace, (px, py), vectors[:, -1], half_length_m)
    reach = half_length_m
    for coord, step, lo, hi in (
        (px, cx, trace.x_m[0], trace.x_m[-1]),
        (py, cy, trace.y_m[0], trace.y_m[-1]),
    ):
        if abs(step) > 1e-12:
            reach = min(reach, (hi - coord) / abs(step), (coord - lo) / abs(step))
    reach = max(reach, min(trace.pixel_m))
    return (px - reach * cx, py - reach * cy), (px + reach * cx, py + reach * cy)


_REFINE_SPAN_RAD = np.radians(6.0)
_REFINE_STEP_RAD = np.radians(0.05)


def _refine_normal(
    trace: TraceMaps, centre: tuple[float, float], normal: np.ndarray, radius_m: float
) -> tuple[float, float]:
    """The normal within ±6° of ``normal`` along which the measured pixels within
    ``radius_m`` of ``centre`` vary most as one profile: binned by their distance along
    it (half-pixel bins), the bins' means explain the most of the map (a straight wall's
    field depends on that distance alone). A normal off by ε mixes the NV axis's
    component along the wall into the one across it (≈ 1 % of M_s t per degree for a
    (100) tip), so the tensor's estimate is refined."""
    gx, gy = np.meshgrid(trace.x_m, trace.y_m)
    near = trace.valid & (np.hypot(gx - centre[0], gy - centre[1]) <= radius_m)
    x, y = gx[near] - centre[0], gy[near] - centre[1]
    b = np.asarray(trace.maps["field_nv_t"], dtype=np.float64)[near]
    start = math.atan2(float(normal[1]), float(normal[0]))
    if b.size < 8:
        return math.cos(start), math.sin(start)
    bin_m = 0.5 * min(trace.pixel_m)
    best, best_score = start, -np.inf
    for angle in start + np.arange(-_REFINE_SPAN_RAD, _REFINE_SPAN_RAD, _REFINE_STEP_RAD):
        s = x * math.cos(angle) + y * math.sin(angle)
        index = np.floor((s - s.min()) / bin_m).astype(np.int64)
        count = np.bincount(index)
        total = np.bincount(index, weights=b)
        filled = count > 0
        score = float(np.sum(total[filled] ** 2 / count[filled]))
        if score > best_score:
            best, best_score = float(angle), score
    return math.cos(best), math.sin(best)
