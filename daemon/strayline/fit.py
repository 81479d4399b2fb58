"""Batched ODMR fits: every spectrum of a line at once.

Pure functions over arrays; returns a frozen :class:`LineFit`.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import IntEnum

import numpy as np


class FitStatus(IntEnum):
    """Outcome of one spectrum's fit. A failed fit is a value, never an exception."""

    OK = 0
    NO_RESONANCE = 1  # no dip above the noise
    MERGED = 2  # the two dips could not be separated (|gamma B_par| below ~ half a linewidth)
    AT_BOUND = 3  # a parameter ended on its bound
    NOT_CONVERGED = 4  # iteration limit reached
    LOW_COUNTS = 5  # too few photons to fit
    ONE_RESONANCE = 6  # two-dip model asked for, only one dip inside the window


@dataclass(frozen=True, eq=False)
class LineFit:
    """Fit results for the n_pixels spectra of one line.

    Dip columns are ordered by frequency (column 0 = lower resonance). For the one-dip
    model, column 1 is NaN. Sigmas are 1σ.

    Attributes
    ----------
    center_hz, center_sigma_hz : ndarray, shape (n_pixels, 2)
        Resonance frequencies, Hz.
    contrast, contrast_sigma : ndarray, shape (n_pixels, 2)
        Fractional dip depth (0.1 = 10 %).
    fwhm_hz, fwhm_sigma_hz : ndarray, shape (n_pixels, 2)
        Full width at half maximum, Hz (equal columns when widths are shared).
    baseline, baseline_sigma : ndarray, shape (n_pixels,)
        Off-resonance counts per sample.
    slope : ndarray, shape (n_pixels,)
        Baseline slope, counts per sample per Hz (0 when not fitted).
    chi2_red : ndarray, shape (n_pixels,)
        Reduced χ² of the fit.
    status : ndarray of uint8, shape (n_pixels,)
        :class:`FitStatus` codes.
    n_iter : ndarray of int32, shape (n_pixels,)
        Iterations used.
    """

    center_hz: np.ndarray
    center_sigma_hz: np.ndarray
    contrast: np.ndarray
    contrast_sigma: np.ndarray
    fwhm_hz: np.ndarray
    fwhm_sigma_hz: np.ndarray
    baseline: np.ndarray
    baseline_sigma: np.ndarray
    slope: np.ndarray
    chi2_red: np.ndarray
    status: np.ndarray
    n_iter: np.ndarray

    @property
    def n_pixels(self) -> int:
        return int(self.status.shape[0])
