"""Tests for the plain-array layout (strayline.lines.plain_arrays): the sidecar parser
(property tests with Hypothesis), per-line .npz/.npy files, the reader's check, and the
quarantine of a malformed line with a message naming the field."""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

import demo_stream as ds
from strayline.config import config_from_mapping
from strayline.errors import LineFileError
from strayline.lines import (
    PLAIN_ARRAYS_READER,
    ScanLine,
    parse_sidecar,
    read_line_file,
    read_plain_line,
    write_plain_line,
)
from strayline.pipeline import LinePipeline

SCAN = "arrays-1"

finite = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False)


def _sidecar(**changes: object) -> dict[str, object]:
    data: dict[str, object] = {
        "format": "strayline-plain-arrays",
        "format_version": 1,
        "scan_id": SCAN,
        "n_lines_planned": 4,
        "dwell_s": 0.002,
        "nv_theta_rad": 0.9553,
        "nv_phi_rad": 0.7854,
        "freq_start_hz": 2.80e9,
        "freq_stop_hz": 2.94e9,
        "n_freq": 15,
        "x0_m": -1e-7,
        "pixel_pitch_m": 5e-8,
        "n_pixels": 5,
        "y0_m": 0.0,
        "line_pitch_m": 5e-8,
    }
    data.update(changes)
    return {k: v for k, v in data.items() if v is not None}


@given(
    x=st.lists(finite, min_size=1, max_size=20),
    f=st.lists(st.floats(min_value=1.0, max_value=1e10), min_size=2, max_size=20),
    y=st.lists(finite, min_size=4, max_size=4),
    as_yaml=st.booleans(),
)
@settings(max_examples=60, deadline=None)
def test_listed_values_come_back_to_the_bit(
    x: list[float], f: list[float], y: list[float], as_yaml: bool
) -> None:
    """Lists of positions and frequencies, in JSON or YAML, parse to exactly those floats."""
    data = _sidecar(x_m=x, freq_hz=f, y_m=y, n_freq=None, n_pixels=None)
    path = Path("scan.yaml" if as_yaml else "scan.json")
    text = yaml.safe_dump(data) if as_yaml else json.dumps(data)
    scan = parse_sidecar(text.encode(), path)
    assert scan.x_m.tolist() == x
    assert scan.freq_hz.tolist() == f
    assert scan.y_m.tolist() == y


@given(st.dictionaries(st.sampled_from(sorted(_sidecar())), st.none() | st.text() | finite))
@settings(max_examples=80, deadline=None)
def test_any_broken_sidecar_is_refused_naming_the_sidecar(changes: dict[str, object]) -> None:
    """Whatever keys are dropped or given wrong values, parsing either succeeds or raises
    LineFileError naming the sidecar; nothing else escapes."""
    data = _sidecar()
    for key, value in changes.items():
        if value is None:
            data.pop(key, None)
        else:
            data[key] = value
    problem = None
    try:
        parse_sidecar(json.dumps(data).encode(), Path("scan.json"))
    except LineFileError as error:
        problem = str(error)
    assert problem is None or problem.startswith("scan.json: ")


def test_a_start_stop_sweep_and_a_pitch_give_the_grid() -> None:
    """Start, stop and count give a uniform sweep; origin and pitch give the positions."""
    scan = parse_sidecar(json.dumps(_sidecar()).encode(), Path("scan.json"))
    np.testing.assert_array_equal(scan.freq_hz, np.linspace(2.80e9, 2.94e9, 15))
    np.testing.assert_allclose(scan.x_m, [-1e-7, -5e-8, 0.0, 5e-8, 1e-7], atol=1e-20)
    np.testing.assert_allclose(scan.y_m, [0.0, 5e-8, 1e-7, 1.5e-7])


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        (
            {"dwell_s": None},
            "scan.json: key 'dwell_s' must be present; found no such key",
        ),
        (
            {"format": "something"},
            "scan.json: key 'format' must be 'strayline-plain-arrays'; found 'something'",
        ),
        (
            {"n_freq": None},
            "scan.json: key 'freq_hz' must be present, or else freq_start_hz, freq_stop_hz, "
            "n_freq; found neither (missing n_freq)",
        ),
        (
            {"x_m": [0.0, "a"]},
            "scan.json: key 'x_m' must be a list of numbers; found [0.0, 'a'] (list)",
        ),
    ],
)
def test_sidecar_messages_name_the_key(changes: dict[str, object], message: str) -> None:
    """Each structural problem names the sidecar, the key, the rule and what was found."""
    with pytest.raises(LineFileError) as caught:
        parse_sidecar(json.dumps(_sidecar(**changes)).encode(), Path("scan.json"))
    assert str(caught.value) == message


@pytest.fixture(scope="module")
def demo_lines(tmp_path_factory: pytest.TempPathFactory) -> list[ScanLine]:
    """A small demo scan's lines, forward and backward, from contract-v1 files."""
    folder = tmp_path_factory.mktemp("demo")
    demo = ds.DemoConfig(n_lines=4, n_pixels=6, trace_retrace=True, scan_id=SCAN, seed=2)
    ds.run_scan(demo, folder / "in", folder / "truth", sleep=lambda _s: None)
    lines = [read_line_file(p) for p in (folder / "in" / SCAN).glob("*.h5")]
    return sorted(lines, key=lambda ln: (ln.line_index, ln.direction == "backward"))


def test_npz_lines_read_back_as_written(tmp_path: Path, demo_lines: list[ScanLine]) -> None:
    """Every field of a line written as .npz (and its sidecar) reads back the same, a
    backward line with its positions in acquisition order."""
    y_m = [float(y) for y in sorted({ln.y_m for ln in demo_lines})]
    for line in demo_lines:
        path = write_plain_line(line, tmp_path, y_m=y_m)
        assert PLAIN_ARRAYS_READER.check(path) is None
        got = read_plain_line(path)
        np.testing.assert_array_equal(got.counts, line.counts)
        np.testing.assert_array_equal(got.x_m, line.x_m)
        np.testing.assert_array_equal(got.freq_hz, line.freq_hz)
        assert (got.line_index, got.direction, got.y_m) == (
            line.line_index,
            line.direction,
            line.y_m,
        )
        assert (got.start_time, got.end_time) == (line.start_time, line.end_time)
        assert got.sha256 is not None


def test_an_npy_line_takes_its_times_from_the_file(
    tmp_path: Path, demo_lines: list[ScanLine]
) -> None:
    """A bare .npy holds counts only: its end is the file's modification time and its start
    that less the acquisition time (pixels × frequencies × dwell)."""
    line = demo_lines[0]
    path = write_plain_line(line, tmp_path, y_m=[0.0] * line.n_lines_planned, kind="npy")
    end_s = 1_750_000_000
    import os

    os.utime(path, (end_s, end_s))
    got = read_plain_line(path)
    assert got.end_time == datetime.fromtimestamp(end_s, UTC)
    acquisition_s = (got.end_time - got.start_time).total_seconds()
    assert acquisition_s == pytest.approx(line.counts.size * line.dwell_s)


def test_the_check_waits_for_the_sidecar_and_a_complete_file(
    tmp_path: Path, demo_lines: list[ScanLine]
) -> None:
    """Without a sidecar, or with a file cut short, the check says why it is not ready."""
    line = demo_lines[0]
    path = write_plain_line(line, tmp_path, y_m=[0.0] * line.n_lines_planned, kind="npy")
    data = path.read_bytes()
    path.write_bytes(data[:-10])
    assert PLAIN_ARRAYS_READER.check(path) == (
        f"line_00000_fwd.npy: {len(data) - 10} of {len(data)} bytes written"
    )
    (tmp_path / "scan.json").unlink()
    assert PLAIN_ARRAYS_READER.check(path) == (
        "line_00000_fwd.npy: no sidecar (scan.json or scan.yaml or scan.yml) beside it yet"
    )


def test_a_malformed_array_file_is_quarantined_naming_the_field(
    tmp_path: Path, demo_lines: list[ScanLine]
) -> None:
    """Counts of the wrong shape: the file goes to _quarantine with a note naming the array,
    the sidecar stays, the other lines are written."""
    folder = tmp_path / "incoming" / SCAN
    good = write_plain_line(demo_lines[0], folder, y_m=[0.0] * 4)
    bad = folder / "line_00001_fwd.npz"
    np.savez(bad, counts=np.ones((6, 3)))
    config = config_from_mapping(
        {
            "paths": {"watch_root": "incoming", "output_root": "output"},
            "readers": {"default": "plain-arrays"},
            "alerts": {"console": False},
            "logging": {"console": "off"},
        },
        base_dir=tmp_path,
    )
    pipeline = LinePipeline(config)
    try:
        outcomes = pipeline.process_many([good, bad])
    finally:
        pipeline.close()
    assert [o.kind for o in outcomes] == ["written", "quarantined"]
    note = json.loads((folder / "_quarantine" / "line_00001_fwd.npz.error.json").read_text())
    assert note["message"] == (
        "line_00001_fwd.npz: array 'counts' must be of shape (n_pixels, n_freq) = "
        f"(6, {demo_lines[0].n_freq}); found (6, 3)"
    )
    assert (folder / "scan.json").exists()


def test_a_file_name_without_a_line_index_is_refused(tmp_path: Path) -> None:
    """The line index and direction come from the name: another name is refused."""
    path = tmp_path / "spectra.npz"
    np.savez(path, counts=np.ones((2, 2)))
    with pytest.raises(LineFileError, match=r"file name must be line_<index>_fwd\.npz"):
        read_plain_line(path)
