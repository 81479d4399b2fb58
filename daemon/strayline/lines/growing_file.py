"""The growing scan file: one HDF5 file per scan that gains a row per completed line.

Layout (docs/layouts.md): root attributes describe the scan and ``rows_committed`` counts
the rows that are complete; per-row datasets (``counts``, ``x_m``, ``y_m``, ``line_index``,
``backward``, ``start_time_us``, ``end_time_us``, optional ``reference_counts``) grow along
their first axis. The writer appends a row, flushes it, and only then raises
``rows_committed``: a reader never takes a row that is not complete.

- :class:`GrowingFileReader` (the ``growing-file`` reader) opens the file briefly, read
  only, in SWMR-read mode and without HDF5 file locking, reads the committed rows not yet
  handed over, closes it, and yields them; it never holds the file between reads, so the
  writer is never blocked.
- :class:`GrowingFileWriter` writes such a file, in SWMR mode (held open) or closing it
  after each line; the demo instrument and the tests use it.

A line's identity is (scan, line index, direction) and the SHA-256 of its row's bytes, so
the store's ledger recognises a row read again and the reader, told which lines the store
has (``handed_over``), skips their rows without reading them after a restart.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import NoReturn

import h5py
import numpy as np

from strayline.errors import LineFileError
from strayline.lines._h5check import NAME_PATTERN, NAME_RULE, FileFields, is_int, show
from strayline.lines.line_check import check_line
from strayline.lines.readers import HandedOver, nothing_handed_over
from strayline.lines.scan_line import DIRECTIONS, Direction, LineLimits, ScanLine

__all__ = [
    "GROWING_FILE_READER",
    "GROWING_FORMAT",
    "GROWING_FORMAT_VERSION",
    "GrowingFileReader",
    "GrowingFileWriter",
    "ScanHeader",
]

_LIMITS = LineLimits()  # the default limits

GROWING_FORMAT = "strayline-growing-scan"
GROWING_FORMAT_VERSION = 1

#: Rows read per opening of the file (a catch-up of a long scan is read in such steps).
ROWS_PER_OPEN = 32

_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
_ONE_US = timedelta(microseconds=1)
_ROW_DATASETS = ("counts", "x_m", "y_m", "line_index", "backward", "start_time_us", "end_time_us")
_UNITS = {
    "counts": "counts",
    "reference_counts": "counts",
    "x_m": "m",
    "y_m": "m",
    "start_time_us": "us",
    "end_time_us": "us",
}


def _microseconds(moment: datetime) -> int:
    return (moment - _EPOCH) // _ONE_US


@dataclass(frozen=True, eq=False)
class ScanHeader:
    """What a growing file says about its whole scan (its root attributes and sweep)."""

    scan_id: str
    n_lines_planned: int
    n_pixels: int
    dwell_s: float
    nv_theta_rad: float
    nv_phi_rad: float
    freq_hz: np.ndarray
    temperature_k: float | None = None
    profile: str | None = None
    reference: bool = False
    counts_dtype: str = "f8"
    digest: bytes = field(default=b"", repr=False)

    @classmethod
    def of(cls, line: ScanLine) -> ScanHeader:
        """The header of the scan a line belongs to."""
        return cls(
            scan_id=line.scan_id,
            n_lines_planned=line.n_lines_planned,
            n_pixels=line.n_pixels,
            dwell_s=line.dwell_s,
            nv_theta_rad=line.nv_theta_rad,
            nv_phi_rad=line.nv_phi_rad,
            freq_hz=np.asarray(line.freq_hz, dtype=np.float64),
            temperature_k=line.temperature_k,
            profile=line.profile,
            reference=line.reference_counts is not None,
            counts_dtype=np.asarray(line.counts).dtype.str,
        )


# -- writing ----------------------------------------------------------------------------


class GrowingFileWriter:
    """Writes a growing scan file a line at a time.

    Parameters
    ----------
    path : Path
        The file (created; an existing one is replaced).
    header : ScanHeader
        The scan.
    swmr : bool
        True: the file stays open in HDF5's single-writer/multiple-reader mode, each row
        flushed before ``rows_committed`` is raised. False: the file is closed after each
        line and reopened for the next (for writers without SWMR).
    """

    def __init__(self, path: Path, header: ScanHeader, *, swmr: bool = True) -> None:
        self.path = Path(path)
        self.header = header
        self._swmr = swmr
        self.rows = 0
        h5 = h5py.File(self.path, "w", libver="latest")
        try:
            self._create(h5, header)
        except BaseException:
            h5.close()
            raise
        if swmr:
            h5.swmr_mode = True
            self._h5: h5py.File | None = h5
        else:
            h5.close()
            self._h5 = None

    @staticmethod
    def _create(h5: h5py.File, header: ScanHeader) -> None:
        attrs = h5.attrs
        attrs["format"] = GROWING_FORMAT
        attrs["format_version"] = np.int64(GROWING_FORMAT_VERSION)
        attrs["scan_id"] = header.scan_id
        attrs["n_lines_planned"] = np.int64(header.n_lines_planned)
        attrs["dwell_s"] = np.float64(header.dwell_s)
        attrs["nv_theta_rad"] = np.float64(header.nv_theta_rad)
        attrs["nv_phi_rad"] = np.float64(header.nv_phi_rad)
        if header.temperature_k is not None:
            attrs["temperature_k"] = np.float64(header.temperature_k)
        if header.profile is not None:
            attrs["profile"] = header.profile
        attrs["rows_committed"] = np.int64(0)  # created before SWMR: it may only change then
        h5.create_dataset("freq_hz", data=header.freq_hz).attrs["units"] = "Hz"
        n_pixels, n_freq = header.n_pixels, header.freq_hz.size
        shapes: dict[str, tuple[tuple[int, ...], str]] = {
            "counts": ((n_pixels, n_freq), header.counts_dtype),
            "x_m": ((n_pixels,), "f8"),
            "y_m": ((), "f8"),
            "line_index": ((), "i8"),
            "backward": ((), "u1"),
            "start_time_us": ((), "i8"),
            "end_time_us": ((), "i8"),
        }
        if header.reference:
            shapes["reference_counts"] = ((n_pixels, n_freq), header.counts_dtype)
        for name, (row_shape, dtype) in shapes.items():
            ds = h5.create_dataset(
                name,
                shape=(0, *row_shape),
                maxshape=(None, *row_shape),
                chunks=(1 if row_shape else 256, *row_shape),
                dtype=dtype,
            )
            if name in _UNITS:
                ds.attrs["units"] = _UNITS[name]

    def append(self, line: ScanLine) -> int:
        """Append a line as the next row, then commit it; return its row index."""
        rows = {
            "counts": np.asarray(line.counts),
            "x_m": np.asarray(line.x_m, dtype=np.float64),
            "y_m": np.float64(line.y_m),
            "line_index": np.int64(line.line_index),
            "backward": np.uint8(line.direction == "backward"),
            "start_time_us": np.int64(_microseconds(line.start_time)),
            "end_time_us": np.int64(_microseconds(line.end_time)),
        }
        if self.header.reference:
            rows["reference_counts"] = np.asarray(line.reference_counts)
        h5 = self._h5 if self._h5 is not None else h5py.File(self.path, "a", libver="latest")
        try:
            row = self.rows
            for name, value in rows.items():
                ds = h5[name]
                ds.resize(row + 1, axis=0)
                ds[row] = value
                if self._swmr:
                    ds.flush()
            h5.attrs["rows_committed"] = np.int64(row + 1)  # only now is the row complete
            h5.flush()
        finally:
            if self._h5 is None:
                h5.close()
        self.rows = row + 1
        return row

    def close(self) -> None:
        """Close the file (SWMR mode); idempotent."""
        if self._h5 is not None:
            h5, self._h5 = self._h5, None
            h5.close()

    def __enter__(self) -> GrowingFileWriter:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()


# -- reading ----------------------------------------------------------------------------


def _open(path: Path) -> h5py.File:
    """Open read-only, SWMR-read (a writer holding it in SWMR mode is fine), no HDF5 file
    locking: the writer is never locked out by a reader."""
    return h5py.File(path, "r", swmr=True, locking=False)


@dataclass
class _Opened:
    """What one opening of the file gave: lines, and the problem that stopped it."""

    lines: list[ScanLine]
    error: LineFileError | None
    committed: int
    remaining: int  # good rows left to hand over (beyond ``lines``)


def _fail(path: Path, field_name: str, expected: str, found: str) -> NoReturn:
    raise LineFileError(path, field_name, expected, found)


def _header(ff: FileFields, limits: LineLimits) -> ScanHeader:
    ff.expect_format(GROWING_FORMAT, GROWING_FORMAT_VERSION)
    scan_id = ff.attr_str("scan_id", NAME_RULE, NAME_PATTERN)
    n_lines = ff.lines_planned(limits.max_lines_planned)
    dwell_s = ff.attr_float("dwell_s", "a finite number of seconds > 0", low=0.0, low_open=True)
    theta = ff.attr_float("nv_theta_rad", "a finite angle in [0, π] rad", low=0.0, high=np.pi)
    phi = ff.attr_float("nv_phi_rad", "a finite angle in rad")
    temperature_k = None
    if ff.has_attr("temperature_k"):
        temperature_k = ff.attr_float(
            "temperature_k", "a finite temperature > 0 K", low=0.0, low_open=True
        )
    profile = ff.attr_str("profile", NAME_RULE, NAME_PATTERN) if ff.has_attr("profile") else None
    freq_ds = ff.dataset("freq_hz")
    assert freq_ds is not None
    ff.units(freq_ds, "freq_hz", "Hz")
    if freq_ds.ndim != 1 or not limits.min_freq <= freq_ds.shape[0] <= limits.max_freq:
        ff.fail(
            "dataset 'freq_hz'",
            f"one-dimensional, {limits.min_freq} to {limits.max_freq} frequencies long",
            f"shape {freq_ds.shape}",
        )
    freq_hz = ff.values(freq_ds).astype(np.float64)
    ff.check_frequencies(freq_hz, "freq_hz")
    counts = ff.dataset("counts", whole_read=False)
    assert counts is not None
    if counts.ndim != 3 or counts.shape[2] != freq_hz.size:
        ff.fail(
            "dataset 'counts'",
            f"of shape (rows, n_pixels, n_freq = {freq_hz.size})",
            str(counts.shape),
        )
    n_pixels = counts.shape[1]
    if not 1 <= n_pixels <= limits.max_pixels:
        ff.fail(
            "dataset 'counts'",
            f"1 to {limits.max_pixels} pixels per row (limits.max_pixels)",
            f"{n_pixels} pixels",
        )
    digest = hashlib.sha256(
        repr((scan_id, n_lines, dwell_s, theta, phi, temperature_k, profile)).encode()
        + freq_hz.tobytes()
    ).digest()
    return ScanHeader(
        scan_id=scan_id,
        n_lines_planned=n_lines,
        n_pixels=n_pixels,
        dwell_s=dwell_s,
        nv_theta_rad=theta,
        nv_phi_rad=phi,
        freq_hz=freq_hz,
        temperature_k=temperature_k,
        profile=profile,
        reference="reference_counts" in ff.group,
        digest=digest,
    )


def _row_datasets(
    ff: FileFields, header: ScanHeader, committed: int, limits: LineLimits
) -> dict[str, h5py.Dataset]:
    """The per-row datasets, each with at least ``committed`` rows of the right shape, and
    chunks that bound what reading one row decompresses."""
    row_shapes = {
        "counts": (header.n_pixels, header.freq_hz.size),
        "x_m": (header.n_pixels,),
        "y_m": (),
        "line_index": (),
        "backward": (),
        "start_time_us": (),
        "end_time_us": (),
    }
    if header.reference:
        row_shapes["reference_counts"] = row_shapes["counts"]
    found: dict[str, h5py.Dataset] = {}
    for name, row_shape in row_shapes.items():
        ds = ff.dataset(name, whole_read=False)
        assert ds is not None
        if name in _UNITS:
            ff.units(ds, name, _UNITS[name])
        if ds.shape[1:] != row_shape or ds.ndim != 1 + len(row_shape):
            ff.fail(ff.field(name), f"of shape (rows, *{row_shape})", str(ds.shape))
        if ds.shape[0] < committed:
            ff.fail(
                ff.field(name),
                f"at least rows_committed = {committed} rows long",
                f"{ds.shape[0]} rows",
            )
        if ds.chunks is not None:
            per_row = np.prod(
                [-(-size // chunk) for size, chunk in zip(ds.shape[1:], ds.chunks[1:], strict=True)]
            )
            read_bytes = int(per_row) * int(np.prod(ds.chunks)) * ds.dtype.itemsize
            if read_bytes > limits.max_read_bytes:
                ff.fail(
                    ff.field(name),
                    f"chunked to decompress at most {limits.max_read_bytes} bytes per row",
                    f"chunks of shape {ds.chunks}: {read_bytes} bytes per row",
                )
        found[name] = ds
    return found


def _keys(
    path: Path, sets: dict[str, h5py.Dataset], committed: int, n_lines: int
) -> tuple[list[tuple[int, Direction]], LineFileError | None]:
    """The (line, direction) of each committed row, up to the first row that is wrong."""
    index = np.asarray(sets["line_index"][:committed])
    backward = np.asarray(sets["backward"][:committed])
    keys: list[tuple[int, Direction]] = []
    seen: dict[tuple[int, Direction], int] = {}
    for row in range(committed):
        i, b = index[row], backward[row]
        if not is_int(i) or not 0 <= int(i) < n_lines:
            return keys, LineFileError(
                path, f"dataset 'line_index' row {row}", f"an integer in 0..{n_lines - 1}", show(i)
            )
        if not is_int(b) or int(b) not in (0, 1):
            return keys, LineFileError(
                path, f"dataset 'backward' row {row}", "0 (forward) or 1 (backward)", show(b)
            )
        key = (int(i), DIRECTIONS[int(b)])
        if key in seen:
            return keys, LineFileError(
                path,
                f"dataset 'line_index' row {row}",
                "a (line, direction) no earlier row holds",
                f"line {key[0]} {key[1]}, as row {seen[key]}",
            )
        seen[key] = row
        keys.append(key)
    return keys, None


def _row_line(
    *,
    path: Path,
    header: ScanHeader,
    sets: dict[str, h5py.Dataset],
    row: int,
    key: tuple[int, Direction],
    limits: LineLimits,
) -> ScanLine:
    """Read and check one row."""
    values = {name: np.asarray(ds[row]) for name, ds in sets.items()}
    digest = hashlib.sha256(header.digest)
    for name in sorted(values):
        value = values[name]
        digest.update(f"{name}:{value.dtype.str}:{value.shape}".encode())
        digest.update(np.ascontiguousarray(value).tobytes())
    names = {
        name: f"dataset '{name}' row {row}"
        for name in ("counts", "reference_counts", "x_m", "y_m", "line_index")
    }
    names |= {"start_time": f"dataset 'start_time_us' row {row}"}
    names |= {"end_time": f"dataset 'end_time_us' row {row}"}
    times = []
    for name in ("start_time_us", "end_time_us"):
        us = values[name][()]
        try:
            times.append(_EPOCH + int(us) * _ONE_US)
        except OverflowError:
            _fail(
                path,
                f"dataset '{name}' row {row}",
                "microseconds since 1970-01-01T00:00:00Z",
                show(us),
            )
    line = ScanLine(
        source=path,
        scan_id=header.scan_id,
        line_index=key[0],
        n_lines_planned=header.n_lines_planned,
        direction=key[1],
        start_time=times[0],
        end_time=times[1],
        dwell_s=header.dwell_s,
        nv_theta_rad=header.nv_theta_rad,
        nv_phi_rad=header.nv_phi_rad,
        freq_hz=header.freq_hz,
        counts=values["counts"],
        x_m=values["x_m"],
        y_m=values["y_m"].item(),
        temperature_k=header.temperature_k,
        profile=header.profile,
        reference_counts=values.get("reference_counts"),
        sha256=digest.hexdigest(),
    )
    return check_line(line, limits=limits, names=names)


def _read_once(
    path: Path,
    limits: LineLimits,
    skip: set[tuple[int, str]],
    handed_over: HandedOver,
    row_limit: int | None,
) -> _Opened:
    """Open the file once and take up to :data:`ROWS_PER_OPEN` rows not in ``skip`` nor
    handed over, of the first ``row_limit`` committed rows."""
    try:
        with _open(path) as h5:
            ff = FileFields(path, h5, max_read_bytes=limits.max_read_bytes)
            header = _header(ff, limits)
            committed = ff.attr_int("rows_committed", "an integer >= 0", 0)
            most = 2 * header.n_lines_planned
            if committed > most:
                ff.fail(
                    "attribute 'rows_committed'",
                    f"at most 2 x n_lines_planned = {most} (a row per line and direction)",
                    str(committed),
                )
            sets = _row_datasets(ff, header, committed, limits)
            upto = committed if row_limit is None else min(committed, row_limit)
            keys, error = _keys(path, sets, upto, header.n_lines_planned)
            handed = handed_over(header.scan_id)
            todo = [
                (row, key) for row, key in enumerate(keys) if key not in skip and key not in handed
            ]
            lines: list[ScanLine] = []
            for row, key in todo[:ROWS_PER_OPEN]:
                try:
                    lines.append(
                        _row_line(
                            path=path, header=header, sets=sets, row=row, key=key, limits=limits
                        )
                    )
                except LineFileError as bad:
                    return _Opened(lines, bad, committed, 0)
            remaining = len(todo) - len(lines)
            return _Opened(lines, error if remaining == 0 else None, committed, remaining)
    except LineFileError:
        raise
    except FileNotFoundError:
        raise
    except (OSError, RuntimeError, KeyError, ValueError, TypeError) as exc:
        if not path.exists():
            raise FileNotFoundError(str(path)) from exc
        if isinstance(exc, OSError) and _is_hdf5(path):
            raise  # e.g. caught mid-write by a writer without SWMR: try again later
        raise LineFileError(
            path, "file", "a growing scan file that opens as HDF5", f"{type(exc).__name__}: {exc}"
        ) from exc


def _is_hdf5(path: Path) -> bool:
    try:
        with open(path, "rb") as handle:
            return handle.read(8) == b"\x89HDF\r\n\x1a\n"
    except OSError:
        return False


@dataclass(frozen=True)
class GrowingFileReader:
    """One HDF5 file per scan, a row appended per completed line (docs/layouts.md)."""

    name: str = "growing-file"
    patterns: tuple[str, ...] = ("*.h5",)
    growing: bool = True
    summary: str = "one HDF5 file per scan that grows a row per line (docs/layouts.md)"

    def check(self, path: Path) -> str | None:
        try:
            with _open(path) as h5:
                fmt = h5.attrs.get("format")
        except OSError as exc:
            return f"{path.name}: does not open as HDF5 ({exc})"
        if isinstance(fmt, bytes):
            fmt = fmt.decode("utf-8", "replace")
        if fmt != GROWING_FORMAT:
            return f"{path.name}: root attribute 'format' is {fmt!r}, not {GROWING_FORMAT!r}"
        return None

    def read(
        self,
        path: Path,
        *,
        limits: LineLimits = _LIMITS,
        handed_over: HandedOver = nothing_handed_over,
    ) -> Iterator[ScanLine]:
        """The committed rows not yet handed over, in row order, :data:`ROWS_PER_OPEN` per
        opening of the file (the file is closed while the lines are used). Only the rows
        committed at the first opening are read: a writer faster than the daemon cannot keep
        it here; the rest is read when the file is handed over again."""
        path = Path(path)
        given: set[tuple[int, str]] = set()
        row_limit: int | None = None
        while True:
            opened = _read_once(path, limits, given, handed_over, row_limit)
            if row_limit is None:
                row_limit = opened.committed
            for line in opened.lines:
                given.add((line.line_index, line.direction))
                yield line
            if opened.error is not None:
                raise opened.error
            if opened.remaining == 0:
                return


#: The reader registered as ``growing-file``.
GROWING_FILE_READER = GrowingFileReader()
