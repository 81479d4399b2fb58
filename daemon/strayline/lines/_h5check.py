"""Checked access to the parts of an open scan-line HDF5 file.

Every helper raises :class:`~strayline.errors.LineFileError` naming the file, the field
(``attribute 'line_index'``, ``dataset 'counts'``, ...), what the contract expects and what
the file holds. The contract itself is in ``docs/line-file.md``; the order in which the
fields are checked lives in :mod:`strayline.lines`.
"""

from __future__ import annotations

import math
import re
from datetime import UTC, datetime
from pathlib import Path
from typing import NoReturn, TypeGuard

import h5py
import numpy as np

from strayline.errors import LineFileError

__all__ = [
    "NAME_PATTERN",
    "NAME_RULE",
    "TIME_RULE",
    "FileFields",
    "describe_dtype",
    "is_int",
    "parse_utc_time",
    "show",
]

#: Identifiers (scan id, profile, aux channel): 1–128 of [A-Za-z0-9._-], not starting with '.'.
NAME_PATTERN = re.compile(r"[A-Za-z0-9_-][A-Za-z0-9._-]{0,127}")
NAME_RULE = "1–128 characters of A–Z a–z 0–9 . _ -, not starting with '.'"

# ISO 8601 extended format, UTC only; up to 9 fractional digits (truncated to microseconds).
_TIME_PATTERN = re.compile(
    r"(\d{4})-(\d{2})-(\d{2})T(\d{2}):(\d{2}):(\d{2})(?:\.(\d{1,9}))?(?:Z|\+00:00)"
)
TIME_RULE = "an ISO 8601 UTC time such as 2025-03-14T09:26:53.250Z (offset 'Z' or '+00:00')"

_MAX_SHOWN = 60  # characters of a found string quoted in a message


def show(value: object) -> str:
    """Describe a found value for a message: the value, and its type when that matters."""
    if isinstance(value, str):
        text = value if len(value) <= _MAX_SHOWN else value[:_MAX_SHOWN] + "…"
        return repr(text)
    if isinstance(value, np.ndarray):
        return f"an array of shape {value.shape} and dtype {value.dtype}"
    if isinstance(value, np.generic):
        return f"{value.item()!r} ({value.dtype})"
    if isinstance(value, bytes):
        return f"undecodable bytes {value[:_MAX_SHOWN]!r}"
    return f"{value!r} ({type(value).__name__})"


def describe_dtype(dtype: np.dtype) -> str:
    """Name a dataset's element type in plain words (string, compound, float64, ...)."""
    if h5py.check_string_dtype(dtype) is not None or dtype.kind in "SU":
        return "string dtype"
    if dtype.kind == "V":
        return "compound/opaque dtype"
    if dtype.kind == "O":
        return "object/reference dtype"
    if dtype.kind == "b":
        return "boolean dtype"
    if dtype.kind == "c":
        return f"complex dtype ({dtype})"
    return f"dtype {dtype}"


def parse_utc_time(text: str) -> datetime | None:
    """Parse an ISO 8601 UTC time string; None if it is not one.

    Accepted: ``YYYY-MM-DDTHH:MM:SS[.fraction](Z|+00:00)``, 1–9 fraction digits
    (beyond microseconds truncated). The result is timezone-aware UTC.
    """
    match = _TIME_PATTERN.fullmatch(text)
    if match is None:
        return None
    year, month, day, hour, minute, second = (int(g) for g in match.groups()[:6])
    fraction = match.group(7) or ""
    microsecond = int((fraction + "000000")[:6])
    try:
        return datetime(year, month, day, hour, minute, second, microsecond, tzinfo=UTC)
    except ValueError:  # month 13, Feb 30, second 60 ...
        return None


def _unwrap(value: object) -> object:
    """A one-element array attribute (as some acquisition tools write) becomes its scalar;
    fixed-length byte strings are decoded as UTF-8 when they can be."""
    if isinstance(value, np.ndarray) and value.size == 1 and value.ndim <= 1:
        value = value.reshape(())[()]
    if isinstance(value, bytes):  # includes np.bytes_
        try:
            return bytes(value).decode("utf-8")
        except UnicodeDecodeError:
            return bytes(value)
    if isinstance(value, np.str_):
        return str(value)
    return value


def is_int(value: object) -> TypeGuard[int | np.integer]:
    """True for Python and numpy integers, not booleans."""
    return isinstance(value, int | np.integer) and not isinstance(value, bool | np.bool_)


def _is_real(value: object) -> TypeGuard[int | float | np.integer | np.floating]:
    return is_int(value) or isinstance(value, float | np.floating)


class FileFields:
    """Checked, typed access to one open scan-line file (or its ``aux`` group).

    Parameters
    ----------
    path : Path
        The file's path, for messages only (the data may come from memory).
    group : h5py.Group
        The root group, or a subgroup.
    prefix : str
        Path prefix of ``group`` inside the file for messages, e.g. ``"aux/"``.
    """

    def __init__(
        self, path: Path, group: h5py.Group, prefix: str = "", *, max_read_bytes: int
    ) -> None:
        self.path = path
        self.group = group
        self.prefix = prefix
        self.max_read_bytes = max_read_bytes
        self._attrs = group.attrs  # h5py builds a new manager on every ``.attrs``

    def subgroup(self, name: str) -> FileFields:
        """The fields of the subgroup ``name`` (same file, same read limit)."""
        return FileFields(
            self.path, self.group[name], f"{self.prefix}{name}/", max_read_bytes=self.max_read_bytes
        )

    def fail(self, field: str, expected: str, found: str) -> NoReturn:
        raise LineFileError(self.path, field, expected, found)

    # -- attributes -------------------------------------------------------------------

    def attr(self, name: str, expected: str) -> object:
        """The raw (unwrapped) value of a required attribute."""
        try:
            value = self._attrs[name]
        except KeyError:
            self.fail(f"attribute '{name}'", f"present ({expected})", "no such attribute")
        return _unwrap(value)

    def has_attr(self, name: str) -> bool:
        return name in self._attrs

    def expect_format(self, name: str, version: int) -> None:
        """The attributes ``format`` (equal to ``name``) and ``format_version`` (the
        integer ``version``, the only one the reader knows)."""
        fmt = self.attr("format", repr(name))
        if fmt != name:
            self.fail("attribute 'format'", repr(name), show(fmt))
        found = self.attr("format_version", f"the integer {version}")
        if not (is_int(found) and int(found) == version):
            self.fail(
                "attribute 'format_version'",
                f"{version} (the only version this reader knows)",
                show(found),
            )

    def lines_planned(self, most: int) -> int:
        """The attribute ``n_lines_planned``: an integer from 1 to ``most``."""
        n_lines = self.attr_int("n_lines_planned", "an integer >= 1", 1)
        if n_lines > most:
            self.fail(
                "attribute 'n_lines_planned'",
                f"at most {most} (limits.max_lines_planned)",
                str(n_lines),
            )
        return n_lines

    def attr_str(self, name: str, expected: str, pattern: re.Pattern[str] | None = None) -> str:
        """A string attribute, optionally matching ``pattern`` in full."""
        value = self.attr(name, expected)
        if not isinstance(value, str) or (pattern is not None and not pattern.fullmatch(value)):
            self.fail(f"attribute '{name}'", expected, show(value))
        return value

    def attr_int(self, name: str, expected: str, minimum: int) -> int:
        """An integer attribute ``>= minimum`` (floats such as 3.0 are refused)."""
        value = self.attr(name, expected)
        if not is_int(value) or int(value) < minimum:
            self.fail(f"attribute '{name}'", expected, show(value))
        return int(value)

    def attr_float(
        self,
        name: str,
        expected: str,
        *,
        low: float = -math.inf,
        high: float = math.inf,
        low_open: bool = False,
    ) -> float:
        """A finite real attribute within [low, high] (or (low, high] if ``low_open``)."""
        value = self.attr(name, expected)
        if not _is_real(value):
            self.fail(f"attribute '{name}'", expected, show(value))
        number = float(value)
        above_low = number > low if low_open else number >= low
        if not (math.isfinite(number) and above_low and number <= high):
            self.fail(f"attribute '{name}'", expected, show(value))
        return number

    def attr_time(self, name: str) -> datetime:
        """An ISO 8601 UTC time attribute, as a timezone-aware datetime."""
        text = self.attr_str(name, TIME_RULE)
        parsed = parse_utc_time(text)
        if parsed is None:
            self.fail(f"attribute '{name}'", TIME_RULE, show(text))
        return parsed

    # -- datasets ---------------------------------------------------------------------

    def field(self, name: str) -> str:
        return f"dataset '{self.prefix}{name}'"

    def dataset(
        self, name: str, *, required: bool = True, whole_read: bool = True
    ) -> h5py.Dataset | None:
        """A numeric dataset stored in this file (no links, no external or virtual data).

        Only metadata is touched; the values are read later by :meth:`values`.
        ``whole_read``: the dataset will be read whole, so its chunks are bounded by the
        read limit (a caller reading it a row at a time bounds the rows itself).
        """
        field = self.field(name)
        link = self.group.get(name, getlink=True)
        if link is None:
            if not required:
                return None
            held = ", ".join(sorted(self.group.keys())) or "nothing"
            self.fail(field, "present", f"no such dataset (the group holds: {held})")
        if not isinstance(link, h5py.HardLink):
            self.fail(field, "a dataset stored in this file", f"a {type(link).__name__}")
        obj = self.group[name]
        if not isinstance(obj, h5py.Dataset):
            self.fail(field, "a dataset", f"a {type(obj).__name__}")
        if obj.is_virtual or obj.external:
            self.fail(field, "stored inside this file", "a virtual or external dataset")
        if obj.dtype.kind not in "iuf":
            self.fail(field, "of integer or floating-point dtype", describe_dtype(obj.dtype))
        if whole_read:
            self._check_read_size(obj, field)
        return obj

    def _check_read_size(self, dataset: h5py.Dataset, field: str) -> None:
        """Refuse a dataset whose chunks would decompress to more than the read limit.

        HDF5 decompresses whole chunks, and a chunk may be declared far larger than the
        dataset (with an unlimited ``maxshape``): a file of a few MB can hold one gzip chunk
        of GiB. Reading the dataset decompresses every chunk it touches, so that product is
        bounded here from metadata alone, before anything is read.
        """
        if dataset.chunks is None:  # contiguous: its size is its shape, checked elsewhere
            return
        n_chunks = math.prod(
            -(-size // chunk) for size, chunk in zip(dataset.shape, dataset.chunks, strict=True)
        )
        read_bytes = n_chunks * math.prod(dataset.chunks) * dataset.dtype.itemsize
        if read_bytes > self.max_read_bytes:
            self.fail(
                field,
                f"chunked to decompress at most {self.max_read_bytes} bytes when read "
                "(limits.max_pixels x limits.max_freq float64 values)",
                f"chunks of shape {dataset.chunks} for shape {dataset.shape}: "
                f"{read_bytes} bytes to decompress",
            )

    def units(self, dataset: h5py.Dataset, name: str, expected: str | None) -> str:
        """The dataset's ``units`` string attribute; must equal ``expected`` if given."""
        field = f"attribute 'units' of {self.field(name)}"
        wanted = "a non-empty string" if expected is None else repr(expected)
        if "units" not in dataset.attrs:
            self.fail(field, wanted, "no such attribute")
        value = _unwrap(dataset.attrs["units"])
        if not isinstance(value, str) or (value != expected if expected else not value):
            self.fail(field, wanted, show(value))
        return value

    def shape(self, dataset: h5py.Dataset, name: str, labels: str, shape: tuple[int, ...]) -> None:
        """Require ``dataset.shape == shape``; ``labels`` names the axes, e.g. '(n_pixels,)'."""
        if dataset.shape != shape:
            self.fail(self.field(name), f"of shape {labels} = {shape}", str(dataset.shape))

    def values(self, dataset: h5py.Dataset) -> np.ndarray:
        """Read the values in native byte order; float widths other than 32/64 bits become
        float64."""
        data = np.asarray(dataset[()])
        if data.dtype.kind == "f" and data.dtype.itemsize not in (4, 8):
            return data.astype(np.float64)
        return data.astype(data.dtype.newbyteorder("="), copy=False)

    def check_counts(self, data: np.ndarray, name: str) -> None:
        """Counts: finite and >= 0; the message points at the first bad sample."""
        if data.dtype.kind == "f":
            bad = ~np.isfinite(data)
            if bad.any():
                pixel, freq = np.argwhere(bad)[0]
                self.fail(
                    self.field(name),
                    "finite",
                    f"{data[pixel, freq]} at (pixel {pixel}, frequency {freq})",
                )
        if data.dtype.kind != "u":
            bad = data < 0
            if bad.any():
                pixel, freq = np.argwhere(bad)[0]
                self.fail(
                    self.field(name),
                    ">= 0",
                    f"{data[pixel, freq]} at (pixel {pixel}, frequency {freq})",
                )

    def check_finite(self, data: np.ndarray, name: str) -> None:
        """Every value finite; the message gives the first bad index."""
        if data.dtype.kind == "f":
            bad = ~np.isfinite(data)
            if bad.any():
                index = tuple(int(i) for i in np.argwhere(bad)[0])
                where = f" at index {index[0]}" if len(index) == 1 else ""
                self.fail(self.field(name), "finite", f"{data[index]}{where}")

    def check_frequencies(self, freq_hz: np.ndarray, name: str) -> None:
        """Frequencies: finite, > 0 and strictly increasing."""
        self.check_finite(freq_hz, name)
        if (freq_hz <= 0).any():
            i = int(np.argmax(freq_hz <= 0))
            self.fail(self.field(name), "> 0 Hz", f"{float(freq_hz[i])!r} Hz at index {i}")
        steps = np.diff(freq_hz)
        if (steps <= 0).any():
            i = int(np.argmax(steps <= 0))
            a, b = float(freq_hz[i]), float(freq_hz[i + 1])
            if a == b:
                found = f"the duplicate {a!r} Hz at indices {i} and {i + 1}"
            else:
                found = f"{a!r} Hz at index {i} followed by {b!r} Hz at index {i + 1}"
            self.fail(self.field(name), "strictly increasing", found)
