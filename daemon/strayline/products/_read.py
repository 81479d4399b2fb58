"""Read a scan store for the products stage, through the store's read-only reader.

The reader replays the ledger before any map is read: a line committed in between is
left out, a line being written (begun, not committed) is masked, so a half-written row
never reaches a product.
"""

from __future__ import annotations

from collections.abc import Collection
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from strayline.errors import LineFileError
from strayline.lines import DIRECTIONS, read_line_file
from strayline.products._maps import TraceMaps, assemble_trace
from strayline.store import MAP_NAMES, StoreReader, open_store_reader

__all__ = ["StoreSnapshot", "nv_axis_from_store", "read_snapshot"]


@dataclass(frozen=True, eq=False)
class StoreSnapshot:
    """What the products need from one store.

    Attributes
    ----------
    path : Path
    attrs : dict
        The store's root attributes (scan id, sizes, NV axis, config, digest, version).
    traces : dict of str to TraceMaps
        Directions with at least one committed line.
    committed : dict of str to list of int
        Committed line indices per direction.
    sources : list of str
        Source files of the committed lines, in ledger order.
    reader : StoreReader
        The read-only view the snapshot was taken from.
    """

    path: Path
    attrs: dict[str, Any]
    traces: dict[str, TraceMaps]
    committed: dict[str, list[int]]
    sources: list[str]
    reader: StoreReader

    @property
    def scan_id(self) -> str:
        return str(self.attrs["scan_id"])

    @property
    def profile(self) -> str | None:
        """The sample-type profile the scan was written with (None: the base config)."""
        config = self.attrs.get("config")
        profile = config.get("_profile") if isinstance(config, dict) else None
        return profile if isinstance(profile, str) else None

    @property
    def lines_planned(self) -> int | None:
        """Lines the scan plans, as its first line file said (None if not recorded)."""
        planned = self.attrs.get("n_lines_planned")
        return planned if isinstance(planned, int) and planned > 0 else None

    @property
    def started(self) -> datetime | None:
        """When the store was created (aware), None if not recorded or not readable."""
        text = self.attrs.get("created_time")
        try:
            moment = datetime.fromisoformat(text) if isinstance(text, str) else None
        except ValueError:
            return None
        return moment if moment is not None and moment.tzinfo is not None else None


def read_snapshot(store_path: Path, maps: Collection[str] = MAP_NAMES) -> StoreSnapshot:
    """Read the committed part of every trace of a store.

    ``maps`` names the maps to read (every one by default; a picture that needs a few
    reads only those).

    Raises
    ------
    StoreError
        If ``store_path`` is not a readable scan store.
    """
    reader = open_store_reader(Path(store_path))
    committed: dict[str, list[int]] = {d: reader.committed_lines(d) for d in DIRECTIONS}
    traces: dict[str, TraceMaps] = {}
    for direction in DIRECTIONS:
        lines = committed[direction]
        if not lines:
            continue
        trace = assemble_trace(
            direction,
            reader.read_array("x", direction).astype(np.float64),
            reader.read_array("y", direction).astype(np.float64),
            np.asarray(lines),
            {name: reader.read_array(name, direction) for name in maps},
        )
        if trace is not None:
            traces[direction] = trace
    sources = [entry.source for entry in reader.ledger.committed.values()]
    return StoreSnapshot(reader.path, reader.attrs, traces, committed, sources, reader)


def nv_axis_from_store(snapshot: StoreSnapshot) -> tuple[float, float] | None:
    """The NV axis (θ, φ) in rad recorded for the scan, or None if nowhere to be found.

    The store records it (:meth:`StoreReader.nv_axis_rad`); for a store written before
    stores recorded it and without raw spectra, the committed lines' source files that
    still exist are read (validated as line files).
    """
    axis = snapshot.reader.nv_axis_rad()
    if axis is not None:
        return axis
    for source in snapshot.sources:
        try:
            line_file = read_line_file(source)
        except (OSError, LineFileError):
            continue
        return line_file.nv_theta_rad, line_file.nv_phi_rad
    return None
