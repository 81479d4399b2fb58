"""Numbers shared across stages, each defined once: the robust spread, unit factors.

Pure functions over numpy arrays; no I/O.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "HZ_PER_MHZ",
    "MAD_TO_SIGMA",
    "MIB",
    "MINUS",
    "duration_text",
    "finite_or_none",
    "median",
    "median_and_spread",
    "percent_text",
    "plain_number",
    "signed_text",
]

#: 1 / Φ⁻¹(3/4): the median absolute deviation of a normal sample times this is its σ
#: (common practice; e.g. Huber, *Robust Statistics*, 1981, §5.1).
MAD_TO_SIGMA = 1.482602218505602
#: Bytes in one mebibyte (config keys in MiB are converted at the edge).
MIB = 1024 * 1024
#: Hz in one MHz (config keys in MHz are converted at the edge).
HZ_PER_MHZ = 1e6
#: The minus sign in text for people (U+2212), as typeset; ASCII '-' stays in data.
MINUS = "\u2212"


def median(a: np.ndarray | list[float]) -> float:
    """``np.median`` of a 1-D array, the same number (NaN if any value is NaN or there is
    none), at a fifth of its cost on small arrays: the rules take a few dozen medians of a
    few to a few hundred values per line, where ``np.median``'s own overhead (about 20 µs a
    call) was most of the time."""
    ordered = np.sort(np.asarray(a, dtype=np.float64))
    n = ordered.size
    if n == 0 or np.isnan(ordered[-1]):  # NaN sorts last
        return math.nan
    middle = n // 2
    if n % 2:
        return float(ordered[middle])
    return float((ordered[middle - 1] + ordered[middle]) / 2)


def median_and_spread(a: np.ndarray) -> tuple[float, float]:
    """Median and robust σ (``MAD_TO_SIGMA`` · MAD) of a non-empty 1-D array of finite values."""
    med = median(a)
    return med, float(MAD_TO_SIGMA * median(np.abs(a - med)))


def finite_or_none(value: float | None) -> float | None:
    """``value`` as a float, or None when it is None, NaN or infinite (JSON has no NaN)."""
    return None if value is None or not math.isfinite(value) else float(value)


def plain_number(value: float, significant: int = 3) -> str:
    """``value`` to about ``significant`` figures without an exponent or trailing zeros:
    ``201``, ``0.0421``, ``6`` (6.0), ``1000`` (999.5), ``12300``; a typeset minus."""
    if value == 0 or not math.isfinite(value):
        return f"{value:.0f}"
    decimals = max(significant - 1 - math.floor(math.log10(abs(value))), 0)
    text = f"{value:.{decimals}f}"
    if decimals:
        text = text.rstrip("0").rstrip(".")
    return text.replace("-", MINUS)


def signed_text(value: float, digits: int = 1) -> str:
    """``value`` with its sign always shown and a typeset minus: ``+4.25``, ``−0.3``
    (``digits`` after the point; a value that rounds to zero reads ``+0``)."""
    rounded = round(value, digits)
    text = f"{rounded if rounded != 0 else 0.0:+.{digits}f}"
    return text.replace("-", MINUS)


def percent_text(fraction: float, *, signed: bool = False, digits: int = 0) -> str:
    """A fraction as a percentage for people: ``42 %``; ``signed``: ``−30 %``, ``+5 %``."""
    value = 100.0 * fraction
    if signed:
        return f"{signed_text(value, digits)} %"
    return f"{round(value, digits) + 0.0:.{digits}f}".replace("-", MINUS) + " %"


def duration_text(seconds: float) -> str:
    """A duration for people: ``0.5 s``, ``42 s``, ``3 min``, ``2 h 5 min`` or ``3 d 4 h``."""
    seconds = max(seconds, 0.0)
    if seconds < 9.5:  # two significant figures: lines every 0.5 s are not "every 0 s"
        return f"{seconds:.2g} s" if seconds >= 0.01 else "0 s"
    if seconds < 90:
        return f"{seconds:.0f} s"
    minutes = seconds / 60
    if minutes < 90:
        return f"{minutes:.0f} min"
    hours, minutes = divmod(int(minutes), 60)
    if hours < 48:
        return f"{hours} h {minutes} min"
    days, hours = divmod(hours, 24)
    return f"{days} d {hours} h"
