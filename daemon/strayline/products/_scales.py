"""Colour scales of the quick-look maps: pure functions of the values, no matplotlib.

- :func:`field_scale` — a symmetric scale around the median (or a given centre); where
  the field's spread is small beside its median (a weak pattern on a bias field) the map
  is drawn as ΔB = B − median, so the colour bar reads "−40 … +40 µT" instead of ticks
  that differ only in their last digits ("2950 … 3050 µT").
- :func:`pl_scale` — the PL range from the lines that have fluorescence, so a band of
  dark lines (fluorescence lost) is drawn at the bottom of the scale instead of
  stretching it and washing out the rest.
- :func:`field_unit` — µT or mT for a field span.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "DELTA_B_RATIO",
    "LIT_LINE_FRACTION",
    "FieldScale",
    "PlScale",
    "field_scale",
    "field_unit",
    "pl_scale",
    "robust_range",
]

#: A field map is drawn as ΔB = B − median when |median| exceeds this many half-ranges of
#: its colour scale: the absolute ticks would then share their leading digits and differ
#: in the last ones only (a choice of ours: at 4 the scale spans less than half the
#: median, e.g. 2.2 … 3.8 mT around 3 mT).
DELTA_B_RATIO = 4.0
#: A line has fluorescence when its median PL is at least this fraction of the median
#: line's (a line at half the scan's brightness or below is lost, not a sample feature).
LIT_LINE_FRACTION = 0.5
#: Percentiles bounding a robust colour scale (common practice: 1st–99th).
_PERCENTILES = (1.0, 99.0)
#: Smallest half-range of a field scale, T (a constant map still gets a scale).
_MIN_HALF_T = 1e-12


def field_unit(span_t: float) -> tuple[str, float]:
    """Unit label and factor for a field span (a half-range or a value), T: mT from
    1 mT, else µT."""
    return ("mT", 1e3) if abs(span_t) >= 1e-3 else ("µT", 1e6)


def robust_range(values: np.ndarray) -> tuple[float, float] | None:
    """(1st, 99th) percentile of the finite values, widened a little when they agree;
    None when there is no finite value."""
    values = np.asarray(values, dtype=np.float64)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return None
    lo, hi = (float(v) for v in np.percentile(finite, _PERCENTILES))
    if hi <= lo:
        pad = max(abs(lo) * 1e-3, 1e-30)
        return lo - pad, hi + pad
    return lo, hi


@dataclass(frozen=True)
class FieldScale:
    """A symmetric colour scale for a field map.

    Attributes
    ----------
    centre_t : float
        Centre of the scale, T (the median, or the centre asked for).
    half_range_t : float
        Half-width of the scale, T; it covers the 1st–99th percentile.
    relative : bool
        Draw ΔB = B − ``centre_t`` (the field is weak beside its median, see
        :data:`DELTA_B_RATIO`) rather than B.
    """

    centre_t: float
    half_range_t: float
    relative: bool


def field_scale(values_t: np.ndarray, centre_t: float | None = None) -> FieldScale:
    """The colour scale of a field map, T.

    Parameters
    ----------
    values_t : ndarray
        Field values, T (NaN where none).
    centre_t : float or None
        Centre the scale here (a reconstructed component: 0); None centres it on the
        median of the finite values and draws ΔB when the field is weak beside it.

    Returns
    -------
    FieldScale
        Its half-range is the larger distance from the centre to the 1st or 99th
        percentile; with no finite value, centre 0 (or ``centre_t``) and 1 nT.
    """
    values = np.asarray(values_t, dtype=np.float64)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return FieldScale(0.0 if centre_t is None else float(centre_t), 1e-9, False)
    mid = float(np.median(finite)) if centre_t is None else float(centre_t)
    lo, hi = (float(v) for v in np.percentile(finite, _PERCENTILES))
    half = max(abs(hi - mid), abs(mid - lo), _MIN_HALF_T)
    relative = centre_t is None and abs(mid) > DELTA_B_RATIO * half
    return FieldScale(mid, half, relative)


@dataclass(frozen=True)
class PlScale:
    """A colour scale for a PL map.

    Attributes
    ----------
    lo, hi : float
        Scale limits, in the map's unit: the 1st and 99th percentile of the pixels of
        the lines with fluorescence.
    dark_lines : int
        Committed lines left out of the range because their median PL is below
        :data:`LIT_LINE_FRACTION` of the median line's (drawn at the scale's bottom).
    """

    lo: float
    hi: float
    dark_lines: int


def pl_scale(pl: np.ndarray, committed: np.ndarray) -> PlScale | None:
    """The PL map's colour scale, from the lines that have fluorescence.

    Parameters
    ----------
    pl : ndarray, shape (n_lines, n_pixels)
        PL rate (any unit; NaN where none).
    committed : ndarray of bool, shape (n_lines,)
        Rows that hold a committed line.

    Returns
    -------
    PlScale or None
        None when no committed pixel has a finite PL.

    Notes
    -----
    Each committed line with a finite value gets its median PL m_i; a line is lit when
    m_i ≥ f · median(m) with f = :data:`LIT_LINE_FRACTION`, and the scale is the
    1st–99th percentile of the lit lines' pixels. When at least half the lines are dark
    the median line is dark too and every line counts as lit: the scale then shows the
    dark part, which is then what the scan is.
    """
    values = np.asarray(pl, dtype=np.float64)
    rows = values[np.asarray(committed, dtype=bool)]
    has_value = np.isfinite(rows).any(axis=1)
    rows = rows[has_value]
    if rows.shape[0] == 0:
        return None
    medians = np.array([np.median(row[np.isfinite(row)]) for row in rows])
    reference = float(np.median(medians))
    lit = medians >= LIT_LINE_FRACTION * reference if reference > 0 else np.ones_like(medians, bool)
    limits = robust_range(rows[lit])
    assert limits is not None  # every kept row has a finite value and one row is lit
    return PlScale(limits[0], limits[1], int(np.count_nonzero(~lit)))
