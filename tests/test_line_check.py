"""Tests for check_line (strayline.lines.line_check): the contract's rules for a line any
reader built, with the layout's own names for the fields in the messages."""

from __future__ import annotations

from dataclasses import replace
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest

from strayline.errors import LineFileError
from strayline.lines import LineLimits, ScanLine, check_line

START = datetime(2025, 3, 14, 9, 26, 53, tzinfo=UTC)


def _line(**changes: object) -> ScanLine:
    line = ScanLine(
        source=Path("/scans/s/line.x"),
        scan_id="s-1",
        line_index=2,
        n_lines_planned=4,
        direction="forward",
        start_time=START,
        end_time=START + timedelta(seconds=1),
        dwell_s=1e-3,
        nv_theta_rad=0.9,
        nv_phi_rad=0.1,
        freq_hz=np.linspace(2.8e9, 2.9e9, 12),
        counts=np.full((3, 12), 50, dtype=np.uint16),
        x_m=np.array([0.0, 1e-7, 2e-7]),
        y_m=3e-7,
    )
    return replace(line, **changes)  # type: ignore[arg-type]


def test_a_good_line_comes_back_normalised() -> None:
    """A valid line passes, numbers as Python floats, arrays in native order."""
    got = check_line(_line(dwell_s=np.float32(1e-3), x_m=np.array([0, 1, 2], dtype=">f8")))
    assert isinstance(got.dwell_s, float)
    assert got.x_m.dtype == np.float64
    assert got.counts.dtype == np.uint16


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"scan_id": ".hidden"}, "field 'scan_id' must be 1–128 characters"),
        ({"line_index": 4}, "field 'line_index' must be less than n_lines_planned = 4; found 4"),
        ({"direction": "up"}, "field 'direction' must be 'forward' or 'backward'; found 'up'"),
        ({"dwell_s": "1ms"}, "field 'dwell_s' must be a finite number of seconds > 0"),
        ({"nv_theta_rad": 4.0}, "field 'nv_theta_rad' must be a finite angle in [0, π] rad"),
        ({"end_time": START - timedelta(seconds=1)}, "field 'end_time' must be at or after"),
        ({"freq_hz": np.linspace(2.9e9, 2.8e9, 12)}, "field 'freq_hz' must be strictly"),
        ({"counts": np.full((3, 11), 5.0)}, "field 'counts' must be of shape (n_pixels, n_freq)"),
        ({"y_m": float("nan")}, "field 'y_m' must be a finite position in m; found nan"),
    ],
)
def test_each_rule_names_the_field(changes: dict[str, object], message: str) -> None:
    """Each broken rule raises LineFileError naming the source, the field and the rule."""
    with pytest.raises(LineFileError) as caught:
        check_line(_line(**changes))
    assert str(caught.value).startswith("line.x: ")
    assert message in str(caught.value)


def test_the_layout_names_its_fields() -> None:
    """The messages use the names the layout gives, e.g. a sidecar key or a row."""
    counts = np.full((3, 12), 5.0)
    counts[1, 4] = np.inf
    with pytest.raises(LineFileError) as caught:
        check_line(_line(counts=counts), names={"counts": "dataset 'counts' row 7"})
    assert str(caught.value) == (
        "line.x: dataset 'counts' row 7 must be finite; found inf at (pixel 1, frequency 4)"
    )


def test_limits_apply() -> None:
    """A line with more pixels than the limits allow is refused, naming the limit."""
    with pytest.raises(LineFileError, match=r"limits.max_pixels"):
        check_line(_line(), limits=LineLimits(max_pixels=2))
