"""Tests of strayline.products._scales: the quick-look maps' colour scales (pure)."""

from __future__ import annotations

import numpy as np
import pytest

from strayline.products._scales import (
    DELTA_B_RATIO,
    FieldScale,
    field_scale,
    field_unit,
    pl_scale,
    robust_range,
)


def _pattern(rng: np.random.Generator, centre_t: float, spread_t: float) -> np.ndarray:
    """A 32 x 32 field map: ``centre_t`` plus a smooth pattern of amplitude ``spread_t``."""
    y, x = np.mgrid[0:32, 0:32] / 32.0
    return (
        centre_t
        + spread_t * np.sin(2 * np.pi * x) * np.cos(np.pi * y)
        + rng.normal(0.0, spread_t / 100, (32, 32))
    )


def test_weak_field_beside_its_median_is_drawn_as_delta_b() -> None:
    """A pattern of ±50 µT on 3.002 mT (the case of ticks 2950–3050 µT) gets a ΔB scale
    centred on the median, whose half-range covers the pattern."""
    values = _pattern(np.random.default_rng(1), 3.002e-3, 50e-6)
    scale = field_scale(values)
    assert scale.relative
    assert scale.centre_t == pytest.approx(np.median(values))
    assert 40e-6 < scale.half_range_t < 60e-6
    assert field_unit(scale.half_range_t) == ("µT", 1e6)


def test_strong_pattern_keeps_the_absolute_scale() -> None:
    """A domain pattern of ±2 mT around 0.1 mT, and one of ±2 mT on a 3 mT bias (spread
    beside the median above 1/4), keep B itself on the scale."""
    rng = np.random.default_rng(2)
    for centre in (0.1e-3, 3e-3):
        scale = field_scale(_pattern(rng, centre, 2e-3))
        assert not scale.relative
        assert field_unit(scale.half_range_t) == ("mT", 1e3)


def test_delta_b_threshold_is_the_ratio_of_median_to_half_range() -> None:
    """ΔB is chosen exactly when |median| exceeds DELTA_B_RATIO half-ranges, for either
    sign of the field."""
    base = np.linspace(-1.0, 1.0, 201) * 1e-5  # half-range 1e-5 T around the centre (1–99 %)
    half = field_scale(base).half_range_t
    for sign in (1.0, -1.0):
        above = field_scale(base + sign * (DELTA_B_RATIO + 0.1) * half)
        below = field_scale(base + sign * (DELTA_B_RATIO - 0.1) * half)
        assert above.relative
        assert not below.relative


def test_a_given_centre_never_switches_to_delta_b() -> None:
    """A reconstructed component is centred on zero: even a map far from zero keeps B,
    and its half-range reaches the far percentile."""
    values = _pattern(np.random.default_rng(3), 3e-3, 50e-6)
    scale = field_scale(values, 0.0)
    assert scale == FieldScale(0.0, scale.half_range_t, False)
    assert scale.half_range_t == pytest.approx(np.percentile(values, 99.0))


def test_field_scale_edge_cases() -> None:
    """No finite value gives a 1 nT scale on the centre; a constant map a tiny half-range
    (ΔB all zero); NaN pixels are ignored."""
    assert field_scale(np.full((3, 3), np.nan)) == FieldScale(0.0, 1e-9, False)
    assert field_scale(np.full((3, 3), np.nan), 0.5) == FieldScale(0.5, 1e-9, False)
    constant = field_scale(np.full((4, 4), 2e-3))
    assert constant.relative
    assert constant.centre_t == 2e-3
    assert 0 < constant.half_range_t <= 1e-12
    values = _pattern(np.random.default_rng(4), 3e-3, 20e-6)
    holed = values.copy()
    holed[5:9] = np.nan
    assert field_scale(holed).centre_t == pytest.approx(np.median(values[~np.isnan(holed)]))


def _pl_map(rng: np.random.Generator, dark_rows: slice | None) -> np.ndarray:
    """40 lines x 30 pixels of PL near 200 kcounts/s, with a band of dark lines near 5."""
    pl = rng.normal(200.0, 4.0, (40, 30))
    if dark_rows is not None:
        pl[dark_rows] = rng.normal(5.0, 1.0, pl[dark_rows].shape)
    return pl


def test_pl_scale_ignores_a_dark_band() -> None:
    """Six lines with fluorescence lost leave the scale on the lit lines (a plain 1–99 %
    range would start near the dark band and wash the rest out) and are counted."""
    rng = np.random.default_rng(5)
    pl = _pl_map(rng, slice(20, 26))
    committed = np.ones(40, bool)
    scale = pl_scale(pl, committed)
    assert scale is not None
    assert scale.dark_lines == 6
    lit = np.delete(pl, np.s_[20:26], axis=0)
    assert (scale.lo, scale.hi) == pytest.approx(tuple(np.percentile(lit, [1, 99])))
    assert scale.lo > 185.0
    plain = robust_range(pl)
    assert plain is not None
    assert plain[0] < 10.0  # what the band does to a plain percentile range


def test_pl_scale_without_a_dark_band_is_the_robust_range() -> None:
    """With every line lit the scale is the 1–99 % range of all committed pixels; rows
    not committed (NaN, or values of no line) are left out."""
    rng = np.random.default_rng(6)
    pl = _pl_map(rng, None)
    committed = np.ones(40, bool)
    committed[[3, 4]] = False
    pl[3] = np.nan
    pl[4] = 1e9  # not a committed line: never read
    scale = pl_scale(pl, committed)
    assert scale is not None
    assert scale.dark_lines == 0
    assert (scale.lo, scale.hi) == pytest.approx(robust_range(pl[committed]))


def test_pl_scale_when_most_lines_are_dark_shows_them() -> None:
    """When more than half the lines are dark the median line is dark: every line counts
    as lit and the scale spans what the scan is."""
    pl = _pl_map(np.random.default_rng(7), slice(0, 30))
    scale = pl_scale(pl, np.ones(40, bool))
    assert scale is not None
    assert scale.dark_lines == 0
    assert scale.lo < 10.0


def test_pl_scale_of_no_value_is_none() -> None:
    """No committed pixel with a finite PL gives no scale."""
    assert pl_scale(np.full((4, 5), np.nan), np.ones(4, bool)) is None
    assert pl_scale(np.ones((4, 5)), np.zeros(4, bool)) is None


def test_robust_range_widens_a_constant_map() -> None:
    """A constant map gets a small non-empty range around its value."""
    lo, hi = robust_range(np.full(10, 7.0))  # type: ignore[misc]
    assert lo < 7.0 < hi
    assert hi - lo < 0.1
    assert robust_range(np.array([np.nan])) is None
