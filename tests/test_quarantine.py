"""Tests of quarantine (strayline.quarantine): bad files moved aside, never lost."""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from strayline.errors import LineFileError
from strayline.lines import (
    BAD_FILE_RULE,
    QUARANTINE_DIR,
    bad_file_event,
    line_file_name,
    line_key_from_name,
    quarantine_file,
)

NOW = datetime(2026, 3, 1, 22, 15, 30, 250000, tzinfo=UTC)


def _bad(folder: Path, name: str = "line_00042_fwd.h5", data: bytes = b"junk") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_bytes(data)
    return path


def test_the_file_moves_with_a_sidecar_naming_the_problem(tmp_path: Path) -> None:
    """The file moves to <scan>/_quarantine/ unchanged and its sidecar holds the field,
    expected and found values."""
    path = _bad(tmp_path / "scan-a", data=b"\x00\x01 original bytes")
    record = quarantine_file(
        path, field="dataset 'counts'", expected="2-D", found="1-D", message="line: bad"
    )
    target = tmp_path / "scan-a" / QUARANTINE_DIR / "line_00042_fwd.h5"
    assert not path.exists()
    assert target.read_bytes() == b"\x00\x01 original bytes"
    assert record.moved_to == str(target)
    sidecar = json.loads(target.with_name("line_00042_fwd.h5.error.json").read_text())
    assert sidecar == {
        "file": str(path),
        "moved_to": str(target),
        "field": "dataset 'counts'",
        "expected": "2-D",
        "found": "1-D",
        "message": "line: bad",
        "time": record.time,
    }
    assert datetime.fromisoformat(record.time).tzinfo is not None


def test_a_second_file_of_the_same_name_never_overwrites_the_first(tmp_path: Path) -> None:
    """Quarantining a name twice keeps both files, the second with a numbered suffix."""
    folder = tmp_path / "scan-b"
    first = quarantine_file(
        _bad(folder, data=b"one"), field="f", expected="e", found="1", message="m1"
    )
    second = quarantine_file(
        _bad(folder, data=b"two"), field="f", expected="e", found="2", message="m2"
    )
    third = quarantine_file(
        _bad(folder, data=b"three"), field="f", expected="e", found="3", message="m3"
    )
    q = folder / QUARANTINE_DIR
    assert [Path(r.moved_to).name for r in (first, second, third)] == [
        "line_00042_fwd.h5",
        "line_00042_fwd.h5.1",
        "line_00042_fwd.h5.2",
    ]
    assert (q / "line_00042_fwd.h5").read_bytes() == b"one"
    assert (q / "line_00042_fwd.h5.2").read_bytes() == b"three"
    found = json.loads((q / "line_00042_fwd.h5.1.error.json").read_text())["found"]
    assert found == "2"


def test_a_vanished_file_still_gets_a_sidecar(tmp_path: Path) -> None:
    """A file gone before it could be moved leaves a sidecar with an empty moved_to."""
    folder = tmp_path / "scan-c"
    folder.mkdir()
    record = quarantine_file(
        folder / "line_00001_fwd.h5", field="file", expected="x", found="y", message="m"
    )
    assert record.moved_to == ""
    sidecar = folder / QUARANTINE_DIR / "line_00001_fwd.h5.error.json"
    assert json.loads(sidecar.read_text())["moved_to"] == ""


def test_no_temporary_file_is_left_behind(tmp_path: Path) -> None:
    """The sidecar is written through a temporary file that is renamed away."""
    quarantine_file(_bad(tmp_path / "scan-d"), field="f", expected="e", found="x", message="m")
    names = sorted(p.name for p in (tmp_path / "scan-d" / QUARANTINE_DIR).iterdir())
    assert names == ["line_00042_fwd.h5", "line_00042_fwd.h5.error.json"]


# -- the file name -----------------------------------------------------------------------


@pytest.mark.parametrize(
    ("name", "key"),
    [
        ("line_00042_fwd.h5", (42, "forward")),
        ("line_00007_bwd.h5", (7, "backward")),
        ("line_00042.h5", (42, None)),
        ("line_123456789_fwd.h5", (123456789, "forward")),
        ("scan.h5", (None, None)),
        ("line_00042_fwd.h5.tmp", (None, None)),
        (".line_00042_fwd.h5.tmp", (None, None)),
        ("line_abc_fwd.h5", (None, None)),
        ("line_00042_up.h5", (None, None)),
    ],
)
def test_line_key_from_name(name: str, key: tuple[int | None, str | None]) -> None:
    """The canonical line-file name gives its index and direction; anything else gives
    none."""
    assert line_key_from_name(name) == key


@given(st.integers(min_value=0, max_value=99_999), st.sampled_from(["forward", "backward"]))
def test_line_key_inverts_the_canonical_name(index: int, direction: str) -> None:
    """line_key_from_name undoes strayline.lines.line_file_name for every line."""
    assert line_key_from_name(line_file_name(index, direction)) == (index, direction)


@given(st.text(max_size=40))
def test_line_key_never_raises(name: str) -> None:
    """Any string gives a key or (None, None), never an exception."""
    index, direction = line_key_from_name(name)
    assert index is None or index >= 0
    assert direction in (None, "forward", "backward")


# -- the alert ---------------------------------------------------------------------------


def test_bad_file_event_names_the_line_and_where_the_file_went(tmp_path: Path) -> None:
    """The alert carries the scan folder, the line from the file name, the error text and
    where the file was moved."""
    path = tmp_path / "scan-e" / "line_00042_fwd.h5"
    error = LineFileError(path, "dataset 'counts'", "of shape (32, 101)", "(32, 100)")
    event = bad_file_event(path, error, "/q/line_00042_fwd.h5", NOW)
    assert event.rule == BAD_FILE_RULE == "bad_file"
    assert (event.scan_id, event.line_index, event.direction) == ("scan-e", 42, "forward")
    assert (event.severity, event.state) == ("warning", "raised")
    assert event.time == "2026-03-01T22:15:30.250+00:00"
    assert event.message == (
        "line file quarantined: line_00042_fwd.h5: dataset 'counts' must be of shape "
        "(32, 101); found (32, 100)"
    )
    assert event.advice.startswith("the file was moved to /q/line_00042_fwd.h5 with a note")


def test_bad_file_event_for_an_unnamed_vanished_file(tmp_path: Path) -> None:
    """A file whose name reveals no line, and which vanished, gives no line index and says
    it went nowhere; a local time is given in UTC."""
    path = tmp_path / "scan-f" / "dump.h5"
    error = LineFileError(path, "file", "an HDF5 file", "no HDF5 signature")
    local = NOW.astimezone(timezone(timedelta(hours=2)))
    event = bad_file_event(path, error, "", local)
    assert (event.line_index, event.direction) == (None, None)
    assert event.time == "2026-03-01T22:15:30.250+00:00"
    assert "nowhere (it vanished before it could be moved)" in event.advice
