"""Getting the fit kernels ready before the first line needs them.

The fitter's compiled kernels are built the first time they run after an install (about
half a minute) and loaded from numba's on-disk cache after that (a fraction of a second).
:func:`prepare_kernels` runs the fitter once on a few synthetic spectra (two separated
dips, a close pair, a weak and an empty one) so that this happens when the daemon starts,
where an operator expects a wait and the service says why, not silently on the first
line of the night.
"""

from __future__ import annotations

import time

import numpy as np

from strayline.fit.line_fit import FitModel, fit_line
from strayline.physics import lorentzian_dips

__all__ = ["prepare_kernels"]


def prepare_kernels(model: FitModel | None = None) -> float:
    """Run the fitter on a handful of synthetic spectra; return the time it took, s."""
    started = time.perf_counter()
    freq_hz = np.linspace(2.80e9, 2.94e9, 71)
    centres = np.array([[2.845e9, 2.895e9], [2.866e9, 2.874e9], [2.85e9, 2.89e9]])
    depths = np.array([[0.1, 0.1], [0.1, 0.1], [0.02, 0.02]])
    rows = [
        lorentzian_dips(freq_hz, c, d, np.array([6e6, 6e6]), 1000.0)
        for c, d in zip(centres, depths, strict=True)
    ]
    rows.append(np.full_like(freq_hz, 1000.0))  # no dip at all
    counts = np.random.default_rng(0).poisson(np.array(rows)).astype(np.float64)
    fit_line(freq_hz, counts, model if model is not None else FitModel())
    return time.perf_counter() - started
