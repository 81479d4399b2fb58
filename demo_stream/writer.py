"""The writer: runs a demo scan and emits scan-line files at instrument pace.

:func:`run_scan` renders the scan line by line (:class:`demo_stream.tip.ScanRenderer`),
writes one file per completed trace into ``<out_dir>/<scan_id>/`` (atomically, with
:func:`strayline.lines.write_line_file`, unless a file-level fault says otherwise) and
writes the ground truth into ``truth_dir``, which must lie outside ``out_dir``.

Files
-----
Forward traces store pixels in increasing x. **Backward traces store pixels in the order
they were acquired, i.e. decreasing x**; ``x_m`` always states each row's position, so a
reader must place rows by ``x_m``, not by index. The truth maps are all in column order
(increasing x).

Layouts
-------
``layout`` chooses how the lines are written (:data:`LAYOUTS`): ``"line-files"``, one
contract-v1 HDF5 file per trace (the default); ``"growing-file"``, one HDF5 file per scan,
``<scan_id>.h5``, held open in SWMR mode and grown a row per trace; ``"plain-arrays"``, a
``line_NNNNN_fwd.npz`` per trace and a ``scan.json`` sidecar. The same scan (same seed and
clock) gives the same lines in every layout; the file-level faults (a corrupt file, a slow
in-place write) exist in the line-files layout only.

Pace and time
-------------
``pace_s`` is the time per scan line (both traces of it with trace/retrace): the file of
trace ``j`` (counting from 0 over the whole scan) is written no earlier than
``(j + 1) * pace_s / n_traces_per_line`` after the start, plus every stall so far;
``pace_s = 0`` writes as fast as possible. The files' ``start_time`` and ``end_time``
are wall-clock UTC: when rendering of the trace began and when its bytes were complete.
The PL drift follows the instrument clock instead (see :mod:`demo_stream.tip`).
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from demo_stream.faults import Fault, fault_lines
from demo_stream.scenes import Scene, labyrinth
from demo_stream.tip import ScanRenderer, TipModel
from demo_stream.truth import (
    TruthRecord,
    WrittenFile,
    empty_maps,
    fill_trace,
    save_truth,
    truth_paths,
    write_json_atomic,
)
from strayline.lines import (
    GrowingFileWriter,
    ScanHeader,
    ScanLine,
    line_file_bytes,
    line_file_name,
    write_line_file,
    write_plain_line,
)

__all__ = [
    "LAYOUTS",
    "DemoConfig",
    "OnLine",
    "config_to_dict",
    "frequency_grid_hz",
    "run_scan",
]

#: The layouts the demo instrument writes (see the module's notes).
LAYOUTS = ("line-files", "growing-file", "plain-arrays")

#: Called after each line's files are written: ``on_line(line_index, paths)``.
OnLine = Callable[[int, tuple[Path, ...]], None]


def frequency_grid_hz(start_hz: float, stop_hz: float, n_freq: int) -> np.ndarray:
    """Uniform microwave sweep from ``start_hz`` to ``stop_hz``, shape (n_freq,), Hz."""
    if not (math.isfinite(start_hz) and math.isfinite(stop_hz) and 0 < start_hz < stop_hz):
        raise ValueError(
            f"frequency grid: start and stop must be finite with 0 < start < stop; "
            f"found {start_hz:g} Hz, {stop_hz:g} Hz"
        )
    if n_freq < 3:
        raise ValueError(f"frequency grid: n_freq must be >= 3; found {n_freq}")
    return np.linspace(start_hz, stop_hz, n_freq)


def _default_freq_hz() -> np.ndarray:
    return frequency_grid_hz(2.66e9, 3.08e9, 201)


@dataclass(frozen=True, eq=False)
class DemoConfig:
    """Everything that defines a demo scan.

    Attributes
    ----------
    scene : Scene
        The sample.
    tip : TipModel
        The NV tip and optics.
    n_lines, n_pixels : int
        Scan size (slow, fast axis).
    pixel_m : float
        Pixel pitch on both axes, m.
    freq_hz : ndarray, shape (n_freq,)
        Microwave sweep, Hz, strictly increasing (may be non-uniform).
    trace_retrace : bool
        Also acquire and write a backward trace of every line.
    faults : tuple of Fault
        Fault schedule.
    seed : int
        Seed of the photon noise.
    scan_id : str
        Scan identifier and folder name.
    profile : str or None
        Sample-type profile name written into every file.
    oversample : int
        Magnetisation sampling factor (see :func:`demo_stream.tip.render_field_t`).
    """

    scene: Scene = field(default_factory=labyrinth)
    tip: TipModel = field(default_factory=TipModel)
    n_lines: int = 64
    n_pixels: int = 128
    pixel_m: float = 30e-9
    freq_hz: np.ndarray = field(default_factory=_default_freq_hz)
    trace_retrace: bool = False
    faults: tuple[Fault, ...] = ()
    seed: int = 0
    scan_id: str = "demo-0001"
    profile: str | None = None
    oversample: int = 2

    def __post_init__(self) -> None:
        for key in ("n_lines", "n_pixels", "oversample"):
            value = getattr(self, key)
            if not isinstance(value, int) or value < 1:
                raise ValueError(f"demo config: {key} must be an integer >= 1; found {value!r}")
        if not (math.isfinite(self.pixel_m) and self.pixel_m > 0):
            raise ValueError(
                f"demo config: pixel_m must be a finite number > 0; found {self.pixel_m}"
            )
        freq = np.asarray(self.freq_hz, dtype=float)
        if freq.ndim != 1 or freq.size < 3 or not np.all(np.isfinite(freq)):
            raise ValueError(
                f"demo config: freq_hz must be at least 3 finite frequencies; found shape "
                f"{freq.shape}"
            )
        if not np.all(np.diff(freq) > 0):
            raise ValueError("demo config: freq_hz must be strictly increasing; found a step <= 0")
        object.__setattr__(self, "freq_hz", freq)
        object.__setattr__(self, "faults", tuple(self.faults))
        for fault in self.faults:
            if fault.start_line >= self.n_lines:
                raise ValueError(
                    f"demo config: fault {fault.kind!r} must start at a line < "
                    f"{self.n_lines}; found line {fault.start_line}"
                )
            if fault.start_pixel >= self.n_pixels:
                raise ValueError(
                    f"demo config: fault {fault.kind!r} must start at a pixel < "
                    f"{self.n_pixels}; found pixel {fault.start_pixel}"
                )
        from strayline.lines import NAME_PATTERN, NAME_RULE

        for key in ("scan_id", "profile"):
            value = getattr(self, key)
            if value is not None and not NAME_PATTERN.fullmatch(value):
                raise ValueError(f"demo config: {key} must be {NAME_RULE}; found {value!r}")

    @property
    def directions(self) -> tuple[str, ...]:
        """``("forward",)`` or ``("forward", "backward")``."""
        return ("forward", "backward") if self.trace_retrace else ("forward",)


def config_to_dict(config: DemoConfig) -> dict[str, Any]:
    """Every parameter of ``config``, JSON-ready (the frequencies summarised)."""
    from demo_stream.faults import fault_to_dict

    freq = config.freq_hz
    step = np.diff(freq)
    return {
        "scene": {
            "name": config.scene.name,
            "description": config.scene.description,
            "params": dict(config.scene.params),
        },
        "tip": {**asdict(config.tip), "zfs_hz": config.tip.zfs_hz},
        "n_lines": config.n_lines,
        "n_pixels": config.n_pixels,
        "pixel_m": config.pixel_m,
        "freq": {
            "start_hz": float(freq[0]),
            "stop_hz": float(freq[-1]),
            "n_freq": int(freq.size),
            "uniform": bool(np.allclose(step, step[0], rtol=1e-9, atol=0.0)),
        },
        "trace_retrace": config.trace_retrace,
        "faults": [fault_to_dict(f) for f in config.faults],
        "seed": config.seed,
        "scan_id": config.scan_id,
        "profile": config.profile,
        "oversample": config.oversample,
        "conventions": {
            "grid": "x = (i - (n_pixels - 1)/2) * pixel_m, y = (k - (n_lines - 1)/2) * pixel_m",
            "backward_file_order": "acquisition order (decreasing x); x_m gives each row",
            "truth_map_order": "column order (increasing x)",
            "file_times": "wall-clock UTC",
            "pl_drift_clock": "instrument time: n_freq * dwell_s per pixel, acquisition order",
        },
    }


def _stall_s(faults: Sequence[Fault], line_index: int, pace_s: float, n_lines: int) -> float:
    pause = 0.0
    for fault in faults:
        if fault.kind == "acquisition_stalled" and line_index in fault_lines(fault, n_lines):
            p = fault.params
            pause += p["pause_s"] if p["pause_s"] > 0 else p["pause_lines"] * pace_s
    return pause


def _file_fault(faults: Sequence[Fault], line_index: int, n_lines: int) -> Fault | None:
    """The file-level fault acting on a line's files (corrupt wins over in-place)."""
    found = None
    for fault in faults:
        if fault.kind in ("corrupt_file", "slow_in_place_write") and line_index in fault_lines(
            fault, n_lines
        ):
            if fault.kind == "corrupt_file":
                return fault
            found = fault
    return found


def _utc_now() -> datetime:
    return datetime.now(UTC)


def _write_bytes_atomic(path: Path, data: bytes) -> None:
    tmp = path.with_name(f".{path.name}.partial")
    with tmp.open("wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def _write_in_place(path: Path, data: bytes, fault: Fault, sleep: Callable[[float], None]) -> None:
    """Write ``data`` at its final name in ``n_chunks`` pieces spread over ``duration_s``."""
    n_chunks = int(fault.params["n_chunks"])
    pause = fault.params["duration_s"] / n_chunks
    edges = np.linspace(0, len(data), n_chunks + 1).astype(int)
    with path.open("wb") as fh:
        for i in range(n_chunks):
            fh.write(data[edges[i] : edges[i + 1]])
            fh.flush()
            if i < n_chunks - 1:
                sleep(pause)
        os.fsync(fh.fileno())


def _corrupt(data: bytes, fault: Fault) -> bytes:
    """Truncated (mode 0) or with a garbled format signature (mode 1)."""
    if fault.params["mode"] == 0.0:
        return data[: int(len(data) * fault.params["keep_fraction"])]
    return b"GARBLED\x00" + data[8:]


def run_scan(
    config: DemoConfig,
    out_dir: str | os.PathLike[str],
    truth_dir: str | os.PathLike[str],
    *,
    pace_s: float = 0.0,
    on_line: OnLine | None = None,
    sleep: Callable[[float], None] = time.sleep,
    clock: Callable[[], float] = time.monotonic,
    layout: str = "line-files",
    wall_clock: Callable[[], datetime] = _utc_now,
) -> TruthRecord:
    """Run a demo scan: write its line files at pace and its ground truth.

    Parameters
    ----------
    config : DemoConfig
        The scan.
    out_dir : path
        Watched folder; files go to ``<out_dir>/<scan_id>/line_NNNNN_fwd.h5`` (and
        ``_bwd``).
    truth_dir : path
        Folder for ``<scan_id>.truth.npz`` and ``<scan_id>.truth.json``; must not be
        ``out_dir`` or inside it.
    pace_s : float
        Seconds per scan line; 0 writes as fast as possible.
    on_line : callable, optional
        ``on_line(line_index, paths)`` after each line's files are written.
    sleep, clock : callable
        Time functions (injectable so tests need not wait).
    layout : str
        One of :data:`LAYOUTS`.
    wall_clock : callable returning an aware datetime
        The time written as each line's start and end (injectable, so that one scan
        written twice carries the same times).

    Returns
    -------
    TruthRecord
        The truth, also saved in ``truth_dir`` (``complete`` is False if the scan was
        interrupted; the truth of the lines written so far is saved anyway).
    """
    if not (math.isfinite(pace_s) and pace_s >= 0):
        raise ValueError(f"run_scan: pace_s must be a finite number >= 0; found {pace_s}")
    if layout not in LAYOUTS:
        raise ValueError(f"run_scan: layout must be one of {', '.join(LAYOUTS)}; found {layout!r}")
    if layout != "line-files" and any(
        f.kind in ("corrupt_file", "slow_in_place_write") for f in config.faults
    ):
        raise ValueError(
            f"run_scan: file faults (corrupt_file, slow_in_place_write) need the line-files "
            f"layout; found layout {layout!r}"
        )
    out_root = Path(out_dir).resolve()
    truth_root = Path(truth_dir).resolve()
    if truth_root == out_root or out_root in truth_root.parents:
        raise ValueError(
            f"run_scan: truth_dir must lie outside the watched folder {out_root}; "
            f"found {truth_root}"
        )
    scan_dir = out_root / config.scan_id
    scan_dir.mkdir(parents=True, exist_ok=True)
    truth_root.mkdir(parents=True, exist_ok=True)

    renderer = ScanRenderer(
        config.scene,
        config.tip,
        n_lines=config.n_lines,
        n_pixels=config.n_pixels,
        pixel_m=config.pixel_m,
        freq_hz=config.freq_hz,
        faults=config.faults,
        trace_retrace=config.trace_retrace,
        oversample=config.oversample,
    )
    rng = np.random.default_rng(config.seed)
    directions = config.directions
    maps = empty_maps(len(directions), config.n_lines, config.n_pixels)
    params = {**config_to_dict(config), "pace_s": pace_s}
    files: list[WrittenFile] = []
    pauses: list[tuple[int, float]] = []

    def record(complete: bool) -> TruthRecord:
        return TruthRecord(
            scan_id=config.scan_id,
            directions=directions,
            x_m=renderer.x_m,
            y_m=renderer.y_m,
            freq_hz=config.freq_hz,
            maps=maps,
            faults=config.faults,
            files=tuple(files),
            pauses=tuple(pauses),
            params=params,
            complete=complete,
        )

    # The schedule is on disk before the first file appears.
    write_json_atomic(truth_paths(truth_root, config.scan_id)[1], record(False).to_json())
    interval_s = pace_s / len(directions)
    deadline = clock()
    complete = False
    growing: GrowingFileWriter | None = None
    y_m = [float(y) for y in renderer.y_m]
    try:
        for k in range(config.n_lines):
            pause = _stall_s(config.faults, k, pace_s, config.n_lines)
            if pause > 0:
                sleep(pause)
                deadline += pause
                pauses.append((k, pause))
            file_fault = _file_fault(config.faults, k, config.n_lines)
            written: list[Path] = []
            for d, direction in enumerate(directions):
                start = wall_clock()
                backward = direction == "backward"
                counts, truth = renderer.render_trace(k, backward, rng)
                fill_trace(maps, d, k, truth)
                order = slice(None, None, -1) if backward else slice(None)
                path = scan_dir / line_file_name(k, direction)
                deadline += interval_s
                wait = deadline - clock()
                if wait > 0:
                    sleep(wait)
                line = ScanLine(
                    source=path,
                    scan_id=config.scan_id,
                    line_index=k,
                    n_lines_planned=config.n_lines,
                    direction=direction,  # type: ignore[arg-type]  # from config.directions
                    start_time=start,
                    end_time=wall_clock(),
                    dwell_s=config.tip.dwell_s,
                    nv_theta_rad=config.tip.nv_theta_rad,
                    nv_phi_rad=config.tip.nv_phi_rad,
                    freq_hz=config.freq_hz,
                    counts=np.ascontiguousarray(counts[order]),
                    x_m=np.ascontiguousarray(renderer.x_m[order]),
                    y_m=float(renderer.y_m[k]),
                    temperature_k=config.tip.temperature_k,
                    profile=config.profile,
                    tip_id=config.tip.tip_id,
                )
                if layout == "growing-file":
                    if growing is None:
                        path = scan_dir / f"{config.scan_id}.h5"
                        growing = GrowingFileWriter(path, ScanHeader.of(line), swmr=True)
                    path = growing.path
                    growing.append(line)
                    how = "appended"
                elif layout == "plain-arrays":
                    path = write_plain_line(line, scan_dir, y_m=y_m)
                    how = "atomic"
                elif file_fault is None:
                    write_line_file(line, path)
                    how = "atomic"
                elif file_fault.kind == "corrupt_file":
                    _write_bytes_atomic(path, _corrupt(line_file_bytes(line), file_fault))
                    how = "corrupt"
                else:
                    _write_in_place(path, line_file_bytes(line), file_fault, sleep)
                    how = "in_place"
                files.append(WrittenFile(path.name, k, direction, how))
                written.append(path)
            if on_line is not None:
                on_line(k, tuple(written))
        complete = True
    finally:
        if growing is not None:
            growing.close()
        result = record(complete)
        save_truth(result, truth_root)
    return result
