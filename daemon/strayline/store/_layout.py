"""On-disk layout of a scan store: array specifications, creation, paths, durability.

The store ``<output_root>/<scan_id>.zarr`` (zarr format 3, local directory)::

    zarr.json                  root group; attributes: see :func:`root_attributes`
    forward/, backward/        one group per trace direction, each holding
        <map>                  (n_lines_planned, n_pixels), dims ("y", "x"), one chunk per
                               ``chunk_lines`` whole lines; see :data:`MAPS`
        x                      (n_pixels,) fast-axis position, m (set at creation)
        y                      (n_lines_planned,) slow-axis position, m; a line not yet
                               written has its planned position (status 255 there)
    raw/forward/, raw/backward/
        <line_index>/          one group per line with raw spectra (when enabled):
            counts             (n_pixels, n_freq) photon counts, the file's dtype
            freq_hz            (n_freq,) Hz
            x_m                (n_pixels,) m
            reference_counts   (n_pixels, n_freq), only if the file had it
    ledger                     zero-length array; its directory holds records.jsonl

Raw spectra are kept per line because n_freq may change from line to line: a line's
spectra stay self-contained (no padding), and superseding or resetting a line removes one
group.

A map added to the layout after stores were first written (``MapSpec.added_later``) may be
missing from an older store: the writer creates it when it reopens such a store (filled
for the lines already committed, which the older version wrote without it), and the
reader gives its fill value meanwhile, so an older store is read without a conversion.

Maps are float64. The field's 1σ (~1e-7 T) against fields of up to ~0.1 T would fit float32
(about 7 significant digits), but float64 keeps the fitter's numbers bit for bit, which
makes a stored scan refittable and comparable without a precision caveat; Blosc-Zstd with
byte shuffling takes back most of the size.
"""

from __future__ import annotations

import asyncio
import os
import re
import shutil
import uuid
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import zarr
from zarr.codecs import BloscCodec
from zarr.core.sync import sync

from strayline.field import FIELD_BOUND_LEVEL
from strayline.fit import FitStatus
from strayline.lines import DIRECTIONS
from strayline.store._ledger import LEDGER_FILE

__all__ = [
    "DIRECTIONS",
    "LEDGER_FILE",
    "MAPS",
    "STATUS_FILL",
    "STORE_FORMAT",
    "STORE_FORMAT_VERSION",
    "MapSpec",
    "add_missing_maps",
    "all_folders",
    "chunk_file",
    "compressors",
    "create_layout",
    "dirs_to_flush",
    "flush_files",
    "fsync_tree",
    "fsync_with_parents",
    "remove_creation_leftovers",
    "remove_partials",
    "row_blocks_on_disk",
    "status_flags",
    "write_together",
]

STORE_FORMAT = "strayline-store"
STORE_FORMAT_VERSION = 1

STATUS_FILL = 255  # status code of a pixel whose line was never written

# zarr v3 "default" chunk key encoding with "/" (the spec's default), set explicitly so the
# chunk of row block r of a 2-D array is the file <array>/c/<r>/0.
_CHUNK_KEY_ENCODING: dict[str, Any] = {"name": "default", "separator": "/"}

# Temporary files of zarr's local store: "<name>.<32 hex>.partial" (renamed into place
# when complete; left behind only by a crash).
_PARTIAL = re.compile(r"\.[0-9a-f]{32}\.partial$")


@dataclass(frozen=True)
class MapSpec:
    """One per-pixel map of a trace group.

    ``added_later``: the map joined the layout after stores of this format were first
    written, so an older store may lack it (see the module notes).
    """

    name: str
    units: str
    long_name: str
    dtype: str = "float64"
    added_later: bool = False

    @property
    def fill(self) -> float | int:
        return STATUS_FILL if self.dtype == "uint8" else float("nan")


MAPS: tuple[MapSpec, ...] = (
    MapSpec("field_nv_t", "T", "magnetic field along the NV axis"),
    MapSpec("field_nv_sigma_t", "T", "1-sigma uncertainty of the field along the NV axis"),
    MapSpec(
        "field_nv_bound_t",
        "T",
        f"upper bound ({100 * FIELD_BOUND_LEVEL:.0f} %, one-sided) on the magnitude of the "
        "field along the NV axis where the resonances are merged",
        added_later=True,
    ),
    MapSpec("field_abs_t", "T", "magnetic field magnitude"),
    MapSpec("angle_rad", "rad", "angle between the magnetic field and the NV axis"),
    MapSpec("center_mean_hz", "Hz", "mean of the lower and upper resonance frequencies"),
    MapSpec("freq_lo_hz", "Hz", "lower resonance frequency"),
    MapSpec("freq_hi_hz", "Hz", "upper resonance frequency"),
    MapSpec("freq_lo_sigma_hz", "Hz", "1-sigma uncertainty of the lower resonance"),
    MapSpec("freq_hi_sigma_hz", "Hz", "1-sigma uncertainty of the upper resonance"),
    MapSpec("contrast_lo", "1", "fractional depth of the lower resonance dip"),
    MapSpec("contrast_hi", "1", "fractional depth of the upper resonance dip"),
    MapSpec("fwhm_hz", "Hz", "resonance linewidth (FWHM), mean over the fitted dips"),
    MapSpec("pl_rate_cps", "counts/s", "off-resonance photoluminescence rate"),
    MapSpec("chi2_red", "1", "reduced chi-squared of the spectrum fit"),
    MapSpec("status", "", "fit status code", dtype="uint8"),
)


def status_flags() -> tuple[list[int], str]:
    """The status map's ``flag_values`` and ``flag_meanings`` (from :class:`FitStatus`)."""
    values = [int(member) for member in FitStatus] + [STATUS_FILL]
    meanings = " ".join([member.name.lower() for member in FitStatus] + ["not_written"])
    return values, meanings


def compressors(level: int) -> list[BloscCodec]:
    """Blosc-Zstd with byte shuffling at ``level`` (0 = stored uncompressed, 9 = smallest)."""
    return [BloscCodec(cname="zstd", clevel=level, shuffle="shuffle")]


def chunk_file(store_path: Path, array_path: str, chunk_coords: Iterable[int]) -> Path:
    """File holding one chunk of an array, under the default "/" chunk key encoding."""
    return store_path.joinpath(array_path, "c", *(str(c) for c in chunk_coords))


def row_blocks_on_disk(
    store_path: Path, array_path: str, block: int, n_rows: int
) -> list[tuple[int, int]]:
    """Row ranges ``[start, stop)`` of the chunks of a row-chunked array that exist on disk,
    increasing: what a reader must look at, so that reading a store costs what was written,
    not what the scan plans (65,536 planned lines with one written: one chunk, not 65,536)."""
    chunk_dir = store_path / array_path / "c"
    try:
        entries = [e.name for e in chunk_dir.iterdir()]
    except (FileNotFoundError, NotADirectoryError):
        return []
    starts = sorted(int(name) * block for name in entries if name.isdigit())
    return [(start, min(start + block, n_rows)) for start in starts]


def create_layout(
    path: Path,
    *,
    attributes: Mapping[str, Any],
    n_lines_planned: int,
    n_pixels: int,
    x_m: np.ndarray,
    compression_level: int,
    chunk_lines: int,
) -> None:
    """Build an empty store at ``path``, atomically: in a hidden sibling, then renamed.

    A crash during creation leaves only a ``.<name>.creating-<hex>`` directory, which
    :func:`remove_creation_leftovers` deletes; ``path`` either is complete or does not exist.

    Raises
    ------
    FileExistsError
        If ``path`` appeared meanwhile (another process created it).
    OSError
        On disk failures.
    """
    tmp = path.with_name(f".{path.name}.creating-{uuid.uuid4().hex}")
    try:
        root = zarr.open_group(tmp, mode="w-", zarr_format=3, attributes=dict(attributes))
        codecs = compressors(compression_level)
        for direction in DIRECTIONS:
            trace = root.create_group(
                direction, attributes={"direction": direction, "long_name": f"{direction} trace"}
            )
            for spec in MAPS:
                _create_map(
                    trace,
                    spec,
                    (n_lines_planned, n_pixels),
                    chunk_lines=chunk_lines,
                    codecs=codecs,
                )
            x = trace.create_array(
                "x",
                shape=(n_pixels,),
                chunks=(n_pixels,),
                dtype="float64",
                fill_value=float("nan"),
                chunk_key_encoding=_CHUNK_KEY_ENCODING,
                dimension_names=("x",),
                attributes={"units": "m", "long_name": "fast-axis position"},
            )
            x[:] = x_m
            trace.create_array(
                "y",
                shape=(n_lines_planned,),
                chunks=(n_lines_planned,),
                dtype="float64",
                fill_value=float("nan"),
                chunk_key_encoding=_CHUNK_KEY_ENCODING,
                dimension_names=("y",),
                attributes={
                    "units": "m",
                    "long_name": "slow-axis position",
                    "comment": "planned position where status is 255 (line not written)",
                },
            )
        raw = root.create_group("raw", attributes={"long_name": "raw spectra, one group per line"})
        for direction in DIRECTIONS:
            raw.create_group(direction)
        root.create_array(
            "ledger",
            shape=(0,),
            dtype="uint8",
            dimension_names=("record",),
            attributes={
                "long_name": "line ledger",
                "records_file": LEDGER_FILE.name,
                "record_format": "JSON lines, append-only; events begin, commit, reset",
            },
        )
        (tmp / LEDGER_FILE).touch()
        fsync_tree(tmp)
        os.rename(tmp, path)  # fails if path exists and is not empty
        _fsync_dir(path.parent)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _create_map(
    trace: zarr.Group,
    spec: MapSpec,
    shape: tuple[int, int],
    *,
    chunk_lines: int,
    codecs: list[BloscCodec],
    comment: str | None = None,
) -> None:
    """Create one map of a trace group, filled with the map's fill value."""
    attrs: dict[str, Any] = {"units": spec.units, "long_name": spec.long_name}
    if spec.name == "status":
        flag_values, flag_meanings = status_flags()
        attrs |= {"flag_values": flag_values, "flag_meanings": flag_meanings}
    if comment is not None:
        attrs["comment"] = comment
    trace.create_array(
        spec.name,
        shape=shape,
        chunks=(chunk_lines, shape[1]),
        dtype=spec.dtype,
        fill_value=spec.fill,
        compressors=codecs,
        chunk_key_encoding=_CHUNK_KEY_ENCODING,
        dimension_names=("y", "x"),
        attributes=attrs,
    )


def add_missing_maps(path: Path, root: zarr.Group, compression_level: int) -> list[str]:
    """Create the maps an older store lacks (``MapSpec.added_later``), durably.

    Each takes the shape and row chunking of the trace's ``status`` map and is filled
    (NaN) for every line: the lines committed so far were written without it. Run by the
    store's one writer, under its lock.

    Returns
    -------
    list of str
        The arrays created, as ``<direction>/<name>``.

    Raises
    ------
    KeyError
        If a trace group or its ``status`` map is missing (the layout is incomplete).
    OSError
        On disk failures.
    """
    created = []
    for direction in DIRECTIONS:
        trace = root[direction]
        if not isinstance(trace, zarr.Group):
            raise KeyError(direction)
        present = set(trace.array_keys())
        missing = [spec for spec in MAPS if spec.added_later and spec.name not in present]
        if not missing:
            continue
        status = trace["status"]
        if not isinstance(status, zarr.Array):
            raise KeyError(f"{direction}/status")
        shape = (int(status.shape[0]), int(status.shape[1]))
        for spec in missing:
            _create_map(
                trace,
                spec,
                shape,
                chunk_lines=int(status.chunks[0]),
                codecs=compressors(compression_level),
                comment="added when the store was reopened; lines committed before then "
                "were written without this map and hold its fill value",
            )
            created.append(f"{direction}/{spec.name}")
    if created:
        fsync_with_parents([path / name / "zarr.json" for name in created], path)
    return created


def remove_creation_leftovers(path: Path) -> list[Path]:
    """Delete hidden half-built stores ``.<name>.creating-*`` left by a crashed creation."""
    removed = []
    for leftover in path.parent.glob(f".{path.name}.creating-*"):
        shutil.rmtree(leftover, ignore_errors=True)
        removed.append(leftover)
    return removed


def remove_partials(path: Path) -> list[Path]:
    """Delete zarr's temporary ``*.<hex>.partial`` files left under ``path`` by a crash."""
    removed = []
    for dirpath, _dirnames, filenames in os.walk(path):
        for name in filenames:
            if _PARTIAL.search(name):
                leftover = Path(dirpath, name)
                leftover.unlink(missing_ok=True)
                removed.append(leftover)
    return removed


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def all_folders(files: Iterable[Path], stop_at: Path) -> tuple[list[Path], set[Path]]:
    """``files`` and every folder from their parents up to ``stop_at`` (excluded): what to
    flush when it is not known which folders changed."""
    files = list(files)
    dirs: set[Path] = set()
    for file in files:
        parent = file.parent
        while parent != stop_at and stop_at in parent.parents:
            dirs.add(parent)
            parent = parent.parent
    return files, dirs


def dirs_to_flush(files: Iterable[Path], stop_at: Path) -> set[Path]:
    """The folders whose entries change when ``files`` are written (call it *before*
    writing): each file's own folder (the file is created or renamed into place), and for
    each folder still missing, the folder that will receive it; nothing above a folder
    that exists already. Folders up to ``stop_at`` only (it exists).

    A chunk written over an existing one flushes one folder, a line's first chunk in a
    new row folder two; flushing every folder up to the store's root for every file would
    cost four to five times the fsyncs for nothing.
    """
    dirs: set[Path] = set()
    for file in files:
        folder = file.parent
        dirs.add(folder)
        while folder != stop_at and stop_at in folder.parents and not folder.exists():
            folder = folder.parent
            dirs.add(folder)
    return dirs


def flush_files(files: Iterable[Path], dirs: Iterable[Path]) -> None:
    """fsync ``files`` (each once; one that no longer exists, a chunk zarr deleted because
    it held only fill values, is skipped), then ``dirs``, deepest first, so that a new
    folder is on disk before the entry naming it."""
    for file in dict.fromkeys(files):
        if file.is_file():
            _fsync_file(file)
    for directory in sorted(set(dirs), key=lambda d: len(d.parts), reverse=True):
        if directory.is_dir():
            _fsync_dir(directory)


def fsync_with_parents(files: Iterable[Path], stop_at: Path) -> None:
    """Flush files to disk, then every directory from their parent up to ``stop_at``."""
    flush_files(*all_folders(files, stop_at))


def write_together(writes: Iterable[tuple[zarr.Array, tuple[slice, ...], np.ndarray]]) -> None:
    """Assign each ``(array, selection, data)`` as ``array[selection] = data`` does, all in
    one call into zarr's event loop, so the chunks of every array are encoded and written
    concurrently instead of one array after another (zarr's synchronous API waits for
    each assignment before the next; the 17 arrays of a line cost a third less).

    Every assignment runs to its end before the first failure, if any, is raised: none
    is left running behind the caller's back.
    """
    jobs = [array.async_array.setitem(selection, data) for array, selection, data in writes]

    async def gather() -> list[BaseException | None]:
        return await asyncio.gather(*jobs, return_exceptions=True)

    for outcome in sync(gather()):
        if isinstance(outcome, BaseException):
            raise outcome


def fsync_tree(path: Path) -> None:
    """Flush every file and directory under ``path`` (and ``path`` itself) to disk."""
    for dirpath, _dirnames, filenames in os.walk(path, topdown=False):
        for name in filenames:
            _fsync_file(Path(dirpath, name))
        _fsync_dir(Path(dirpath))
