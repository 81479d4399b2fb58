"""The fitter: every ODMR spectrum of a line at once, batched Levenberg–Marquardt.

:func:`fit_line` takes arrays and returns a frozen :class:`LineFit`; a failed fit is a
:class:`FitStatus` code, never an exception. No I/O, no clock.
"""

from strayline.fit.kernels import prepare_kernels
from strayline.fit.line_fit import MEASURED, FitModel, FitStatus, LineFit, failed_fits, fit_line

__all__ = [
    "MEASURED",
    "FitModel",
    "FitStatus",
    "LineFit",
    "failed_fits",
    "fit_line",
    "prepare_kernels",
]
