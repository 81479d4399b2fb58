"""Ground truth of a demo scan: what the synthetic instrument really measured.

Two files per scan, written OUTSIDE the watched folder:

- ``<scan_id>.truth.npz`` — per-pixel maps, each of shape (n_directions, n_lines,
  n_pixels) in column order (increasing x), SI units in the names (see
  :data:`MAP_NAMES`), plus ``field_xyz_t`` (n_directions, n_lines, n_pixels, 3), the axes
  ``x_m`` (n_pixels,), ``y_m`` (n_lines,) and ``freq_hz`` (n_freq,);
- ``<scan_id>.truth.json`` — every parameter used, the fault schedule, the files written
  (and how: atomic, in place, corrupt), the pauses, and whether the scan completed.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from demo_stream.faults import Fault, fault_from_dict, fault_to_dict

__all__ = [
    "MAP_NAMES",
    "TruthRecord",
    "WrittenFile",
    "empty_maps",
    "fill_trace",
    "load_truth",
    "save_truth",
    "truth_paths",
    "write_json_atomic",
]

#: The per-pixel truth maps, shape (n_directions, n_lines, n_pixels) each.
MAP_NAMES: tuple[str, ...] = (
    "field_nv_t",
    "field_abs_t",
    "f_lo_hz",
    "f_hi_hz",
    "zfs_hz",
    "standoff_m",
    "pl_rate_cps",
    "contrast",
    "time_s",
)


@dataclass(frozen=True)
class WrittenFile:
    """One line file the writer produced.

    Attributes
    ----------
    name : str
        File name inside the scan folder.
    line_index : int
        Line.
    direction : {"forward", "backward"}
        Trace.
    how : {"atomic", "in_place", "corrupt"}
        Written under a temporary name and renamed; written progressively at its final
        name; or damaged on purpose (the reader must reject it).
    """

    name: str
    line_index: int
    direction: str
    how: str


@dataclass(frozen=True, eq=False)
class TruthRecord:
    """The ground truth of one demo scan.

    Attributes
    ----------
    scan_id : str
        Scan identifier (the scan folder's name).
    directions : tuple of str
        ``("forward",)`` or ``("forward", "backward")``; index 0 of every map's first axis
        is forward.
    x_m : ndarray, shape (n_pixels,)
        Column positions, m.
    y_m : ndarray, shape (n_lines,)
        Line positions, m.
    freq_hz : ndarray, shape (n_freq,)
        Microwave sweep, Hz.
    maps : Mapping[str, ndarray]
        :data:`MAP_NAMES`, each (n_directions, n_lines, n_pixels), plus ``field_xyz_t``
        (n_directions, n_lines, n_pixels, 3), T.
    faults : tuple of Fault
        The fault schedule.
    files : tuple of WrittenFile
        Files written, in order.
    pauses : tuple of (int, float)
        (line index, seconds) for every stall the writer made before a line.
    params : Mapping[str, Any]
        Every parameter of the run (JSON-ready).
    complete : bool
        True once every line was written.
    """

    scan_id: str
    directions: tuple[str, ...]
    x_m: np.ndarray
    y_m: np.ndarray
    freq_hz: np.ndarray
    maps: Mapping[str, np.ndarray]
    faults: tuple[Fault, ...] = ()
    files: tuple[WrittenFile, ...] = ()
    pauses: tuple[tuple[int, float], ...] = ()
    params: Mapping[str, Any] = field(default_factory=dict)
    complete: bool = False

    def map(self, name: str, direction: str = "forward") -> np.ndarray:
        """One truth map for one trace direction, shape (n_lines, n_pixels)."""
        return self.maps[name][self.directions.index(direction)]

    def to_json(self) -> dict[str, Any]:
        """The JSON part of the record."""
        return {
            "scan_id": self.scan_id,
            "directions": list(self.directions),
            "complete": self.complete,
            "faults": [fault_to_dict(f) for f in self.faults],
            "files": [vars(f) for f in self.files],
            "pauses": [{"line_index": k, "pause_s": s} for k, s in self.pauses],
            "params": dict(self.params),
            "maps": {name: _map_doc(name) for name in self.maps},
        }


_UNITS = {"t": "T", "hz": "Hz", "m": "m", "cps": "counts/s", "s": "s"}


def _map_doc(name: str) -> str:
    unit = _UNITS.get(name.rsplit("_", 1)[-1], "1")
    extra = ", 3" if name == "field_xyz_t" else ""
    return f"shape (n_directions, n_lines, n_pixels{extra}); unit {unit}"


def truth_paths(truth_dir: str | os.PathLike[str], scan_id: str) -> tuple[Path, Path]:
    """``(<truth_dir>/<scan_id>.truth.npz, <truth_dir>/<scan_id>.truth.json)``."""
    base = Path(truth_dir)
    return base / f"{scan_id}.truth.npz", base / f"{scan_id}.truth.json"


def write_json_atomic(path: Path, data: Mapping[str, Any]) -> None:
    """Write ``data`` as JSON at ``path`` through a temporary name and a rename."""
    tmp = path.with_name(f".{path.name}.partial")
    with tmp.open("w", encoding="utf-8") as fh:
        json.dump(data, fh, indent=2, sort_keys=False)
        fh.write("\n")
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def save_truth(record: TruthRecord, truth_dir: str | os.PathLike[str]) -> tuple[Path, Path]:
    """Write both truth files (atomically) and return their paths."""
    npz_path, json_path = truth_paths(truth_dir, record.scan_id)
    npz_path.parent.mkdir(parents=True, exist_ok=True)
    tmp = npz_path.with_name(f".{npz_path.name}.partial")
    arrays: dict[str, Any] = {
        "x_m": record.x_m,
        "y_m": record.y_m,
        "freq_hz": record.freq_hz,
        **record.maps,
    }
    with tmp.open("wb") as fh:
        np.savez_compressed(fh, **arrays)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, npz_path)
    write_json_atomic(json_path, record.to_json())
    return npz_path, json_path


def load_truth(truth_dir: str | os.PathLike[str], scan_id: str) -> TruthRecord:
    """Read the truth of ``scan_id`` written by :func:`save_truth`."""
    npz_path, json_path = truth_paths(truth_dir, scan_id)
    meta = json.loads(json_path.read_text(encoding="utf-8"))
    with np.load(npz_path) as data:
        arrays = {name: data[name] for name in data.files}
    return TruthRecord(
        scan_id=meta["scan_id"],
        directions=tuple(meta["directions"]),
        x_m=arrays.pop("x_m"),
        y_m=arrays.pop("y_m"),
        freq_hz=arrays.pop("freq_hz"),
        maps=arrays,
        faults=tuple(fault_from_dict(f) for f in meta["faults"]),
        files=tuple(WrittenFile(**f) for f in meta["files"]),
        pauses=tuple((int(p["line_index"]), float(p["pause_s"])) for p in meta["pauses"]),
        params=meta["params"],
        complete=bool(meta["complete"]),
    )


def empty_maps(n_directions: int, n_lines: int, n_pixels: int) -> dict[str, np.ndarray]:
    """NaN-filled truth maps of the right shapes, to be filled trace by trace."""
    shape = (n_directions, n_lines, n_pixels)
    maps = {name: np.full(shape, np.nan) for name in MAP_NAMES}
    maps["field_xyz_t"] = np.full((*shape, 3), np.nan)
    return maps


def fill_trace(
    maps: Mapping[str, np.ndarray], direction_index: int, line_index: int, trace: Any
) -> None:
    """Copy one :class:`demo_stream.tip.TraceTruth` into the maps."""
    for name in (*MAP_NAMES, "field_xyz_t"):
        maps[name][direction_index, line_index] = getattr(trace, name)
