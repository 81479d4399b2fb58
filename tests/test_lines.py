"""Tests of the scan-line file contract version 1: writer, reader, names and limits.

The contract is the project's own (docs/line-file.md); the external facts used here are
the HDF5 format signature and user-block offsets (HDF5 File Format Specification,
section "Format Signature and Version Information"; from memory) and SHA-256 as computed
by Python's hashlib.
"""

from __future__ import annotations

import hashlib
import os
import re
import tempfile
from collections.abc import Callable
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from strayline.errors import LineFileError
from strayline.lines import (
    FORMAT_NAME,
    FORMAT_VERSION,
    MIN_FREQ,
    LineLimits,
    ScanLine,
    is_temporary_name,
    line_file_bytes,
    line_file_name,
    parse_line_bytes,
    read_line_file,
    write_line_file,
)
from strayline.lines import scan_line as lines_module
from strayline.lines._h5check import parse_utc_time

T0 = datetime(2025, 3, 14, 9, 26, 53, 250000, tzinfo=UTC)
NAME = "line_00042_fwd.h5"
N_PIXELS, N_FREQ = 256, 201
DEFAULT_LIMITS = LineLimits()


def make_line(folder: Path, **changes: object) -> ScanLine:
    """A valid line of an invented scan over a garnet film (256 pixels x 201 frequencies)."""
    rng = np.random.default_rng(20250314)
    fields: dict[str, object] = {
        "source": folder / NAME,
        "scan_id": "garnet-film-07",
        "line_index": 42,
        "n_lines_planned": 128,
        "direction": "forward",
        "start_time": T0,
        "end_time": T0 + timedelta(seconds=2.5),
        "dwell_s": 2e-3,
        "nv_theta_rad": float(np.arccos(1 / np.sqrt(3))),
        "nv_phi_rad": np.pi / 4,
        "freq_hz": np.linspace(2.80e9, 2.94e9, N_FREQ),
        "counts": rng.poisson(300.0, (N_PIXELS, N_FREQ)).astype(np.int32),
        "x_m": np.arange(N_PIXELS) * 25e-9,
        "y_m": 42 * 25e-9,
        "aux": {"topography_m": rng.normal(0.0, 2e-9, N_PIXELS)},
        "aux_units": {"topography_m": "m"},
    }
    fields.update(changes)
    return ScanLine(**fields)  # type: ignore[arg-type]


@pytest.fixture
def valid_file(tmp_path: Path) -> Path:
    """A valid line file written by the writer."""
    return write_line_file(make_line(tmp_path))


def tampered(path: Path, change: Callable[[h5py.File], None]) -> Path:
    """Apply ``change`` to the file in place with h5py and return the path."""
    with h5py.File(path, "r+") as h5:
        change(h5)
    return path


def replace_dataset(h5: h5py.Group, name: str, data: object, units: str | None) -> None:
    """Swap a dataset for new data, with a units attribute unless ``units`` is None."""
    if name in h5:
        del h5[name]
    ds = h5.create_dataset(name, data=data)
    if units is not None:
        ds.attrs["units"] = units


def rejected(path: Path, limits: LineLimits = DEFAULT_LIMITS) -> str:
    """The message of the LineFileError the reader raises for ``path``."""
    with pytest.raises(LineFileError) as info:
        read_line_file(path, limits=limits)
    assert info.value.path == path
    return str(info.value)


# -- the writer and the reader's happy path ---------------------------------------------


def test_round_trip_keeps_every_field(tmp_path: Path) -> None:
    """A line written and read back has the same metadata, arrays, dtypes and units."""
    line = make_line(
        tmp_path, temperature_k=295.5, profile="garnet_thin-film.v2", tip_id="tip-A7.2"
    )
    path = write_line_file(line)
    back = read_line_file(path)
    assert path == tmp_path / NAME
    assert back.source == path
    for name in (
        "scan_id",
        "line_index",
        "n_lines_planned",
        "direction",
        "dwell_s",
        "nv_theta_rad",
        "nv_phi_rad",
        "y_m",
        "temperature_k",
        "profile",
        "tip_id",
    ):
        assert getattr(back, name) == getattr(line, name), name
    assert back.start_time == T0
    assert back.start_time.tzinfo == UTC
    assert back.end_time == T0 + timedelta(seconds=2.5)
    assert back.freq_hz.dtype == np.float64
    np.testing.assert_array_equal(back.freq_hz, line.freq_hz)
    assert back.x_m.dtype == np.float64
    np.testing.assert_array_equal(back.x_m, line.x_m)
    assert back.counts.dtype == np.int32
    np.testing.assert_array_equal(back.counts, line.counts)
    assert back.reference_counts is None
    assert set(back.aux) == {"topography_m"}
    np.testing.assert_array_equal(back.aux["topography_m"], line.aux["topography_m"])
    assert back.aux_units == {"topography_m": "m"}
    assert (back.n_pixels, back.n_freq) == (N_PIXELS, N_FREQ)


def test_file_layout_matches_contract(valid_file: Path) -> None:
    """The writer stores the contract's names, integer/float/string attribute types and
    units attributes, as docs/line-file.md lists them."""
    with h5py.File(valid_file, "r") as h5:
        attrs = dict(h5.attrs)
        assert attrs["format"] == FORMAT_NAME == "strayline-line"
        assert attrs["format_version"] == FORMAT_VERSION == 1
        assert isinstance(attrs["format_version"], np.integer)
        assert isinstance(attrs["line_index"], np.integer)
        assert attrs["start_time"] == "2025-03-14T09:26:53.250000Z"
        assert attrs["end_time"] == "2025-03-14T09:26:55.750000Z"
        assert "temperature_k" not in attrs
        assert "profile" not in attrs
        assert "tip_id" not in attrs
        units = {name: h5[name].attrs["units"] for name in ("freq_hz", "counts", "x_m", "y_m")}
        assert units == {"freq_hz": "Hz", "counts": "counts", "x_m": "m", "y_m": "m"}
        assert h5["y_m"].shape == ()
        assert h5["aux/topography_m"].attrs["units"] == "m"


def test_checksum_is_sha256_of_file_bytes(valid_file: Path) -> None:
    """ScanLine.sha256 is the SHA-256 (hashlib) of the file's bytes as stored."""
    expected = hashlib.sha256(valid_file.read_bytes()).hexdigest()
    assert read_line_file(valid_file).sha256 == expected


def test_reference_counts_and_float_counts_round_trip(tmp_path: Path) -> None:
    """Float counts and optional reference counts are read back with their values."""
    rng = np.random.default_rng(3)
    counts = rng.gamma(50.0, 4.0, (N_PIXELS, N_FREQ))
    reference = rng.gamma(50.0, 4.0, (N_PIXELS, N_FREQ)).astype(np.float32)
    path = write_line_file(make_line(tmp_path, counts=counts, reference_counts=reference))
    back = read_line_file(path)
    assert back.counts.dtype == np.float64
    np.testing.assert_array_equal(back.counts, counts)
    assert back.reference_counts is not None
    assert back.reference_counts.dtype == np.float32
    np.testing.assert_array_equal(back.reference_counts, reference)


def test_big_endian_counts_come_back_native(tmp_path: Path) -> None:
    """Counts stored big-endian are returned in native byte order with the same values."""
    path = write_line_file(make_line(tmp_path))
    counts = np.arange(N_PIXELS * N_FREQ, dtype=">u4").reshape(N_PIXELS, N_FREQ)
    tampered(path, lambda h5: replace_dataset(h5, "counts", counts, "counts"))
    back = read_line_file(path)
    assert back.counts.dtype == np.dtype("=u4")
    np.testing.assert_array_equal(back.counts, counts)


def test_writer_uses_explicit_path_over_source(tmp_path: Path) -> None:
    """An explicit path wins over line.source, and the read line records that path."""
    target = tmp_path / "elsewhere.h5"
    assert write_line_file(make_line(tmp_path), target) == target
    assert not (tmp_path / NAME).exists()
    assert read_line_file(target).source == target


def test_writer_leaves_only_the_final_name(tmp_path: Path) -> None:
    """After two writes (the second replacing the first) only the final file remains."""
    write_line_file(make_line(tmp_path))
    write_line_file(make_line(tmp_path, y_m=1e-6))
    assert os.listdir(tmp_path) == [NAME]
    assert read_line_file(tmp_path / NAME).y_m == 1e-6


def test_final_name_appears_only_complete(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """At the moment of the rename the final name does not exist yet and the temporary
    file (a hidden '.tmp' name in the same folder) already holds the complete file."""
    seen: list[tuple[str, str, bool]] = []
    real_replace = os.replace

    def spy(src: str | os.PathLike[str], dst: str | os.PathLike[str]) -> None:
        src_path, dst_path = Path(src), Path(dst)
        parse_line_bytes(src_path.read_bytes(), dst_path)  # complete and valid
        seen.append((src_path.name, str(src_path.parent), dst_path.exists()))
        real_replace(src, dst)

    monkeypatch.setattr(lines_module.os, "replace", spy)
    write_line_file(make_line(tmp_path))
    [(temp_name, folder, final_existed)] = seen
    assert folder == str(tmp_path)
    assert is_temporary_name(temp_name)
    assert re.fullmatch(r"\.line_00042_fwd\.h5\.[0-9a-f]{12}\.tmp", temp_name)
    assert not final_existed
    assert os.listdir(tmp_path) == [NAME]


def test_failed_rename_removes_temporary(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """When the rename fails the error propagates and no file is left in the folder."""

    def broken(src: object, dst: object) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(lines_module.os, "replace", broken)
    with pytest.raises(OSError, match="No space left"):
        write_line_file(make_line(tmp_path))
    assert os.listdir(tmp_path) == []


def test_writer_refuses_invalid_line(tmp_path: Path) -> None:
    """The writer raises the reader's LineFileError for a line breaking the contract and
    writes nothing."""
    with pytest.raises(LineFileError) as info:
        write_line_file(make_line(tmp_path, line_index=128))
    assert str(info.value) == (
        f"{NAME}: attribute 'line_index' must be less than n_lines_planned = 128; found 128"
    )
    assert os.listdir(tmp_path) == []


def test_writer_refuses_naive_time(tmp_path: Path) -> None:
    """A naive start time is refused (its instant is unknown), naming the attribute."""
    with pytest.raises(LineFileError) as info:
        write_line_file(make_line(tmp_path, start_time=datetime(2025, 3, 14, 9, 0)))
    assert str(info.value) == (
        f"{NAME}: attribute 'start_time' must be a timezone-aware datetime; "
        "found the naive 2025-03-14 09:00:00"
    )


def test_writer_converts_other_time_zones_to_utc(tmp_path: Path) -> None:
    """A time given in another zone is stored as the same instant in UTC ('Z')."""
    paris = timezone(timedelta(hours=1))
    start = datetime(2025, 3, 14, 10, 26, 53, 250000, tzinfo=paris)
    path = write_line_file(make_line(tmp_path, start_time=start))
    with h5py.File(path, "r") as h5:
        assert h5.attrs["start_time"] == "2025-03-14T09:26:53.250000Z"
    assert read_line_file(path).start_time == T0


def test_file_reopens_for_writing_after_read(valid_file: Path) -> None:
    """After read_line_file returns nothing holds the file: h5py opens it in mode 'r+'."""
    read_line_file(valid_file)
    with h5py.File(valid_file, "r+") as h5:
        h5.attrs["note"] = "reopened"
    assert read_line_file(valid_file).line_index == 42


def test_line_bytes_equal_written_file(tmp_path: Path) -> None:
    """line_file_bytes gives exactly the bytes write_line_file puts on disk."""
    line = make_line(tmp_path)
    path = write_line_file(line)
    assert line_file_bytes(line) == path.read_bytes()


def test_user_block_before_signature_is_accepted(tmp_path: Path) -> None:
    """A file with a 512-byte user block (signature at offset 512, HDF5 File Format
    Specification, "Format Signature"; from memory) is read like any other."""
    source = write_line_file(make_line(tmp_path))
    target = tmp_path / "with_user_block.h5"
    with h5py.File(source, "r") as src, h5py.File(target, "w", userblock_size=512) as dst:
        for key, value in src.attrs.items():
            dst.attrs[key] = value
        for key in src:
            src.copy(src[key], dst, name=key)
    assert target.read_bytes()[512:520] == b"\x89HDF\r\n\x1a\n"
    back = read_line_file(target)
    np.testing.assert_array_equal(back.counts, make_line(tmp_path).counts)


def test_documented_example_writes_a_valid_file(tmp_path: Path) -> None:
    """The h5py example in docs/line-file.md produces a file the reader accepts."""
    doc = Path(__file__).resolve().parents[1] / "docs" / "line-file.md"
    blocks = re.findall(r"```python\n(.*?)```", doc.read_text(encoding="utf-8"), re.DOTALL)
    assert blocks, "docs/line-file.md has no python example"
    cwd = os.getcwd()
    os.chdir(tmp_path)
    try:
        exec(blocks[0], {"__name__": "doc_example"})
    finally:
        os.chdir(cwd)
    [written] = [p for p in tmp_path.iterdir() if p.suffix == ".h5"]
    line = read_line_file(written)
    assert line.scan_id == "quartz-wire-03"
    assert written.name == line_file_name(line.line_index, line.direction)


# -- hypothesis round trip --------------------------------------------------------------

NAME_CHARS = "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789._-"
names = st.text(NAME_CHARS, min_size=1, max_size=20).filter(lambda s: not s.startswith("."))
COUNT_DTYPES = [np.uint16, np.int32, np.int64, np.float32, np.float64]


@st.composite
def scan_lines(draw: st.DrawFn) -> ScanLine:
    """Random valid lines: non-uniform grids, integer or float counts, optional fields."""
    n_pixels = draw(st.integers(1, 12))
    n_freq = draw(st.integers(MIN_FREQ, 24))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    steps = rng.uniform(1e3, 5e7, n_freq - 1)  # non-uniform, strictly positive
    freq_hz = draw(st.floats(1e8, 4e9)) + np.concatenate([[0.0], np.cumsum(steps)])
    dtype = np.dtype(draw(st.sampled_from(COUNT_DTYPES)))
    counts = rng.poisson(draw(st.floats(0.0, 1e4)), (n_pixels, n_freq)).astype(dtype)
    reference = None
    if draw(st.booleans()):
        reference = rng.uniform(0.0, 1e4, (n_pixels, n_freq)).astype(np.float32)
    aux_names = draw(st.lists(names, max_size=3, unique=True))
    aux = {name: rng.normal(size=n_pixels) for name in aux_names}
    aux_units = {name: draw(st.sampled_from(["m", "V", "1", "counts/s"])) for name in aux_names}
    n_lines = draw(st.integers(1, 5000))
    start = draw(st.datetimes(datetime(1, 1, 1), datetime(9000, 1, 1), timezones=st.just(UTC)))
    return ScanLine(
        source=Path("unused.h5"),
        scan_id=draw(names),
        line_index=draw(st.integers(0, n_lines - 1)),
        n_lines_planned=n_lines,
        direction=draw(st.sampled_from(["forward", "backward"])),
        start_time=start,
        end_time=start + timedelta(microseconds=draw(st.integers(0, 10**10))),
        dwell_s=draw(st.floats(1e-7, 10.0)),
        nv_theta_rad=draw(st.floats(0.0, np.pi)),
        nv_phi_rad=draw(st.floats(-10.0, 10.0)),
        freq_hz=freq_hz,
        counts=counts,
        x_m=rng.uniform(-1e-4, 1e-4, n_pixels),
        y_m=draw(st.floats(-1e-3, 1e-3)),
        temperature_k=draw(st.none() | st.floats(0.01, 1000.0)),
        profile=draw(st.none() | names),
        reference_counts=reference,
        aux=aux,
        aux_units=aux_units,
    )


@settings(
    max_examples=60, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow]
)
@given(line=scan_lines())
def test_random_valid_lines_round_trip(line: ScanLine) -> None:
    """Any valid line survives write -> read with equal values and the documented dtypes."""
    with tempfile.TemporaryDirectory() as folder:
        path = write_line_file(line, Path(folder) / "line.h5")
        back = read_line_file(path)
        assert os.listdir(folder) == ["line.h5"]
    for name in (
        "scan_id",
        "line_index",
        "n_lines_planned",
        "direction",
        "start_time",
        "end_time",
        "dwell_s",
        "nv_theta_rad",
        "nv_phi_rad",
        "y_m",
        "temperature_k",
        "profile",
    ):
        assert getattr(back, name) == getattr(line, name), name
    np.testing.assert_array_equal(back.freq_hz, line.freq_hz)
    np.testing.assert_array_equal(back.x_m, line.x_m)
    assert back.counts.dtype == line.counts.dtype
    np.testing.assert_array_equal(back.counts, line.counts)
    if line.reference_counts is None:
        assert back.reference_counts is None
    else:
        np.testing.assert_array_equal(back.reference_counts, line.reference_counts)
    assert dict(back.aux_units) == dict(line.aux_units)
    assert set(back.aux) == set(line.aux)
    for name, values in line.aux.items():
        np.testing.assert_array_equal(back.aux[name], values)


# -- malformed files: one message per breach --------------------------------------------


def _set_attr(name: str, value: object) -> Callable[[h5py.File], None]:
    def change(h5: h5py.File) -> None:
        h5.attrs[name] = value

    return change


def _del_attr(name: str) -> Callable[[h5py.File], None]:
    def change(h5: h5py.File) -> None:
        del h5.attrs[name]

    return change


def _dataset(name: str, data: object, units: str | None) -> Callable[[h5py.File], None]:
    def change(h5: h5py.File) -> None:
        replace_dataset(h5, name, data, units)

    return change


def _counts_with(pixel: int, freq: int, value: float, dtype: type) -> np.ndarray:
    counts = np.full((N_PIXELS, N_FREQ), 100, dtype=dtype)
    counts[pixel, freq] = value
    return counts


FREQ = np.linspace(2.80e9, 2.94e9, N_FREQ)
SWAPPED = FREQ.copy()
SWAPPED[[10, 11]] = SWAPPED[[11, 10]]
DUPLICATED = FREQ.copy()
DUPLICATED[11] = DUPLICATED[10]
X_INF = np.arange(N_PIXELS) * 25e-9
X_INF[7] = np.inf


def _string_counts(h5: h5py.File) -> None:
    del h5["counts"]
    text = np.full((N_PIXELS, N_FREQ), "12", dtype=object)
    h5.create_dataset("counts", data=text, dtype=h5py.string_dtype())
    h5["counts"].attrs["units"] = "counts"


def _soft_link_counts(h5: h5py.File) -> None:
    h5.move("counts", "photon_counts")
    h5["counts"] = h5py.SoftLink("/photon_counts")


def _aux_as_dataset(h5: h5py.File) -> None:
    del h5["aux"]
    h5.create_dataset("aux", data=np.zeros(N_PIXELS))


MALFORMED: list[tuple[str, Callable[[h5py.File], None], str]] = [
    (
        "missing dataset",
        lambda h5: h5.__delitem__("counts"),
        "dataset 'counts' must be present; found no such dataset "
        "(the group holds: aux, freq_hz, x_m, y_m)",
    ),
    (
        "counts wrong shape",
        _dataset("counts", np.zeros((N_PIXELS, 200)), "counts"),
        "dataset 'counts' must be of shape (n_pixels, n_freq) = (256, 201); found (256, 200)",
    ),
    (
        "counts one-dimensional",
        _dataset("counts", np.zeros(N_PIXELS), "counts"),
        "dataset 'counts' must be of shape (n_pixels, n_freq) = (256, 201); found (256,)",
    ),
    (
        "freq two-dimensional",
        _dataset("freq_hz", FREQ[:201].reshape(3, 67), "Hz"),
        "dataset 'freq_hz' must be one-dimensional (n_freq,); found shape (3, 67)",
    ),
    (
        "string counts",
        _string_counts,
        "dataset 'counts' must be of integer or floating-point dtype; found string dtype",
    ),
    (
        "boolean counts",
        _dataset("counts", np.ones((N_PIXELS, N_FREQ), bool), "counts"),
        "dataset 'counts' must be of integer or floating-point dtype; found boolean dtype",
    ),
    (
        "NaN counts",
        _dataset("counts", _counts_with(3, 17, np.nan, np.float64), "counts"),
        "dataset 'counts' must be finite; found nan at (pixel 3, frequency 17)",
    ),
    (
        "negative counts",
        _dataset("counts", _counts_with(5, 0, -2, np.int32), "counts"),
        "dataset 'counts' must be >= 0; found -2 at (pixel 5, frequency 0)",
    ),
    (
        "negative reference counts",
        _dataset("reference_counts", _counts_with(0, 200, -0.5, np.float32), "counts"),
        "dataset 'reference_counts' must be >= 0; found -0.5 at (pixel 0, frequency 200)",
    ),
    (
        "non-monotonic frequencies",
        _dataset("freq_hz", SWAPPED, "Hz"),
        "dataset 'freq_hz' must be strictly increasing; found 2807700000.0 Hz at index 10 "
        "followed by 2807000000.0 Hz at index 11",
    ),
    (
        "duplicate frequencies",
        _dataset("freq_hz", DUPLICATED, "Hz"),
        "dataset 'freq_hz' must be strictly increasing; found the duplicate 2807000000.0 Hz "
        "at indices 10 and 11",
    ),
    (
        "zero frequency",
        _dataset("freq_hz", FREQ - FREQ[0], "Hz"),
        "dataset 'freq_hz' must be > 0 Hz; found 0.0 Hz at index 0",
    ),
    (
        "unknown format version",
        _set_attr("format_version", np.int64(2)),
        "attribute 'format_version' must be 1 (the only version this reader knows); "
        "found 2 (int64)",
    ),
    (
        "format version as text",
        _set_attr("format_version", "1"),
        "attribute 'format_version' must be 1 (the only version this reader knows); found '1'",
    ),
    (
        "wrong format name",
        _set_attr("format", "mystery-spectra"),
        "attribute 'format' must be 'strayline-line'; found 'mystery-spectra'",
    ),
    (
        "missing format",
        _del_attr("format"),
        "attribute 'format' must be present ('strayline-line'); found no such attribute",
    ),
    (
        "line index beyond plan",
        _set_attr("line_index", np.int64(128)),
        "attribute 'line_index' must be less than n_lines_planned = 128; found 128",
    ),
    (
        "line index as float",
        _set_attr("line_index", np.float64(3.0)),
        "attribute 'line_index' must be an integer >= 0; found 3.0 (float64)",
    ),
    (
        "negative line index",
        _set_attr("line_index", np.int64(-1)),
        "attribute 'line_index' must be an integer >= 0; found -1 (int64)",
    ),
    (
        "absurd planned lines",
        _set_attr("n_lines_planned", np.int64(10**9)),
        "attribute 'n_lines_planned' must be at most 65536 (limits.max_lines_planned); "
        "found 1000000000",
    ),
    (
        "end before start",
        _set_attr("end_time", "2025-03-14T09:26:52Z"),
        "attribute 'end_time' must be at or after start_time = 2025-03-14T09:26:53.250000Z; "
        "found 2025-03-14T09:26:52.000000Z",
    ),
    (
        "bad direction",
        _set_attr("direction", "left"),
        "attribute 'direction' must be 'forward' or 'backward'; found 'left'",
    ),
    (
        "time without offset",
        _set_attr("start_time", "2025-03-14 09:26:53"),
        "attribute 'start_time' must be an ISO 8601 UTC time such as 2025-03-14T09:26:53.250Z "
        "(offset 'Z' or '+00:00'); found '2025-03-14 09:26:53'",
    ),
    (
        "time in another zone",
        _set_attr("start_time", "2025-03-14T10:26:53+01:00"),
        "attribute 'start_time' must be an ISO 8601 UTC time such as 2025-03-14T09:26:53.250Z "
        "(offset 'Z' or '+00:00'); found '2025-03-14T10:26:53+01:00'",
    ),
    (
        "impossible date",
        _set_attr("start_time", "2025-02-30T10:26:53Z"),
        "attribute 'start_time' must be an ISO 8601 UTC time such as 2025-03-14T09:26:53.250Z "
        "(offset 'Z' or '+00:00'); found '2025-02-30T10:26:53Z'",
    ),
    (
        "scan id with a path",
        _set_attr("scan_id", "../etc"),
        "attribute 'scan_id' must be 1–128 characters of A–Z a–z 0–9 . _ -, not starting "
        "with '.'; found '../etc'",
    ),
    (
        "hidden scan id",
        _set_attr("scan_id", ".cache"),
        "attribute 'scan_id' must be 1–128 characters of A–Z a–z 0–9 . _ -, not starting "
        "with '.'; found '.cache'",
    ),
    (
        "empty scan id",
        _set_attr("scan_id", ""),
        "attribute 'scan_id' must be 1–128 characters of A–Z a–z 0–9 . _ -, not starting "
        "with '.'; found ''",
    ),
    (
        "scan id too long",
        _set_attr("scan_id", "s" * 129),
        "attribute 'scan_id' must be 1–128 characters of A–Z a–z 0–9 . _ -, not starting "
        "with '.'; found '" + "s" * 60 + "…'",
    ),
    (
        "missing dwell",
        _del_attr("dwell_s"),
        "attribute 'dwell_s' must be present (a finite number of seconds > 0); "
        "found no such attribute",
    ),
    (
        "zero dwell",
        _set_attr("dwell_s", 0.0),
        "attribute 'dwell_s' must be a finite number of seconds > 0; found 0.0 (float64)",
    ),
    (
        "theta beyond pi",
        _set_attr("nv_theta_rad", 4.0),
        "attribute 'nv_theta_rad' must be a finite angle in [0, π] rad; found 4.0 (float64)",
    ),
    (
        "infinite phi",
        _set_attr("nv_phi_rad", np.inf),
        "attribute 'nv_phi_rad' must be a finite angle in rad; found inf (float64)",
    ),
    (
        "negative temperature",
        _set_attr("temperature_k", -3.0),
        "attribute 'temperature_k' must be a finite temperature > 0 K; found -3.0 (float64)",
    ),
    (
        "profile with a slash",
        _set_attr("profile", "films/garnet"),
        "attribute 'profile' must be 1–128 characters of A–Z a–z 0–9 . _ -, not starting "
        "with '.'; found 'films/garnet'",
    ),
    (
        "tip with a space",
        _set_attr("tip_id", "tip 7"),
        "attribute 'tip_id' must be 1–128 characters of A–Z a–z 0–9 . _ -, not starting "
        "with '.'; found 'tip 7'",
    ),
    (
        "missing units",
        lambda h5: h5["freq_hz"].attrs.__delitem__("units"),
        "attribute 'units' of dataset 'freq_hz' must be 'Hz'; found no such attribute",
    ),
    (
        "wrong units",
        lambda h5: h5["freq_hz"].attrs.__setitem__("units", "GHz"),
        "attribute 'units' of dataset 'freq_hz' must be 'Hz'; found 'GHz'",
    ),
    (
        "x in nanometres",
        lambda h5: h5["x_m"].attrs.__setitem__("units", "nm"),
        "attribute 'units' of dataset 'x_m' must be 'm'; found 'nm'",
    ),
    (
        "infinite x",
        _dataset("x_m", X_INF, "m"),
        "dataset 'x_m' must be finite; found inf at index 7",
    ),
    (
        "y as a vector",
        _dataset("y_m", np.zeros(1), "m"),
        "dataset 'y_m' must be of shape scalar = (); found (1,)",
    ),
    (
        "aux wrong length",
        _dataset("aux/topography_m", np.zeros(N_PIXELS - 1), "m"),
        "dataset 'aux/topography_m' must be of shape (n_pixels,) = (256,); found (255,)",
    ),
    (
        "aux without units",
        _dataset("aux/topography_m", np.zeros(N_PIXELS), None),
        "attribute 'units' of dataset 'aux/topography_m' must be a non-empty string; "
        "found no such attribute",
    ),
    (
        "aux not a group",
        _aux_as_dataset,
        "group 'aux' must be a group stored in this file; found a Dataset",
    ),
    (
        "soft-linked counts",
        _soft_link_counts,
        "dataset 'counts' must be a dataset stored in this file; found a SoftLink",
    ),
    (
        "too few frequencies",
        _dataset("freq_hz", FREQ[:2], "Hz"),
        "dataset 'freq_hz' must be 10 to 4096 frequencies long (limits.min_freq, "
        "limits.max_freq); found 2 frequencies",
    ),
]


@pytest.mark.parametrize(
    ("change", "message"), [case[1:] for case in MALFORMED], ids=[case[0] for case in MALFORMED]
)
def test_malformed_file_is_rejected_with_its_cause(
    valid_file: Path, change: Callable[[h5py.File], None], message: str
) -> None:
    """Each breach of the contract raises LineFileError naming file, field, expected, found."""
    assert rejected(tampered(valid_file, change)) == f"{NAME}: {message}"


def test_three_frequencies_are_refused_as_too_few_to_fit(valid_file: Path) -> None:
    """A spectrum of three points (once within the contract, then a crash of the fitter)
    is refused by the reader: the contract asks for MIN_FREQ = 10 points."""
    assert MIN_FREQ == DEFAULT_LIMITS.min_freq == 10
    message = rejected(tampered(valid_file, _dataset("freq_hz", FREQ[:3], "Hz")))
    assert message == (
        f"{NAME}: dataset 'freq_hz' must be 10 to 4096 frequencies long (limits.min_freq, "
        "limits.max_freq); found 3 frequencies"
    )


def _oversized_chunk(h5: h5py.File) -> None:
    """counts of a legal shape in one gzip chunk declared far larger than the dataset (a
    decompression bomb in small: 4096 x 512 float64 = 16 MiB to inflate for 256 x 201)."""
    del h5["counts"]
    ds = h5.create_dataset(
        "counts",
        data=np.full((N_PIXELS, N_FREQ), 300.0),
        maxshape=(None, None),
        chunks=(4096, 512),
        compression="gzip",
    )
    ds.attrs["units"] = "counts"


def test_a_chunk_that_inflates_beyond_the_read_limit_is_refused_before_reading(
    valid_file: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A dataset whose chunks would decompress to more than max_pixels x max_freq float64
    values is refused from its metadata alone, naming the chunk shape and the bytes, and
    its values are never read (common practice against decompression bombs)."""
    limits = LineLimits(max_pixels=512, max_freq=512)  # read limit 2 MiB
    path = tampered(valid_file, _oversized_chunk)
    read: list[object] = []
    monkeypatch.setattr(lines_module.FileFields, "values", lambda self, ds: read.append(ds))
    assert rejected(path, limits) == (
        f"{NAME}: dataset 'counts' must be chunked to decompress at most 2097152 bytes "
        "when read (limits.max_pixels x limits.max_freq float64 values); found chunks of "
        "shape (4096, 512) for shape (256, 201): 16777216 bytes to decompress"
    )
    assert read == []  # refused from metadata: nothing was read


def test_a_resizable_chunked_file_within_the_limit_is_read(valid_file: Path) -> None:
    """Chunking and compression as an acquisition program writes them (h5py's own chunk
    choice for a resizable dataset) are accepted and read back exactly."""

    def chunked(h5: h5py.File) -> None:
        data = h5["counts"][()]
        del h5["counts"]
        ds = h5.create_dataset(
            "counts", data=data, maxshape=(None, N_FREQ), chunks=True, compression="gzip"
        )
        ds.attrs["units"] = "counts"

    before = read_line_file(valid_file).counts
    line = read_line_file(tampered(valid_file, chunked))
    np.testing.assert_array_equal(line.counts, before)


def test_truncated_file_is_rejected(valid_file: Path) -> None:
    """A file cut to half its bytes (an interrupted copy) is reported as unreadable."""
    data = valid_file.read_bytes()
    valid_file.write_bytes(data[: len(data) // 2])
    message = rejected(valid_file)
    assert message.startswith(
        f"{NAME}: file must be a complete, readable HDF5 file; found an unreadable one ("
    )
    assert "truncated" in message


def test_zero_byte_file_is_rejected(tmp_path: Path) -> None:
    """An empty file (created, nothing written yet) is rejected before it is parsed."""
    path = tmp_path / NAME
    path.touch()
    assert rejected(path) == f"{NAME}: file must be a non-empty HDF5 file; found 0 bytes"


def test_text_file_is_rejected(tmp_path: Path) -> None:
    """A text file with an .h5 name has no HDF5 signature and is rejected as such."""
    path = tmp_path / "notes.h5"
    path.write_text("line 42 of scan garnet-film-07 was skipped\n", encoding="utf-8")
    assert rejected(path) == (
        "notes.h5: file must be an HDF5 file (signature \\x89HDF\\r\\n\\x1a\\n); "
        "found no HDF5 signature (first bytes b'line 42 of scan ')"
    )


def test_file_larger_than_limit_is_rejected(valid_file: Path) -> None:
    """A file over limits.max_file_bytes is refused from its size alone."""
    size = valid_file.stat().st_size
    assert rejected(valid_file, LineLimits(max_file_bytes=4096)) == (
        f"{NAME}: file must be at most 4096 bytes (limits.max_file_bytes); found {size} bytes"
    )


def test_absurd_pixel_count_is_rejected_before_reading(
    valid_file: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A small file declaring 10^7 pixels (unwritten chunked datasets) is refused from its
    shapes; no dataset value is ever read."""

    def declare_huge(h5: h5py.File) -> None:
        for name, shape in (("x_m", (10**7,)), ("counts", (10**7, N_FREQ))):
            del h5[name]
            h5.create_dataset(name, shape=shape, dtype="f8", chunks=True)
            h5[name].attrs["units"] = "m" if name == "x_m" else "counts"

    tampered(valid_file, declare_huge)
    assert valid_file.stat().st_size < 10**6
    read: list[str] = []
    real_values = lines_module.FileFields.values

    def counting(self: object, dataset: h5py.Dataset) -> np.ndarray:
        read.append(dataset.name)
        return real_values(self, dataset)  # type: ignore[arg-type]

    monkeypatch.setattr(lines_module.FileFields, "values", counting)
    assert rejected(valid_file) == (
        f"{NAME}: dataset 'x_m' must be 1 to 8192 pixels long (limits.max_pixels); "
        "found 10000000 pixels"
    )
    assert read == []


def test_too_many_frequencies_is_rejected(valid_file: Path) -> None:
    """A spectrum longer than limits.max_freq is refused."""
    tampered(valid_file, _dataset("freq_hz", np.linspace(2.8e9, 2.9e9, 5000), "Hz"))
    assert rejected(valid_file) == (
        f"{NAME}: dataset 'freq_hz' must be 10 to 4096 frequencies long (limits.min_freq, "
        "limits.max_freq); found 5000 frequencies"
    )


def test_too_many_aux_channels_is_rejected(valid_file: Path) -> None:
    """More auxiliary channels than limits.max_aux are refused."""

    def add_channels(h5: h5py.File) -> None:
        for i in range(3):
            h5.create_dataset(f"aux/extra{i}", data=np.zeros(N_PIXELS)).attrs["units"] = "V"

    tampered(valid_file, add_channels)
    assert rejected(valid_file, LineLimits(max_aux=2)) == (
        f"{NAME}: group 'aux' must be at most 2 channels (limits.max_aux); found 4 channels"
    )


def test_missing_file_is_an_os_error(tmp_path: Path) -> None:
    """A vanished file is not a contract breach: the reader raises FileNotFoundError."""
    with pytest.raises(FileNotFoundError):
        read_line_file(tmp_path / NAME)


def test_one_element_array_attributes_are_accepted(valid_file: Path) -> None:
    """Scalar attributes stored as one-element arrays (as some acquisition tools write
    them) and fixed-length byte strings are read as their scalar values."""

    def as_arrays(h5: h5py.File) -> None:
        h5.attrs["line_index"] = np.array([42], dtype=np.int32)
        h5.attrs["dwell_s"] = np.array([2e-3])
        h5.attrs["direction"] = np.bytes_(b"forward")

    back = read_line_file(tampered(valid_file, as_arrays))
    assert (back.line_index, back.dwell_s, back.direction) == (42, 2e-3, "forward")


def test_limits_refuse_nonsense() -> None:
    """LineLimits refuses non-positive sizes and min_freq above max_freq."""
    with pytest.raises(ValueError, match=r"LineLimits.max_pixels must be a positive integer"):
        LineLimits(max_pixels=0)
    with pytest.raises(ValueError, match=r"LineLimits.min_freq must be <= max_freq = 4"):
        LineLimits(min_freq=5, max_freq=4)


# -- names and time strings -------------------------------------------------------------


def test_line_file_name_examples() -> None:
    """Canonical names pad the index to five digits and grow wider when needed."""
    assert line_file_name(42, "forward") == "line_00042_fwd.h5"
    assert line_file_name(42, "backward") == "line_00042_bwd.h5"
    assert line_file_name(0, "forward") == "line_00000_fwd.h5"
    assert line_file_name(123456, "backward") == "line_123456_bwd.h5"


@pytest.mark.parametrize(
    ("index", "direction", "error"),
    [(-1, "forward", ValueError), (3, "left", ValueError), (True, "forward", TypeError)],
)
def test_line_file_name_refuses_bad_arguments(index: int, direction: str, error: type) -> None:
    """A negative or boolean index, or an unknown direction, is a caller error."""
    with pytest.raises(error):
        line_file_name(index, direction)


@given(st.integers(0, 10**9), st.sampled_from(["forward", "backward"]))
def test_line_file_names_are_never_temporary(index: int, direction: str) -> None:
    """Canonical names sort by index within their width, parse back, and are final."""
    name = line_file_name(index, direction)
    assert not is_temporary_name(name)
    match = re.fullmatch(r"line_(\d{5,})_(fwd|bwd)\.h5", name)
    assert match is not None
    assert int(match.group(1)) == index
    assert match.group(2) == {"forward": "fwd", "backward": "bwd"}[direction]


@pytest.mark.parametrize(
    ("name", "temporary"),
    [
        (".line_00042_fwd.h5.3f9a1c2b7d4e.tmp", True),
        ("line_00042_fwd.h5.tmp", True),
        ("line_00042_fwd.h5.TMP", True),
        ("line_00042_fwd.h5.part", True),
        ("line_00042_fwd.h5.partial", True),
        ("line_00042_fwd.h5~", True),
        (".hidden.h5", True),
        ("scan/sub/.line_00001_bwd.h5", True),
        ("line_00042_fwd.h5", False),
        ("scan.d/line_00042_fwd.h5", False),
        ("tmp_line.h5", False),
    ],
)
def test_temporary_names(name: str, temporary: bool) -> None:
    """Hidden names and .tmp/.part/.partial/~ endings are temporary; others are final."""
    assert is_temporary_name(name) is temporary


@given(st.text(min_size=1, max_size=30).filter(lambda s: "/" not in s and "\x00" not in s))
def test_hidden_and_suffixed_names_are_temporary(stem: str) -> None:
    """Any name made hidden or given a temporary suffix counts as temporary."""
    assert is_temporary_name("." + stem)
    for suffix in (".tmp", ".part", ".partial", "~"):
        assert is_temporary_name(stem + suffix)


@given(st.datetimes(datetime(1, 1, 1), datetime(9999, 12, 31), timezones=st.just(UTC)))
def test_time_strings_round_trip(moment: datetime) -> None:
    """Times written as the writer writes them ('Z' or '+00:00') parse to the same instant."""
    text = moment.replace(tzinfo=None).isoformat(timespec="microseconds")
    assert parse_utc_time(text + "Z") == moment
    assert parse_utc_time(text + "+00:00") == moment
    assert parse_utc_time(text) is None  # naive: refused


def test_time_fraction_digits() -> None:
    """Fractions of 1 to 9 digits are accepted; digits past microseconds are truncated."""
    assert parse_utc_time("2025-03-14T09:26:53Z") == T0.replace(microsecond=0)
    assert parse_utc_time("2025-03-14T09:26:53.25Z") == T0
    assert parse_utc_time("2025-03-14T09:26:53.250000999Z") == T0
    assert parse_utc_time("2025-03-14T09:26:53.2500009991Z") is None


@given(st.text(max_size=40))
def test_time_parser_never_raises(text: str) -> None:
    """Arbitrary text gives a UTC datetime or None, never an exception."""
    parsed = parse_utc_time(text)
    assert parsed is None or parsed.tzinfo == UTC
