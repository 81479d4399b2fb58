"""Reading a scan store without taking its writer's lock: ``status`` and the products.

The ledger is read *before* the maps, so a line committed in between is left out and a
line being written (begun, not committed) is not counted: a half-written row never
reaches a reader. Safe while the daemon writes the scan.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from strayline.errors import StoreError
from strayline.lines import DIRECTIONS
from strayline.store._layout import MAPS, STORE_FORMAT, row_blocks_on_disk
from strayline.store._ledger import LEDGER_FILE, LedgerState, read_ledger_state
from strayline.store._raw import RawSpectra, read_raw_group

__all__ = [
    "NotAScanStore",
    "StoreReader",
    "is_orphaned_store",
    "open_store_reader",
    "store_metadata_present",
    "store_path",
]


class NotAScanStore(StoreError):
    """The folder is not (or not yet) a readable scan store: no zarr group, or another format."""


def store_path(output_root: Path, scan_id: str) -> Path:
    """Where the store of scan ``scan_id`` lives: ``<output_root>/<scan_id>.zarr``."""
    return Path(output_root) / f"{scan_id}.zarr"


def store_metadata_present(path: Path) -> bool:
    """True when the store's group metadata (``zarr.json``) is a file at ``path``."""
    return (Path(path) / "zarr.json").is_file()


def is_orphaned_store(path: Path) -> bool:
    """True for a folder at a store's path with neither group metadata nor a ledger.

    zarr creates missing folders when it writes a chunk, so lines written after a store's
    folder was deleted leave such a folder of chunks behind. A file that cannot be looked
    at counts as present (the folder is then not called orphaned).
    """
    path = Path(path)
    return path.is_dir() and not any(
        _maybe_exists(path / name) for name in (Path("zarr.json"), LEDGER_FILE)
    )


def _maybe_exists(path: Path) -> bool:
    """True unless ``path`` is certainly absent (any other error counts as present)."""
    try:
        path.stat()
    except FileNotFoundError:
        return False
    except OSError:
        return True
    return True


@dataclass(frozen=True, eq=False)
class StoreReader:
    """A read-only view of one store at the moment it was opened.

    Attributes
    ----------
    path : Path
    attrs : dict
        The root attributes (scan id, sizes, NV axis, config, digest, software version).
    ledger : LedgerState
        The ledger replayed when the view was opened (before any map was read).
    """

    path: Path
    attrs: dict[str, Any]
    ledger: LedgerState
    _group: zarr.Group

    @property
    def scan_id(self) -> str:
        return str(self.attrs["scan_id"])

    @property
    def n_lines_planned(self) -> int:
        return int(self.attrs["n_lines_planned"])

    @property
    def tip_id(self) -> str | None:
        """The NV tip recorded for the scan (its line files' ``tip_id``), or None."""
        tip = self.attrs.get("tip_id")
        return None if tip is None else str(tip)

    def committed_lines(self, direction: str) -> list[int]:
        """Committed line indices of one direction, increasing."""
        return sorted(i for (i, d) in self.ledger.committed if d == direction)

    def read_array(self, name: str, direction: str) -> np.ndarray:
        """The whole array ``<direction>/<name>`` (a map, ``x`` or ``y``).

        A map added to the layout after the store was written (``MapSpec.added_later``)
        and not yet created in it (its writer has not reopened it since) reads as its
        fill value, shape (n_lines_planned, n_pixels).

        Raises
        ------
        StoreError
            If the array is missing or cannot be read.
        """
        try:
            array = self._group[f"{direction}/{name}"]
        except KeyError as error:
            later = _LATER_MAPS.get(name)
            if later is not None and direction in DIRECTIONS:
                shape = (self.n_lines_planned, int(self.attrs["n_pixels"]))
                return np.full(shape, later.fill, dtype=later.dtype)
            raise StoreError(f"{self.path}: store layout incomplete: missing {error}") from error
        if not isinstance(array, zarr.Array):
            raise StoreError(f"{self.path}: {direction}/{name} must be an array; found a group")
        try:
            return _read_sparse(array, self.path, f"{direction}/{name}")
        except OSError as error:
            raise StoreError(f"{self.path}: reading {direction}/{name} failed: {error}") from error

    def read_raw(self, line_index: int, direction: str) -> RawSpectra | None:
        """The raw spectra of a line committed in this view, or None if the store kept none
        for it (``store.raw_spectra`` was off when it was written).

        Raises
        ------
        StoreError
            If they are there but cannot be read.
        """
        if (line_index, direction) not in self.ledger.committed:
            return None
        where = f"raw/{direction}/{line_index}"
        try:
            group = self._group[where]
        except KeyError:
            return None
        try:
            if not isinstance(group, zarr.Group):
                raise TypeError("a group was expected")
            return read_raw_group(group, line_index, direction)
        except (OSError, KeyError, ValueError, TypeError) as error:
            raise StoreError(f"{self.path}: reading {where} failed: {error}") from error

    def nv_axis_rad(self) -> tuple[float, float] | None:
        """The NV axis (θ, φ) in rad recorded for the scan, or None where it is not.

        Stores record it in their attributes; stores written before that recorded it only
        with raw spectra, so those are looked up next (first committed line of each
        direction).
        """
        if "nv_theta_rad" in self.attrs and "nv_phi_rad" in self.attrs:
            return float(self.attrs["nv_theta_rad"]), float(self.attrs["nv_phi_rad"])
        for direction in DIRECTIONS:
            for line in self.committed_lines(direction)[:1]:
                try:
                    raw = self._group[f"raw/{direction}/{line}"]
                except KeyError:
                    continue
                attrs = raw.attrs.asdict()
                if "nv_theta_rad" in attrs and "nv_phi_rad" in attrs:
                    return float(attrs["nv_theta_rad"]), float(attrs["nv_phi_rad"])  # type: ignore[arg-type]
        return None


_LATER_MAPS = {spec.name: spec for spec in MAPS if spec.added_later}


def _read_sparse(array: zarr.Array, store_path: Path, array_path: str) -> np.ndarray:
    """The whole array, reading only the row chunks on disk when they are few.

    A scan of 65,536 planned lines with a few written has a few chunk files: reading
    them alone (the rest is the fill value) costs what was written, while zarr would
    look up every planned chunk. A mostly written map is read in one call.
    """
    if array.ndim != 2:
        return np.asarray(array[:])
    block = array.chunks[0]
    blocks = row_blocks_on_disk(store_path, array_path, block, array.shape[0])
    if 2 * len(blocks) >= -(-array.shape[0] // block):
        return np.asarray(array[:])
    out = np.full(array.shape, array.fill_value, dtype=array.dtype)
    for start, stop in blocks:
        out[start:stop] = array[start:stop]
    return out


def open_store_reader(path: Path) -> StoreReader:
    """Open ``path`` read-only: replay its ledger, then open its zarr group.

    Raises
    ------
    NotAScanStore
        If ``path`` holds no zarr group or one of another format.
    StoreError
        If the ledger exists but cannot be read.
    """
    path = Path(path)
    ledger = read_ledger_state(path)
    try:
        group = zarr.open_group(path, mode="r", zarr_format=3)
        attrs = dict(group.attrs.asdict())
    except (OSError, ValueError) as error:  # zarr's GroupNotFoundError is a FileNotFoundError
        raise NotAScanStore(f"{path}: cannot open as a scan store: {error}") from error
    if attrs.get("store_format") != STORE_FORMAT:
        raise NotAScanStore(
            f"{path}: attribute store_format must be {STORE_FORMAT!r}; "
            f"found {attrs.get('store_format')!r}"
        )
    return StoreReader(path, attrs, ledger, group)
