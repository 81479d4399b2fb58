"""One check of a line record against the contract, for readers of any layout.

The contract-version-1 reader checks an HDF5 file field by field as it reads it
(:mod:`strayline.lines.scan_line`). Readers of other layouts (a growing scan file, plain
arrays with a sidecar, a plug-in's own format) build a :class:`ScanLine` from what they read
and pass it here: :func:`check_line` applies the same rules (docs/line-file.md) and raises the
same :class:`~strayline.errors.LineFileError`, naming each field the way the layout names it
(``names``: ``{"dwell_s": "key 'dwell_s'", "counts": "array 'counts'"}``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import replace
from datetime import datetime
from pathlib import Path
from typing import NoReturn, cast

import numpy as np

from strayline.errors import LineFileError
from strayline.lines._h5check import NAME_PATTERN, NAME_RULE, describe_dtype, is_int, show
from strayline.lines.scan_line import DIRECTIONS, Direction, LineLimits, ScanLine

__all__ = ["check_line"]

_LIMITS = LineLimits()  # the default limits


class _Checker:
    """The field checks of one line, failing with the layout's names for the fields."""

    def __init__(self, path: Path, names: Mapping[str, str]) -> None:
        self.path = path
        self.names = names

    def name(self, field: str) -> str:
        return self.names.get(field, f"field '{field}'")

    def fail(self, field: str, expected: str, found: str) -> NoReturn:
        raise LineFileError(self.path, self.name(field), expected, found)

    def text(self, field: str, value: object, *, optional: bool = False) -> str | None:
        if value is None and optional:
            return None
        if not isinstance(value, str) or not NAME_PATTERN.fullmatch(value):
            self.fail(field, NAME_RULE, show(value))
        return value

    def integer(self, field: str, value: object, minimum: int, expected: str) -> int:
        if not is_int(value) or int(value) < minimum:
            self.fail(field, expected, show(value))
        return int(value)

    def real(
        self,
        field: str,
        value: object,
        expected: str,
        *,
        low: float = -math.inf,
        high: float = math.inf,
        low_open: bool = False,
    ) -> float:
        if not (is_int(value) or isinstance(value, float | np.floating)):
            self.fail(field, expected, show(value))
        number = float(value)
        above = number > low if low_open else number >= low
        if not (math.isfinite(number) and above and number <= high):
            self.fail(field, expected, show(value))
        return number

    def time(self, field: str, value: object) -> datetime:
        if not isinstance(value, datetime) or value.utcoffset() is None:
            self.fail(field, "a timezone-aware UTC time", show(value))
        return value

    def array(self, field: str, value: object, ndim: int, labels: str) -> np.ndarray:
        data = np.asarray(value)
        if data.dtype.kind not in "iuf":
            self.fail(field, "of integer or floating-point dtype", describe_dtype(data.dtype))
        if data.ndim != ndim:
            self.fail(field, f"{ndim}-dimensional {labels}", f"shape {data.shape}")
        if data.dtype.kind == "f" and data.dtype.itemsize not in (4, 8):
            return data.astype(np.float64)
        return data.astype(data.dtype.newbyteorder("="), copy=False)

    def finite(self, field: str, data: np.ndarray) -> None:
        if data.dtype.kind == "f":
            bad = ~np.isfinite(data)
            if bad.any():
                index = tuple(int(i) for i in np.argwhere(bad)[0])
                where = f" at index {index[0]}" if len(index) == 1 else f" at {index}"
                self.fail(field, "finite", f"{data[index]}{where}")

    def counts(self, field: str, data: np.ndarray) -> None:
        bad = ~np.isfinite(data) if data.dtype.kind == "f" else np.zeros(data.shape, bool)
        if bad.any():
            pixel, freq = np.argwhere(bad)[0]
            self.fail(field, "finite", f"{data[pixel, freq]} at (pixel {pixel}, frequency {freq})")
        if data.dtype.kind != "u":
            negative = data < 0
            if negative.any():
                pixel, freq = np.argwhere(negative)[0]
                self.fail(
                    field, ">= 0", f"{data[pixel, freq]} at (pixel {pixel}, frequency {freq})"
                )


def check_line(
    line: ScanLine, *, limits: LineLimits = _LIMITS, names: Mapping[str, str] | None = None
) -> ScanLine:
    """Check a line built by a reader against the contract; return it normalised.

    Every rule of docs/line-file.md that is not about HDF5 itself applies: identifiers,
    index within the plan, direction, aware times in order, dwell, NV angles, temperature,
    frequencies (count within limits, finite, > 0, strictly increasing), pixel positions,
    counts (shape, finite, >= 0) and the optional reference counts and aux channels.

    Parameters
    ----------
    line : ScanLine
        What the reader found, unchecked (any field may hold a wrong type).
    limits : LineLimits
        Sizes the line may have.
    names : mapping of str to str, optional
        How the layout names each field of the record in messages, e.g.
        ``{"counts": "dataset 'counts' (row 4)"}``; default ``field '<name>'``.

    Returns
    -------
    ScanLine
        The same line, numbers as Python floats and ints, arrays in native byte order
        (``freq_hz``, ``x_m`` and aux channels as float64).

    Raises
    ------
    LineFileError
        At the first rule broken, naming ``line.source``, the field, the rule and the value.
    """
    c = _Checker(Path(line.source), names or {})
    scan_id = cast(str, c.text("scan_id", line.scan_id))
    n_lines = c.integer("n_lines_planned", line.n_lines_planned, 1, "an integer >= 1")
    if n_lines > limits.max_lines_planned:
        c.fail(
            "n_lines_planned",
            f"at most {limits.max_lines_planned} (limits.max_lines_planned)",
            str(n_lines),
        )
    index = c.integer("line_index", line.line_index, 0, "an integer >= 0")
    if index >= n_lines:
        c.fail("line_index", f"less than n_lines_planned = {n_lines}", str(index))
    if line.direction not in DIRECTIONS:
        c.fail("direction", "'forward' or 'backward'", show(line.direction))
    start = c.time("start_time", line.start_time)
    end = c.time("end_time", line.end_time)
    if end < start:
        c.fail("end_time", f"at or after start_time = {start.isoformat()}", end.isoformat())
    dwell_s = c.real(
        "dwell_s", line.dwell_s, "a finite number of seconds > 0", low=0.0, low_open=True
    )
    theta = c.real(
        "nv_theta_rad", line.nv_theta_rad, "a finite angle in [0, π] rad", low=0.0, high=np.pi
    )
    phi = c.real("nv_phi_rad", line.nv_phi_rad, "a finite angle in rad")
    temperature_k = None
    if line.temperature_k is not None:
        temperature_k = c.real(
            "temperature_k",
            line.temperature_k,
            "a finite temperature > 0 K",
            low=0.0,
            low_open=True,
        )
    profile = c.text("profile", line.profile, optional=True)

    freq_hz = c.array("freq_hz", line.freq_hz, 1, "(n_freq,)").astype(np.float64)
    n_freq = freq_hz.shape[0]
    if not limits.min_freq <= n_freq <= limits.max_freq:
        c.fail(
            "freq_hz",
            f"{limits.min_freq} to {limits.max_freq} frequencies long "
            "(limits.min_freq, limits.max_freq)",
            f"{n_freq} frequencies",
        )
    c.finite("freq_hz", freq_hz)
    if (freq_hz <= 0).any():
        i = int(np.argmax(freq_hz <= 0))
        c.fail("freq_hz", "> 0 Hz", f"{float(freq_hz[i])!r} Hz at index {i}")
    steps = np.diff(freq_hz)
    if (steps <= 0).any():
        i = int(np.argmax(steps <= 0))
        c.fail(
            "freq_hz",
            "strictly increasing",
            f"{float(freq_hz[i])!r} Hz at index {i} followed by {float(freq_hz[i + 1])!r} Hz",
        )
    x_m = c.array("x_m", line.x_m, 1, "(n_pixels,)").astype(np.float64)
    n_pixels = x_m.shape[0]
    if not 1 <= n_pixels <= limits.max_pixels:
        c.fail(
            "x_m", f"1 to {limits.max_pixels} pixels long (limits.max_pixels)", f"{n_pixels} pixels"
        )
    c.finite("x_m", x_m)
    y_m = c.real("y_m", line.y_m, "a finite position in m")
    counts = _counts(c, "counts", line.counts, (n_pixels, n_freq))
    reference = None
    if line.reference_counts is not None:
        reference = _counts(c, "reference_counts", line.reference_counts, (n_pixels, n_freq))
    if len(line.aux) > limits.max_aux:
        c.fail("aux", f"at most {limits.max_aux} channels (limits.max_aux)", f"{len(line.aux)}")
    aux: dict[str, np.ndarray] = {}
    for key, values in line.aux.items():
        c.text("aux", key)
        channel = c.array(f"aux/{key}", values, 1, "(n_pixels,)").astype(np.float64)
        if channel.shape != (n_pixels,):
            c.fail(f"aux/{key}", f"of shape (n_pixels,) = ({n_pixels},)", str(channel.shape))
        aux[key] = channel
    return replace(
        line,
        scan_id=scan_id,
        line_index=index,
        n_lines_planned=n_lines,
        direction=cast(Direction, line.direction),
        start_time=start,
        end_time=end,
        dwell_s=dwell_s,
        nv_theta_rad=theta,
        nv_phi_rad=phi,
        temperature_k=temperature_k,
        profile=profile,
        freq_hz=freq_hz,
        x_m=x_m,
        y_m=y_m,
        counts=counts,
        reference_counts=reference,
        aux=aux,
    )


def _counts(c: _Checker, field: str, value: object, shape: tuple[int, int]) -> np.ndarray:
    data = c.array(field, value, 2, "(n_pixels, n_freq)")
    if data.shape != shape:
        c.fail(field, f"of shape (n_pixels, n_freq) = {shape}", str(data.shape))
    c.counts(field, data)
    return data
