"""Plain arrays: a folder of per-line NumPy files and one sidecar with the scan's metadata.

The simplest layout a lab can write from any language (docs/layouts.md):

- ``scan.json`` (or ``scan.yaml``/``scan.yml``), one per scan folder: the scan's identity,
  plan, dwell, NV angles, sweep and pixel positions (:func:`parse_sidecar`);
- ``line_<index>_<fwd|bwd>.npz`` per line: ``counts`` (n_pixels, n_freq) in acquisition
  order, optionally ``reference_counts``, ``start_time`` and ``end_time`` (ISO 8601 UTC
  strings); or ``line_<index>_<fwd|bwd>.npy`` holding ``counts`` alone, its times then
  taken from the file's modification time.

A line is identified by (scan, line, direction) and the SHA-256 of its array file's bytes
followed by the sidecar's, so a changed sidecar makes every line a new version.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import re
import zipfile
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any, NoReturn, cast

import numpy as np
import yaml

from strayline._atomic import write_bytes_atomic, write_text_atomic
from strayline.errors import LineFileError
from strayline.lines._h5check import TIME_RULE, is_int, parse_utc_time, show
from strayline.lines.line_check import check_line
from strayline.lines.readers import HandedOver, nothing_handed_over
from strayline.lines.scan_line import Direction, LineLimits, ScanLine

__all__ = [
    "PLAIN_ARRAYS_READER",
    "PLAIN_FORMAT",
    "PLAIN_FORMAT_VERSION",
    "SIDECAR_NAMES",
    "PlainArraysReader",
    "PlainScan",
    "find_sidecar",
    "parse_sidecar",
    "plain_line_name",
    "sidecar_for",
    "write_plain_line",
]

_LIMITS = LineLimits()  # the default limits

PLAIN_FORMAT = "strayline-plain-arrays"
PLAIN_FORMAT_VERSION = 1

#: The sidecar's possible names, in the order they are looked for.
SIDECAR_NAMES = ("scan.json", "scan.yaml", "scan.yml")

_LINE_NAME = re.compile(r"line_(?P<index>\d{1,9})(?:_(?P<tag>fwd|bwd))?\.(?P<kind>npy|npz)")
_NAME_RULE = "line_<index>_fwd.npz or line_<index>_bwd.npz (or .npy)"
_SCALARS = ("scan_id", "n_lines_planned", "dwell_s", "nv_theta_rad", "nv_phi_rad")
_OPTIONAL = ("temperature_k", "profile")
_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)


def plain_line_name(line_index: int, direction: str, *, kind: str = "npz") -> str:
    """The file name of a line: ``line_00042_fwd.npz`` (``kind`` ``"npy"`` for ``.npy``)."""
    tag = {"forward": "fwd", "backward": "bwd"}[direction]
    return f"line_{int(line_index):05d}_{tag}.{kind}"


@dataclass(frozen=True, eq=False)
class PlainScan:
    """A parsed sidecar: what every line of the scan shares.

    ``values`` holds the scalars as found (checked per line by
    :func:`~strayline.lines.check_line`); ``y_m`` has one position per planned line.
    """

    path: Path
    values: Mapping[str, object]
    freq_hz: np.ndarray
    x_m: np.ndarray
    y_m: np.ndarray
    raw: bytes


def _fail(path: Path, key: str, expected: str, found: str) -> NoReturn:
    raise LineFileError(path, f"key '{key}'", expected, found)


def _number(path: Path, data: Mapping[str, Any], key: str) -> float:
    value = data.get(key)
    if not (is_int(value) or isinstance(value, float)):
        _fail(path, key, "a number", "no such key" if key not in data else show(value))
    return float(value)


def _numbers(path: Path, data: Mapping[str, Any], key: str) -> np.ndarray:
    value = data[key]
    if not isinstance(value, list) or not all(is_int(v) or isinstance(v, float) for v in value):
        _fail(path, key, "a list of numbers", show(value))
    return np.asarray(value, dtype=np.float64)


def _choice(path: Path, data: Mapping[str, Any], key: str, others: tuple[str, ...]) -> bool:
    """Whether the list ``key`` is given (else all of ``others`` must be)."""
    if key in data:
        return True
    missing = [k for k in others if k not in data]
    if missing:
        wanted = f"present, or else {', '.join(others)}"
        _fail(path, key, wanted, f"neither (missing {', '.join(missing)})")
    return False


def parse_sidecar(data: bytes, path: Path) -> PlainScan:
    """Parse a sidecar's bytes (JSON, or YAML for ``.yaml``/``.yml``).

    Raises
    ------
    LineFileError
        Naming the sidecar and the key: not a mapping, wrong format or version, a required
        key missing, a list that is no list of numbers.
    """
    path = Path(path)
    try:
        if path.suffix in (".yaml", ".yml"):
            parsed = yaml.safe_load(data.decode("utf-8"))
        else:
            parsed = json.loads(data.decode("utf-8"))
    except (ValueError, yaml.YAMLError) as exc:
        kind = "YAML" if path.suffix in (".yaml", ".yml") else "JSON"
        raise LineFileError(path, "file", f"{kind} text", f"{type(exc).__name__}: {exc}") from exc
    if not isinstance(parsed, dict):
        raise LineFileError(path, "file", "a mapping of keys to values", show(parsed))
    if parsed.get("format") != PLAIN_FORMAT:
        _fail(path, "format", repr(PLAIN_FORMAT), show(parsed.get("format", "no such key")))
    version = parsed.get("format_version")
    if not (is_int(version) and version == PLAIN_FORMAT_VERSION):
        _fail(path, "format_version", f"{PLAIN_FORMAT_VERSION}", show(version))
    for key in _SCALARS:
        if key not in parsed:
            _fail(path, key, "present", "no such key")
    values = {key: parsed[key] for key in (*_SCALARS, *_OPTIONAL) if key in parsed}
    if _choice(path, parsed, "freq_hz", ("freq_start_hz", "freq_stop_hz", "n_freq")):
        freq_hz = _numbers(path, parsed, "freq_hz")
    else:
        n_freq = parsed["n_freq"]
        if not is_int(n_freq) or not 2 <= n_freq <= 1 << 20:
            _fail(path, "n_freq", "an integer from 2", show(n_freq))
        start, stop = _number(path, parsed, "freq_start_hz"), _number(path, parsed, "freq_stop_hz")
        freq_hz = np.linspace(start, stop, int(n_freq))
    if _choice(path, parsed, "x_m", ("x0_m", "pixel_pitch_m", "n_pixels")):
        x_m = _numbers(path, parsed, "x_m")
    else:
        n_pixels = parsed["n_pixels"]
        if not is_int(n_pixels) or not 1 <= n_pixels <= 1 << 20:
            _fail(path, "n_pixels", "an integer from 1", show(n_pixels))
        x0, pitch = _number(path, parsed, "x0_m"), _number(path, parsed, "pixel_pitch_m")
        x_m = x0 + pitch * np.arange(int(n_pixels), dtype=np.float64)
    n_lines = parsed["n_lines_planned"]
    if not is_int(n_lines) or not 1 <= n_lines <= 1 << 20:
        _fail(path, "n_lines_planned", "an integer from 1", show(n_lines))
    if _choice(path, parsed, "y_m", ("y0_m", "line_pitch_m")):
        y_m = _numbers(path, parsed, "y_m")
        if y_m.shape != (n_lines,):
            _fail(path, "y_m", f"{n_lines} positions (one per planned line)", f"{y_m.size}")
    else:
        y0, pitch = _number(path, parsed, "y0_m"), _number(path, parsed, "line_pitch_m")
        y_m = y0 + pitch * np.arange(int(n_lines), dtype=np.float64)
    return PlainScan(path, values, freq_hz, x_m, y_m, bytes(data))


def find_sidecar(folder: Path) -> Path | None:
    """The sidecar of a scan folder, or None."""
    for name in SIDECAR_NAMES:
        candidate = folder / name
        if candidate.is_file():
            return candidate
    return None


def _line_key(path: Path) -> tuple[int, Direction, str]:
    match = _LINE_NAME.fullmatch(path.name)
    if match is None:
        raise LineFileError(path, "file name", _NAME_RULE, repr(path.name))
    direction: Direction = "backward" if match.group("tag") == "bwd" else "forward"
    return int(match.group("index")), direction, match.group("kind")


def _read_limited(path: Path, limits: LineLimits) -> bytes:
    size = os.stat(path).st_size
    if size > limits.max_file_bytes:
        raise LineFileError(
            path,
            "file",
            f"at most {limits.max_file_bytes} bytes (limits.max_file_bytes)",
            f"{size} bytes",
        )
    with open(path, "rb") as handle:
        return handle.read(limits.max_file_bytes + 1)


def _arrays(path: Path, data: bytes, kind: str, limits: LineLimits) -> dict[str, np.ndarray]:
    """The arrays of a line file; compressed members are sized before they are inflated."""
    try:
        if kind == "npy":
            return {"counts": np.load(io.BytesIO(data), allow_pickle=False)}
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            for info in archive.infolist():
                if info.file_size > limits.max_read_bytes:
                    raise LineFileError(
                        path,
                        f"array '{info.filename.removesuffix('.npy')}'",
                        f"at most {limits.max_read_bytes} bytes when inflated",
                        f"{info.file_size} bytes",
                    )
        with np.load(io.BytesIO(data), allow_pickle=False) as npz:
            return {name: npz[name] for name in npz.files}
    except LineFileError:
        raise
    except (OSError, ValueError, EOFError, zipfile.BadZipFile, KeyError) as exc:
        what = "a NumPy .npy file" if kind == "npy" else "a NumPy .npz archive"
        raise LineFileError(
            path, "file", what, f"an unreadable one ({type(exc).__name__}: {exc})"
        ) from exc


def _time(path: Path, arrays: Mapping[str, np.ndarray], name: str) -> datetime | None:
    if name not in arrays:
        return None
    value = arrays[name]
    text = value.item() if value.ndim == 0 and value.dtype.kind == "U" else None
    parsed = parse_utc_time(text) if isinstance(text, str) else None
    if parsed is None:
        raise LineFileError(
            path, f"array '{name}'", TIME_RULE, show(value.item() if value.size == 1 else value)
        )
    return parsed


def read_plain_line(path: Path, *, limits: LineLimits = _LIMITS) -> ScanLine:
    """Read and check one per-line array file with its folder's sidecar.

    Raises
    ------
    LineFileError
        The name, the sidecar or the arrays break the layout's rules.
    OSError
        The file cannot be read (FileNotFoundError: it is gone).
    """
    path = Path(path)
    index, direction, kind = _line_key(path)
    sidecar = find_sidecar(path.parent)
    if sidecar is None:
        raise LineFileError(
            path.parent / SIDECAR_NAMES[0], "file", "a sidecar beside the line files", "none"
        )
    scan = parse_sidecar(sidecar.read_bytes(), sidecar)
    data = _read_limited(path, limits)
    arrays = _arrays(path, data, kind, limits)
    if "counts" not in arrays:
        raise LineFileError(
            path, "array 'counts'", "present", f"only {', '.join(sorted(arrays)) or 'nothing'}"
        )
    n_cells = int(np.asarray(arrays["counts"]).size)
    end = _time(path, arrays, "end_time")
    if end is None:
        end = _EPOCH + timedelta(microseconds=os.stat(path).st_mtime_ns // 1000)
    start = _time(path, arrays, "start_time")
    if start is None:
        dwell = scan.values["dwell_s"]
        line_s = n_cells * float(dwell) if isinstance(dwell, int | float) else 0.0
        start = end - timedelta(seconds=max(line_s, 0.0)) if np.isfinite(line_s) else end
    x_m = scan.x_m[::-1].copy() if direction == "backward" else scan.x_m
    values = scan.values
    line = ScanLine(
        source=path,
        scan_id=cast(str, values["scan_id"]),
        line_index=index,
        n_lines_planned=cast(int, values["n_lines_planned"]),
        direction=direction,
        start_time=start,
        end_time=end,
        dwell_s=cast(float, values["dwell_s"]),
        nv_theta_rad=cast(float, values["nv_theta_rad"]),
        nv_phi_rad=cast(float, values["nv_phi_rad"]),
        freq_hz=scan.freq_hz,
        counts=arrays["counts"],
        x_m=x_m,
        y_m=float(scan.y_m[index]) if index < scan.y_m.size else float("nan"),
        temperature_k=cast("float | None", values.get("temperature_k")),
        profile=cast("str | None", values.get("profile")),
        reference_counts=arrays.get("reference_counts"),
        sha256=hashlib.sha256(data + scan.raw).hexdigest(),
    )
    side = sidecar.name
    names = {
        key: f"key '{key}' of {side}" for key in (*_SCALARS, *_OPTIONAL, "freq_hz", "x_m", "y_m")
    }
    names |= {"counts": "array 'counts'", "reference_counts": "array 'reference_counts'"}
    names |= {"line_index": f"line index in the file name (key 'n_lines_planned' of {side})"}
    return check_line(line, limits=limits, names=names)


def _npy_complete(path: Path) -> str | None:
    """None when a .npy file holds its whole array, else what is wrong."""
    try:
        with open(path, "rb") as handle:
            version = np.lib.format.read_magic(handle)
            if version == (1, 0):
                shape, _, dtype = np.lib.format.read_array_header_1_0(handle)
            else:
                shape, _, dtype = np.lib.format.read_array_header_2_0(handle)
            header_end = handle.tell()
    except (OSError, ValueError) as exc:
        return f"{path.name}: not a NumPy .npy file ({exc})"
    expected = header_end + int(np.prod(shape)) * dtype.itemsize
    size = os.stat(path).st_size
    if size < expected:
        return f"{path.name}: {size} of {expected} bytes written"
    return None


def _npz_complete(path: Path) -> str | None:
    """None when a .npz archive is complete (its directory, at the end, reads) and holds
    ``counts``, else what is wrong."""
    try:
        with zipfile.ZipFile(path) as archive:
            if "counts.npy" not in archive.namelist():
                return f"{path.name}: holds no array 'counts'"
    except (OSError, zipfile.BadZipFile) as exc:
        return f"{path.name}: not a complete .npz archive ({exc})"
    return None


@dataclass(frozen=True)
class PlainArraysReader:
    """Per-line ``.npy``/``.npz`` files and one sidecar per scan folder (docs/layouts.md)."""

    name: str = "plain-arrays"
    patterns: tuple[str, ...] = ("*.npz", "*.npy")
    growing: bool = False
    summary: str = "per-line NumPy .npz/.npy files and a scan.json or scan.yaml sidecar"

    def check(self, path: Path) -> str | None:
        sidecar = find_sidecar(path.parent)
        if sidecar is None:
            return f"{path.name}: no sidecar ({' or '.join(SIDECAR_NAMES)}) beside it yet"
        try:
            parse_sidecar(sidecar.read_bytes(), sidecar)
        except LineFileError as error:
            return str(error)
        except OSError as exc:
            return f"{sidecar.name}: cannot be read ({exc})"
        return _npy_complete(path) if path.suffix == ".npy" else _npz_complete(path)

    def read(
        self,
        path: Path,
        *,
        limits: LineLimits = _LIMITS,
        handed_over: HandedOver = nothing_handed_over,
    ) -> Iterator[ScanLine]:
        yield read_plain_line(path, limits=limits)


#: The reader registered as ``plain-arrays``.
PLAIN_ARRAYS_READER = PlainArraysReader()


# -- writing ----------------------------------------------------------------------------


def _iso(moment: datetime) -> str:
    return moment.astimezone(UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def sidecar_for(line: ScanLine) -> dict[str, Any]:
    """The sidecar of the scan ``line`` belongs to, but for the slow-axis positions (which
    one line does not know): every value given exactly, the sweep and the pixel positions
    as lists of floats (JSON keeps them to the bit), the pixels in increasing-index order
    of a forward line."""
    forward_x = np.asarray(line.x_m, dtype=np.float64)
    if line.direction == "backward":
        forward_x = forward_x[::-1]
    data: dict[str, Any] = {
        "format": PLAIN_FORMAT,
        "format_version": PLAIN_FORMAT_VERSION,
        "scan_id": line.scan_id,
        "n_lines_planned": line.n_lines_planned,
        "dwell_s": line.dwell_s,
        "nv_theta_rad": line.nv_theta_rad,
        "nv_phi_rad": line.nv_phi_rad,
        "freq_hz": [float(f) for f in line.freq_hz],
        "x_m": [float(x) for x in forward_x],
    }
    if line.temperature_k is not None:
        data["temperature_k"] = line.temperature_k
    if line.profile is not None:
        data["profile"] = line.profile
    return data


def write_plain_line(line: ScanLine, folder: Path, *, y_m: list[float], kind: str = "npz") -> Path:
    """Write a line as a plain-array file in ``folder`` (atomically), and the sidecar first
    if the folder has none; ``y_m`` gives every planned line's slow-axis position."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if find_sidecar(folder) is None:
        text = json.dumps({**sidecar_for(line), "y_m": [float(y) for y in y_m]}, indent=1)
        write_text_atomic(folder / SIDECAR_NAMES[0], text + "\n")
    target = folder / plain_line_name(line.line_index, line.direction, kind=kind)
    buffer = io.BytesIO()
    if kind == "npy":
        np.save(buffer, np.asarray(line.counts), allow_pickle=False)
    else:
        arrays = {
            "counts": np.asarray(line.counts),
            "start_time": np.array(_iso(line.start_time)),
            "end_time": np.array(_iso(line.end_time)),
        }
        if line.reference_counts is not None:
            arrays["reference_counts"] = np.asarray(line.reference_counts)
        np.savez(buffer, **arrays)  # type: ignore[arg-type]
    write_bytes_atomic(target, buffer.getvalue())
    return target
