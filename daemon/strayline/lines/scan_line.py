"""Scan-line files (contract version 1): the :class:`ScanLine` record, reader and writer.

One HDF5 file per completed scan line. The full contract (every attribute and dataset,
its dtype, shape, unit and meaning; temporary names and atomic rename) is in
``docs/line-file.md``.

- :func:`read_line_file` reads a file's bytes once, checksums them and validates them
  from memory (the file on disk is not held open while parsing).
- :func:`write_line_file` writes a line atomically: temporary name, fsync, rename.
- :func:`line_file_name` and :func:`is_temporary_name` are the naming rules.
"""

from __future__ import annotations

import hashlib
import io
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path, PurePath
from typing import Literal, cast

import h5py
import numpy as np

from strayline._atomic import write_bytes_atomic
from strayline.errors import LineFileError
from strayline.lines._h5check import NAME_PATTERN, NAME_RULE, FileFields, show

__all__ = [
    "DIRECTIONS",
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "HDF5_SIGNATURE",
    "MIN_FREQ",
    "Direction",
    "LineLimits",
    "ScanLine",
    "is_temporary_name",
    "line_file_bytes",
    "line_file_name",
    "line_key_from_name",
    "parse_line_bytes",
    "read_line_file",
    "write_line_file",
]

FORMAT_NAME = "strayline-line"
FORMAT_VERSION = 1

Direction = Literal["forward", "backward"]
DIRECTIONS: tuple[Direction, ...] = ("forward", "backward")
#: Fewest frequencies a spectrum of the contract has: two more than the eight parameters
#: of the richest fit model (two dips, separate widths, baseline slope), so that every
#: line the reader accepts can be fitted.
MIN_FREQ = 10
_DIRECTION_TAG = {"forward": "fwd", "backward": "bwd"}

#: The 8-byte HDF5 format signature; found at offset 0 or, after a user block, at 512,
#: 1024, 2048, ... (HDF5 File Format Specification, "Format Signature").
HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"

_TEMPORARY_SUFFIXES = (".tmp", ".part", ".partial", "~")


@dataclass(frozen=True, eq=False)
class ScanLine:
    """One completed scan line, validated.

    Attributes
    ----------
    source : Path
        The file it was read from (or will be written to).
    scan_id : str
        Identifier of the scan; names the store ``<scan_id>.zarr``.
    line_index : int
        Index along the slow axis, from 0.
    n_lines_planned : int
        Number of lines the scan will have.
    direction : {"forward", "backward"}
        Fast-axis direction of this trace.
    start_time, end_time : datetime
        Acquisition start and end, timezone-aware UTC.
    dwell_s : float
        Integration time per (pixel, frequency) sample, s.
    nv_theta_rad, nv_phi_rad : float
        NV axis polar and azimuthal angle in the scan frame, rad.
    freq_hz : ndarray, shape (n_freq,)
        Microwave frequencies, Hz, strictly increasing (may be non-uniform).
    counts : ndarray, shape (n_pixels, n_freq)
        Photon counts per sample (integer or float, finite, >= 0).
    x_m : ndarray, shape (n_pixels,)
        Fast-axis pixel positions, m.
    y_m : float
        Slow-axis position of the line, m.
    temperature_k : float or None
        Sample/tip temperature, K, if the instrument knows it.
    profile : str or None
        Sample-type profile name requested by the acquisition side.
    reference_counts : ndarray, shape (n_pixels, n_freq), or None
        Counts with the microwave off, if recorded.
    aux : Mapping[str, ndarray]
        Auxiliary per-pixel channels, each shape (n_pixels,).
    aux_units : Mapping[str, str]
        Unit of each auxiliary channel.
    sha256 : str or None
        Hex SHA-256 of the file's bytes as read (None for a line not read from disk).
    tip_id : str or None
        Identifier of the NV tip that took the line, if the acquisition side names it
        (calibrations of the tip's stand-off are kept under it).
    """

    source: Path
    scan_id: str
    line_index: int
    n_lines_planned: int
    direction: Direction
    start_time: datetime
    end_time: datetime
    dwell_s: float
    nv_theta_rad: float
    nv_phi_rad: float
    freq_hz: np.ndarray
    counts: np.ndarray
    x_m: np.ndarray
    y_m: float
    temperature_k: float | None = None
    profile: str | None = None
    reference_counts: np.ndarray | None = None
    aux: Mapping[str, np.ndarray] = field(default_factory=dict)
    aux_units: Mapping[str, str] = field(default_factory=dict)
    sha256: str | None = None
    tip_id: str | None = None

    @property
    def n_pixels(self) -> int:
        return int(self.counts.shape[0])

    @property
    def n_freq(self) -> int:
        return int(self.freq_hz.shape[0])


@dataclass(frozen=True)
class LineLimits:
    """Sizes a scan-line file may have; anything larger is refused before it is read.

    The checks on sizes run on HDF5 metadata (shapes), before any large dataset is read
    or decompressed, so a hostile or broken file cannot make the daemon allocate more
    than these limits allow.

    Attributes
    ----------
    max_pixels : int
        Most pixels per line (length of ``x_m``, rows of ``counts``).
    max_freq : int
        Most microwave frequencies per spectrum.
    min_freq : int
        Fewest frequencies per spectrum: :data:`MIN_FREQ`, what the richest fit model
        needs, so that every spectrum the contract accepts can be fitted.
    max_file_bytes : int
        Largest file, bytes (the reader holds the whole file in memory once).
    max_lines_planned : int
        Largest ``n_lines_planned`` (the store sizes its maps from it).
    max_aux : int
        Most auxiliary channels in ``aux/``.
    """

    max_pixels: int = 8192
    max_freq: int = 4096
    min_freq: int = MIN_FREQ
    max_file_bytes: int = 1 << 30
    max_lines_planned: int = 1 << 16
    max_aux: int = 32

    @property
    def max_read_bytes(self) -> int:
        """Most bytes reading one dataset may decompress: the largest array the contract
        allows, ``counts`` of ``max_pixels`` × ``max_freq`` float64 values."""
        return self.max_pixels * self.max_freq * 8

    def __post_init__(self) -> None:
        for name in (
            "max_pixels",
            "max_freq",
            "min_freq",
            "max_file_bytes",
            "max_lines_planned",
            "max_aux",
        ):
            value = getattr(self, name)
            if not isinstance(value, int) or isinstance(value, bool) or value < 1:
                raise ValueError(f"LineLimits.{name} must be a positive integer; found {value!r}")
        if self.min_freq > self.max_freq:
            raise ValueError(
                f"LineLimits.min_freq must be <= max_freq = {self.max_freq}; found {self.min_freq}"
            )


# The writer checks what it wrote against the contract, not against a reader's limits.
_NO_LIMITS = LineLimits(
    max_pixels=1 << 62,
    max_freq=1 << 62,
    min_freq=MIN_FREQ,
    max_file_bytes=1 << 62,
    max_lines_planned=1 << 62,
    max_aux=1 << 62,
)


# -- names ------------------------------------------------------------------------------


def line_file_name(line_index: int, direction: str) -> str:
    """Canonical file name of a line: ``line_00042_fwd.h5`` / ``line_00042_bwd.h5``.

    The index is zero-padded to 5 digits and grows wider when it needs to.
    """
    if not isinstance(line_index, int | np.integer) or isinstance(line_index, bool):
        raise TypeError(f"line_index must be an integer; found {line_index!r}")
    if line_index < 0:
        raise ValueError(f"line_index must be >= 0; found {line_index}")
    if direction not in _DIRECTION_TAG:
        raise ValueError(f"direction must be 'forward' or 'backward'; found {direction!r}")
    return f"line_{int(line_index):05d}_{_DIRECTION_TAG[direction]}.h5"


#: The canonical line-file name (:func:`line_file_name`), e.g.
#: ``line_00042_fwd.h5``; the direction tag is optional here, and the plain-array files
#: (``.npz``, ``.npy``) are named the same way.
_LINE_NAME = re.compile(r"line_(?P<index>\d{1,9})(?:_(?P<tag>fwd|bwd))?\.(?:h5|npz|npy)")
_TAG_DIRECTION = {tag: direction for direction, tag in _DIRECTION_TAG.items()}


def line_key_from_name(name: str) -> tuple[int | None, str | None]:
    """The line index and direction a file name reveals, (None, None) if it reveals none.

    ``line_00042_fwd.h5`` → ``(42, "forward")``; ``line_00042.h5`` → ``(42, None)``;
    ``line_00042_bwd.npz`` → ``(42, "backward")``; ``scan.h5`` → ``(None, None)``.
    """
    match = _LINE_NAME.fullmatch(name)
    if match is None:
        return None, None
    tag = match.group("tag")
    return int(match.group("index")), (_TAG_DIRECTION[tag] if tag else None)


def is_temporary_name(name: str) -> bool:
    """True for a file name a writer is still working on.

    Temporary: the last path component starts with '.', or ends with '.tmp', '.part',
    '.partial' (any case) or '~'.
    """
    base = PurePath(name).name
    return base.startswith(".") or base.lower().endswith(_TEMPORARY_SUFFIXES)


# -- reading ----------------------------------------------------------------------------


def read_line_file(path: str | os.PathLike[str], *, limits: LineLimits = LineLimits()) -> ScanLine:
    """Read and validate one scan-line file.

    The file's size is checked against ``limits`` first (``os.stat``), then its bytes are
    read once, checksummed (SHA-256) and parsed from memory, so the file on disk is open
    only for the time of one ``read``.

    Parameters
    ----------
    path : str or PathLike
        The file.
    limits : LineLimits
        Largest sizes accepted.

    Returns
    -------
    ScanLine
        ``freq_hz`` and ``x_m`` as float64; ``counts`` and ``reference_counts`` in their
        stored dtype (native byte order; float widths other than 32/64 bits become
        float64); ``aux`` channels as float64; times timezone-aware UTC; ``sha256`` set.

    Raises
    ------
    LineFileError
        The file breaks the contract; the message names the file, the field, what was
        expected and what was found.
    OSError
        The file cannot be read at all (vanished, no permission).
    """
    path = Path(path)
    size = os.stat(path).st_size
    _check_size(path, size, limits)
    with open(path, "rb") as handle:
        data = handle.read(limits.max_file_bytes + 1)
    _check_size(path, len(data), limits)  # it may have grown since stat
    return parse_line_bytes(data, path, limits=limits)


def _check_size(path: Path, size: int, limits: LineLimits) -> None:
    if size == 0:
        raise LineFileError(path, "file", "a non-empty HDF5 file", "0 bytes")
    if size > limits.max_file_bytes:
        raise LineFileError(
            path,
            "file",
            f"at most {limits.max_file_bytes} bytes (limits.max_file_bytes)",
            f"{size} bytes",
        )


def _has_signature(data: bytes) -> bool:
    offset = 0
    while offset + len(HDF5_SIGNATURE) <= len(data):
        if data[offset : offset + len(HDF5_SIGNATURE)] == HDF5_SIGNATURE:
            return True
        offset = 512 if offset == 0 else offset * 2
    return False


def parse_line_bytes(
    data: bytes, source: str | os.PathLike[str], *, limits: LineLimits = LineLimits()
) -> ScanLine:
    """Validate the bytes of a scan-line file already in memory.

    ``source`` is recorded in the result and named in messages; it is not opened.
    Returns and raises as :func:`read_line_file`.
    """
    source = Path(source)
    if len(data) == 0:
        raise LineFileError(source, "file", "a non-empty HDF5 file", "0 bytes")
    if not _has_signature(data):
        raise LineFileError(
            source,
            "file",
            "an HDF5 file (signature \\x89HDF\\r\\n\\x1a\\n)",
            f"no HDF5 signature (first bytes {data[:16]!r})",
        )
    digest = hashlib.sha256(data).hexdigest()
    try:
        with h5py.File(io.BytesIO(data), "r") as h5:
            return _parse(
                FileFields(source, h5, max_read_bytes=limits.max_read_bytes), limits, digest
            )
    except LineFileError:
        raise
    except (OSError, RuntimeError, KeyError, ValueError, TypeError) as exc:
        # h5py reports damaged files (truncated, bad checksums, unknown filters) through
        # all of these; everything it reads here comes from the untrusted file.
        raise LineFileError(
            source,
            "file",
            "a complete, readable HDF5 file",
            f"an unreadable one ({type(exc).__name__}: {exc})",
        ) from exc


def _parse(ff: FileFields, limits: LineLimits, digest: str) -> ScanLine:
    """Check every field in contract order: format, metadata, shapes, then values."""
    ff.expect_format(FORMAT_NAME, FORMAT_VERSION)
    scan_id = ff.attr_str("scan_id", NAME_RULE, NAME_PATTERN)
    line_index = ff.attr_int("line_index", "an integer >= 0", 0)
    n_lines = ff.lines_planned(limits.max_lines_planned)
    if line_index >= n_lines:
        ff.fail("attribute 'line_index'", f"less than n_lines_planned = {n_lines}", str(line_index))
    direction_text = ff.attr_str("direction", "'forward' or 'backward'")
    if direction_text not in DIRECTIONS:
        ff.fail("attribute 'direction'", "'forward' or 'backward'", show(direction_text))
    direction = cast(Direction, direction_text)
    start_time = ff.attr_time("start_time")
    end_time = ff.attr_time("end_time")
    if end_time < start_time:
        ff.fail(
            "attribute 'end_time'",
            f"at or after start_time = {_iso(start_time)}",
            _iso(end_time),
        )
    dwell_s = ff.attr_float("dwell_s", "a finite number of seconds > 0", low=0.0, low_open=True)
    theta = ff.attr_float("nv_theta_rad", "a finite angle in [0, π] rad", low=0.0, high=np.pi)
    phi = ff.attr_float("nv_phi_rad", "a finite angle in rad")
    temperature_k = None
    if ff.has_attr("temperature_k"):
        temperature_k = ff.attr_float(
            "temperature_k", "a finite temperature > 0 K", low=0.0, low_open=True
        )
    profile = None
    if ff.has_attr("profile"):
        profile = ff.attr_str("profile", NAME_RULE, NAME_PATTERN)
    tip_id = None
    if ff.has_attr("tip_id"):
        tip_id = ff.attr_str("tip_id", NAME_RULE, NAME_PATTERN)

    # Shapes and units first (metadata only), so nothing oversized is ever read.
    freq_ds = _required(ff.dataset("freq_hz"))
    ff.units(freq_ds, "freq_hz", "Hz")
    if freq_ds.ndim != 1:
        ff.fail("dataset 'freq_hz'", "one-dimensional (n_freq,)", f"shape {freq_ds.shape}")
    n_freq = freq_ds.shape[0]
    if not limits.min_freq <= n_freq <= limits.max_freq:
        ff.fail(
            "dataset 'freq_hz'",
            f"{limits.min_freq} to {limits.max_freq} frequencies long "
            "(limits.min_freq, limits.max_freq)",
            f"{n_freq} frequencies",
        )
    x_ds = _required(ff.dataset("x_m"))
    ff.units(x_ds, "x_m", "m")
    if x_ds.ndim != 1:
        ff.fail("dataset 'x_m'", "one-dimensional (n_pixels,)", f"shape {x_ds.shape}")
    n_pixels = x_ds.shape[0]
    if not 1 <= n_pixels <= limits.max_pixels:
        ff.fail(
            "dataset 'x_m'",
            f"1 to {limits.max_pixels} pixels long (limits.max_pixels)",
            f"{n_pixels} pixels",
        )
    y_ds = _required(ff.dataset("y_m"))
    ff.units(y_ds, "y_m", "m")
    ff.shape(y_ds, "y_m", "scalar", ())
    counts_ds = _required(ff.dataset("counts"))
    ff.units(counts_ds, "counts", "counts")
    ff.shape(counts_ds, "counts", "(n_pixels, n_freq)", (n_pixels, n_freq))
    ref_ds = ff.dataset("reference_counts", required=False)
    if ref_ds is not None:
        ff.units(ref_ds, "reference_counts", "counts")
        ff.shape(ref_ds, "reference_counts", "(n_pixels, n_freq)", (n_pixels, n_freq))
    aux_sets = _aux_datasets(ff, n_pixels, limits)

    # Values.
    freq_hz = ff.values(freq_ds).astype(np.float64)
    ff.check_frequencies(freq_hz, "freq_hz")
    x_m = ff.values(x_ds).astype(np.float64)
    ff.check_finite(x_m, "x_m")
    y_m = float(ff.values(y_ds))
    if not np.isfinite(y_m):
        ff.fail("dataset 'y_m'", "finite", str(y_m))
    counts = ff.values(counts_ds)
    ff.check_counts(counts, "counts")
    reference_counts = None
    if ref_ds is not None:
        reference_counts = ff.values(ref_ds)
        ff.check_counts(reference_counts, "reference_counts")
    aux = {name: aux_ff.values(ds).astype(np.float64) for name, (aux_ff, ds, _) in aux_sets.items()}
    aux_units = {name: units for name, (_, _, units) in aux_sets.items()}

    return ScanLine(
        source=ff.path,
        scan_id=scan_id,
        line_index=line_index,
        n_lines_planned=n_lines,
        direction=direction,
        start_time=start_time,
        end_time=end_time,
        dwell_s=dwell_s,
        nv_theta_rad=theta,
        nv_phi_rad=phi,
        freq_hz=freq_hz,
        counts=counts,
        x_m=x_m,
        y_m=y_m,
        temperature_k=temperature_k,
        profile=profile,
        reference_counts=reference_counts,
        aux=aux,
        aux_units=aux_units,
        sha256=digest,
        tip_id=tip_id,
    )


def _aux_datasets(
    ff: FileFields, n_pixels: int, limits: LineLimits
) -> dict[str, tuple[FileFields, h5py.Dataset, str]]:
    """Check the optional ``aux`` group: (n_pixels,) numeric datasets with units."""
    link = ff.group.get("aux", getlink=True)
    if link is None:
        return {}
    if not isinstance(link, h5py.HardLink) or not isinstance(ff.group["aux"], h5py.Group):
        ff.fail("group 'aux'", "a group stored in this file", f"a {type(ff.group['aux']).__name__}")
    aux_ff = ff.subgroup("aux")
    names = sorted(aux_ff.group.keys())
    if len(names) > limits.max_aux:
        ff.fail(
            "group 'aux'",
            f"at most {limits.max_aux} channels (limits.max_aux)",
            f"{len(names)} channels",
        )
    found: dict[str, tuple[FileFields, h5py.Dataset, str]] = {}
    for name in names:
        if not NAME_PATTERN.fullmatch(name):
            aux_ff.fail(aux_ff.field(name), f"named with {NAME_RULE}", show(name))
        ds = _required(aux_ff.dataset(name))
        units = aux_ff.units(ds, name, None)
        aux_ff.shape(ds, name, "(n_pixels,)", (n_pixels,))
        found[name] = (aux_ff, ds, units)
    return found


def _required(ds: h5py.Dataset | None) -> h5py.Dataset:
    assert ds is not None  # FileFields.dataset raises for a missing required dataset
    return ds


def _iso(moment: datetime) -> str:
    """ISO 8601 UTC with microseconds and 'Z', as the writer stores times (the year is
    always four digits, unlike ``strftime('%Y')`` on some platforms)."""
    return moment.astimezone(UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


# -- writing ----------------------------------------------------------------------------


def line_file_bytes(line: ScanLine) -> bytes:
    """Encode a line as the bytes of a contract-version-1 HDF5 file (not validated).

    :func:`write_line_file` validates and writes these bytes atomically; this function
    is for callers that must place the bytes themselves.
    """
    return _encode(line, line.source)


def _encode(line: ScanLine, path: Path) -> bytes:
    arrays = {
        "freq_hz": _numeric(line.freq_hz, "freq_hz", path).astype(np.float64),
        "x_m": _numeric(line.x_m, "x_m", path).astype(np.float64),
        "counts": _numeric(line.counts, "counts", path),
    }
    if line.reference_counts is not None:
        arrays["reference_counts"] = _numeric(line.reference_counts, "reference_counts", path)
    units = {"freq_hz": "Hz", "x_m": "m", "counts": "counts", "reference_counts": "counts"}
    buffer = io.BytesIO()
    with h5py.File(buffer, "w") as h5:
        attrs = h5.attrs
        attrs["format"] = FORMAT_NAME
        attrs["format_version"] = np.int64(FORMAT_VERSION)
        attrs["scan_id"] = line.scan_id
        attrs["line_index"] = np.int64(line.line_index)
        attrs["n_lines_planned"] = np.int64(line.n_lines_planned)
        attrs["direction"] = line.direction
        attrs["start_time"] = _iso(_aware(line.start_time, "start_time", path))
        attrs["end_time"] = _iso(_aware(line.end_time, "end_time", path))
        attrs["dwell_s"] = np.float64(line.dwell_s)
        attrs["nv_theta_rad"] = np.float64(line.nv_theta_rad)
        attrs["nv_phi_rad"] = np.float64(line.nv_phi_rad)
        if line.temperature_k is not None:
            attrs["temperature_k"] = np.float64(line.temperature_k)
        if line.profile is not None:
            attrs["profile"] = line.profile
        if line.tip_id is not None:
            attrs["tip_id"] = line.tip_id
        for name, values in arrays.items():
            h5.create_dataset(name, data=values).attrs["units"] = units[name]
        h5.create_dataset("y_m", data=np.float64(line.y_m)).attrs["units"] = "m"
        if line.aux:
            group = h5.create_group("aux")
            for name, values in line.aux.items():
                ds = group.create_dataset(name, data=_numeric(values, f"aux/{name}", path))
                ds.attrs["units"] = line.aux_units.get(name, "")
    return buffer.getvalue()


def _numeric(values: object, name: str, path: Path) -> np.ndarray:
    array = np.asarray(values)
    if array.dtype.kind not in "iuf":
        raise LineFileError(
            path, f"dataset '{name}'", "of integer or floating-point dtype", f"dtype {array.dtype}"
        )
    return array


def _aware(moment: datetime, name: str, path: Path) -> datetime:
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise LineFileError(
            path, f"attribute '{name}'", "a timezone-aware datetime", f"the naive {moment}"
        )
    return moment


def write_line_file(line: ScanLine, path: str | os.PathLike[str] | None = None) -> Path:
    """Write a line atomically as a contract-version-1 file and return its path.

    The bytes are built in memory and checked against the contract (the writer never
    produces a file the reader refuses), then written to a temporary name in the target
    folder (``.<name>.<random>.tmp``), flushed and fsync'd, renamed over the final name
    with ``os.replace`` and the folder fsync'd. A reader therefore sees either no file or
    the complete file at the final name. On any failure the temporary file is removed.

    Parameters
    ----------
    line : ScanLine
        The line; ``sha256`` is ignored.
    path : str or PathLike, optional
        Target file; default ``line.source``. Its folder must exist.

    Raises
    ------
    LineFileError
        The line breaks the contract (message as for the reader, naming ``path``).
    OSError
        Writing or renaming failed.
    """
    target = Path(line.source if path is None else path)
    data = _encode(line, target)
    parse_line_bytes(data, target, limits=_NO_LIMITS)
    write_bytes_atomic(target, data)
    return target
