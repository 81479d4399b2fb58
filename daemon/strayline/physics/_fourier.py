"""Argument checks, padding and cropping shared by the Fourier-space field code."""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike


def positive_finite(value: float, name: str, *, allow_zero: bool = False) -> float:
    """Return `value` as float if it is finite and > 0 (≥ 0 with `allow_zero`)."""
    v = float(value)
    ok = math.isfinite(v) and (v >= 0.0 if allow_zero else v > 0.0)
    if not ok:
        bound = "≥ 0" if allow_zero else "> 0"
        raise ValueError(f"{name} must be finite and {bound}; found {value!r}")
    return v


def pixel_pair(pixel_m: float | tuple[float, float]) -> tuple[float, float]:
    """(pixel_y_m, pixel_x_m) from one pitch or a (y, x) pair, each finite and > 0."""
    if isinstance(pixel_m, tuple | list | np.ndarray):
        if len(pixel_m) != 2:
            raise ValueError(
                f"pixel_m must be one pitch or a (pixel_y_m, pixel_x_m) pair; found {pixel_m!r}"
            )
        return positive_finite(pixel_m[0], "pixel_m[0]"), positive_finite(pixel_m[1], "pixel_m[1]")
    p = positive_finite(pixel_m, "pixel_m")
    return p, p


def require_map(values: ArrayLike, name: str, shape: tuple[int, ...] | None = None) -> np.ndarray:
    """`values` as a finite float64 2-D array (of `shape`, if given)."""
    a = np.asarray(values, dtype=np.float64)
    if a.ndim != 2:
        raise ValueError(f"{name} must be a 2-D map (ny, nx); found shape {a.shape}")
    if shape is not None and a.shape != shape:
        raise ValueError(f"{name} must have shape {shape} like m_z_a; found {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError(
            f"{name} must be finite everywhere; found {np.sum(~np.isfinite(a))} NaN/inf"
        )
    return a


def pad_amounts(shape: tuple[int, ...], pad: int | None) -> tuple[int, int]:
    """Padding per side along (y, x): each axis's own length for None, else `pad` on both."""
    if pad is None:
        return shape[0], shape[1]
    if int(pad) != pad or pad < 0:
        raise ValueError(f"pad must be a whole number of pixels ≥ 0 or None; found {pad!r}")
    return int(pad), int(pad)


def zero_pad(values: np.ndarray, pads: tuple[int, int]) -> np.ndarray:
    """Zeros added around a (ny, nx) map, pads = (per side along y, per side along x)."""
    py, px = pads
    return np.pad(values, ((py, py), (px, px)))


def crop(values: np.ndarray, pads: tuple[int, int]) -> np.ndarray:
    """Undo :func:`zero_pad` on the last two axes."""
    py, px = pads
    ny, nx = values.shape[-2:]
    return values[..., py : ny - py, px : nx - px]
