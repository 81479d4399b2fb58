"""Magnetic field at the NV from fitted resonances.

Pure functions over arrays; returns a frozen :class:`LineField`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class LineField:
    """Field results for the n_pixels of one line (all arrays shape (n_pixels,), 1σ).

    Attributes
    ----------
    field_nv_t, field_nv_sigma_t
        Field projected on the NV axis, T.
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
    field_abs_t: np.ndarray
    field_abs_sigma_t: np.ndarray
    angle_rad: np.ndarray
    angle_sigma_rad: np.ndarray
    center_mean_hz: np.ndarray
    center_mean_sigma_hz: np.ndarray
    status: np.ndarray
