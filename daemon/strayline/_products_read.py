"""Read a scan store for the products stage, without taking its writer's lock.

Like ``strayline status``, this opens the zarr group read-only and parses the ledger file
itself, so it is safe while the daemon writes the scan. The ledger is read *before* the
maps: a line committed in between is left out, a line being written (begun, not
committed) is masked, so a half-written row never reaches a product.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from strayline._ledger import read_ledger_state
from strayline._products_maps import TraceMaps, assemble_trace
from strayline._store_layout import DIRECTIONS, STORE_FORMAT
from strayline.errors import LineFileError, StoreError
from strayline.lines import read_line_file
from strayline.store import MAP_NAMES

__all__ = ["StoreSnapshot", "nv_axis_from_store", "read_snapshot"]


@dataclass(frozen=True, eq=False)
class StoreSnapshot:
    """What the products need from one store.

    Attributes
    ----------
    path : Path
    attrs : dict
        The store's root attributes (scan id, sizes, config, digest, software version).
    traces : dict of str to TraceMaps
        Directions with at least one committed line.
    committed : dict of str to list of int
        Committed line indices per direction.
    sources : list of str
        Source files of the committed lines, in ledger order.
    """

    path: Path
    attrs: dict[str, Any]
    traces: dict[str, TraceMaps]
    committed: dict[str, list[int]]
    sources: list[str]

    @property
    def scan_id(self) -> str:
        return str(self.attrs["scan_id"])


def _open(store_path: Path) -> zarr.Group:
    try:
        group = zarr.open_group(store_path, mode="r", zarr_format=3)
        attrs = group.attrs.asdict()
    except (OSError, ValueError) as error:  # zarr's GroupNotFoundError is a FileNotFoundError
        raise StoreError(f"{store_path}: cannot open as a scan store: {error}") from error
    if attrs.get("store_format") != STORE_FORMAT:
        raise StoreError(
            f"{store_path}: attribute store_format must be {STORE_FORMAT!r}; "
            f"found {attrs.get('store_format')!r}"
        )
    return group


def _array(group: zarr.Group, path: str) -> np.ndarray:
    array = group[path]
    if not isinstance(array, zarr.Array):
        raise StoreError(f"{path} must be an array; found a group")
    return np.asarray(array[:])


def read_snapshot(store_path: Path) -> StoreSnapshot:
    """Read the committed part of every trace of a store.

    Raises
    ------
    StoreError
        If ``store_path`` is not a readable scan store.
    """
    store_path = Path(store_path)
    state = read_ledger_state(store_path)
    group = _open(store_path)
    attrs = dict(group.attrs.asdict())
    committed = {d: sorted(i for (i, dd) in state.committed if dd == d) for d in DIRECTIONS}
    traces: dict[str, TraceMaps] = {}
    try:
        for direction in DIRECTIONS:
            lines = committed[direction]
            if not lines:
                continue
            maps = {name: _array(group, f"{direction}/{name}") for name in MAP_NAMES}
            trace = assemble_trace(
                direction,
                _array(group, f"{direction}/x").astype(np.float64),
                _array(group, f"{direction}/y").astype(np.float64),
                np.asarray(lines),
                maps,
            )
            if trace is not None:
                traces[direction] = trace
    except KeyError as error:
        raise StoreError(f"{store_path}: store layout incomplete: missing {error}") from error
    except OSError as error:
        raise StoreError(f"{store_path}: reading the maps failed: {error}") from error
    sources = [entry.source for entry in state.committed.values()]
    return StoreSnapshot(store_path, attrs, traces, committed, sources)


def nv_axis_from_store(snapshot: StoreSnapshot) -> tuple[float, float] | None:
    """The NV axis (θ, φ) in rad recorded for the scan, or None if nowhere to be found.

    Looked up in the raw spectra of the first committed line (when stored), then in the
    committed lines' source files that still exist (read and validated as line files).
    """
    group = _open(snapshot.path)
    for direction in DIRECTIONS:
        for line in snapshot.committed[direction][:1]:
            try:
                raw = group[f"raw/{direction}/{line}"]
            except KeyError:
                continue
            attrs = raw.attrs.asdict()
            if "nv_theta_rad" in attrs and "nv_phi_rad" in attrs:
                return float(attrs["nv_theta_rad"]), float(attrs["nv_phi_rad"])  # type: ignore[arg-type]
    for source in snapshot.sources:
        try:
            line_file = read_line_file(source)
        except (OSError, LineFileError):
            continue
        return line_file.nv_theta_rad, line_file.nv_phi_rad
    return None
