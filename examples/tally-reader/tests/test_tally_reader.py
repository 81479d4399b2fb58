"""Tests of the example reader plug-in: a tally file reads back as the line written, a
broken one is refused naming the entry, and strayline finds the reader by its entry point."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from strayline_tally import TALLY_READER, read_tally, write_tally

from strayline.errors import LineFileError
from strayline.lines import ScanLine, installed_readers

START = datetime(2025, 3, 14, 9, 26, 53, 250000, tzinfo=UTC)


def _line(path: Path) -> ScanLine:
    return ScanLine(
        source=path,
        scan_id="tally-1",
        line_index=3,
        n_lines_planned=8,
        direction="backward",
        start_time=START,
        end_time=START + timedelta(seconds=1.5),
        dwell_s=1e-3,
        nv_theta_rad=0.9553,
        nv_phi_rad=0.7854,
        freq_hz=np.linspace(2.80e9, 2.94e9, 12),
        counts=np.arange(36, dtype=float).reshape(3, 12) + 100.0,
        x_m=np.array([6e-8, 3e-8, 0.0]),
        y_m=9e-8,
    )


def test_a_tally_file_reads_back_as_the_line_written(tmp_path: Path) -> None:
    """Every field comes back exactly, and the check passes on the complete file."""
    path = write_tally(_line(tmp_path / "line_3_bwd.tally"), tmp_path / "line_3_bwd.tally")
    assert TALLY_READER.check(path) is None
    got, want = read_tally(path), _line(path)
    np.testing.assert_array_equal(got.counts, want.counts)
    np.testing.assert_array_equal(got.freq_hz, want.freq_hz)
    np.testing.assert_array_equal(got.x_m, want.x_m)
    assert (got.line_index, got.direction, got.start_time) == (3, "backward", START)


def test_a_broken_entry_is_named(tmp_path: Path) -> None:
    """A negative dwell is refused with the entry's name, the rule and the value."""
    path = write_tally(_line(tmp_path / "a.tally"), tmp_path / "a.tally")
    path.write_text(path.read_text().replace("dwell_s 0.001", "dwell_s -0.001"))
    with pytest.raises(LineFileError) as caught:
        read_tally(path)
    assert str(caught.value) == (
        "a.tally: entry 'dwell_s' must be a finite number of seconds > 0; found -0.001 (float)"
    )


def test_an_unfinished_file_is_not_ready(tmp_path: Path) -> None:
    """Without its 'end' row the file is not ready to read."""
    path = tmp_path / "b.tally"
    path.write_text("tally 1\nscan x\n")
    assert TALLY_READER.check(path) == "b.tally: no 'end' row yet"


def test_strayline_finds_the_reader_by_its_entry_point() -> None:
    """Installed, the package's entry point makes 'tally' one of strayline's readers."""
    installed = installed_readers()
    assert installed.readers["tally"] == TALLY_READER
    assert installed.origins["tally"] == "strayline-tally-reader 0.1.0"
