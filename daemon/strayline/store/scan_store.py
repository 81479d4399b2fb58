"""The scan store: one zarr 3 store per scan, written line by line, with a crash-safe ledger.

Each processed line becomes one row of every map in ``<output_root>/<scan_id>.zarr``
(layout in :mod:`strayline.store._layout`); ``xarray.open_zarr(path, group="forward",
consolidated=False)`` gives a labelled dataset (dims ``y``, ``x``; coordinates in m) at any
time, also while the scan runs.

Commit protocol (ledger in :mod:`strayline.store._ledger`)
----------------------------------------------------
1. append a ``begin`` record for (line_index, direction) and fsync it;
2. write the line's rows into every map, its ``y`` and (optionally) its raw spectra; zarr
   replaces each chunk file atomically (temporary file, then rename); fsync the chunk files
   and their directories;
3. append a ``commit`` record and fsync it. Only now is the line committed.

A crash at any instant therefore leaves each line either committed (all rows written) or
pending/absent. :meth:`ScanStore.open` resets the rows of every line that began but did
not commit, and of every line whose rows are present without a commit (written by anything
that bypassed the ledger), removes zarr's leftover temporary files, and lists those lines
in :attr:`ScanStore.recovered_lines` so the caller processes their files again. A line
being *re*-written (its file changed) that crashes mid-way is reset too: its old rows were
partly overwritten, so the old version survives only in the ledger's history; the new file
is still on disk and is processed again.

Step 2's fsync (``durable=True``, the default) is what makes a commit survive power loss;
without it a commit survives a crash of the process only.

A store has one writer at a time: the ledger file is held under an exclusive ``flock``.
A :class:`ScanStore` is not thread-safe.
"""

from __future__ import annotations

import re
import shutil
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from types import TracebackType
from typing import Any, Literal, cast

import numpy as np
import zarr

import strayline
from strayline.errors import LineFileError, StoreError
from strayline.field import LineField
from strayline.fit import LineFit
from strayline.lines import ScanLine
from strayline.store._layout import (
    DIRECTIONS,
    LEDGER_FILE,
    MAPS,
    STATUS_FILL,
    STORE_FORMAT,
    STORE_FORMAT_VERSION,
    add_missing_maps,
    all_folders,
    chunk_file,
    compressors,
    create_layout,
    dirs_to_flush,
    flush_files,
    remove_creation_leftovers,
    remove_partials,
    row_blocks_on_disk,
    write_together,
)
from strayline.store._ledger import Key, Ledger, LedgerEntry, format_time
from strayline.store._raw import RawSpectra, read_raw_group, write_raw_group
from strayline.store._rows import count_failures, line_rows, planned_y
from strayline.store.reader import store_path

__all__ = [
    "MAP_NAMES",
    "Decision",
    "LedgerEntry",
    "RawSpectra",
    "ScanStore",
    "StoreMismatch",
    "StoreStatistics",
    "WriteReceipt",
    "line_rows",
]

Decision = Literal["new", "duplicate", "changed"]
MAP_NAMES: tuple[str, ...] = tuple(spec.name for spec in MAPS)
_SCAN_ID = re.compile(r"^[A-Za-z0-9_\-][A-Za-z0-9_.\-]*$")


class StoreMismatch(LineFileError):
    """A line does not fit its scan's store (pixels, line range, scan): quarantine the file."""


@dataclass(frozen=True)
class WriteReceipt:
    """What :meth:`ScanStore.write_line` did.

    Attributes
    ----------
    scan_id : str
    line_index : int
    direction : str
    write_s : float
        Wall time spent writing rows and ledger records, s.
    superseded : bool
        True if a committed version of the line was replaced.
    """

    scan_id: str
    line_index: int
    direction: str
    write_s: float
    superseded: bool


@dataclass(frozen=True)
class StoreStatistics:
    """Snapshot of a store's progress.

    Attributes
    ----------
    scan_id : str
    n_lines_planned : int
    committed_forward, committed_backward : int
        Lines committed per trace direction.
    lines_recovered : int
        Lines reset at the last open because they were not committed.
    fit_failures : int
        Pixels of committed lines whose status is not ``FitStatus.OK``.
    last_commit_time : datetime or None
        Time of the latest commit, aware UTC.
    """

    scan_id: str
    n_lines_planned: int
    committed_forward: int
    committed_backward: int
    lines_recovered: int
    fit_failures: int
    last_commit_time: datetime | None


def _utc_now() -> datetime:
    return datetime.now(UTC)


class ScanStore:
    """One scan's zarr store, open for writing. Build it with :meth:`open`."""

    def __init__(
        self,
        path: Path,
        root: zarr.Group,
        ledger: Ledger,
        *,
        raw_spectra: bool,
        compression_level: int,
        config_digest: str,
        clock: Callable[[], datetime],
        durable: bool,
    ) -> None:
        self.path = path
        attrs = root.attrs.asdict()
        self.scan_id: str = str(attrs["scan_id"])
        self.n_lines_planned: int = int(attrs["n_lines_planned"])  # type: ignore[arg-type]
        self.n_pixels: int = int(attrs["n_pixels"])  # type: ignore[arg-type]
        self.raw_spectra = raw_spectra
        self.recovered_lines: list[Key] = []
        self._root = root
        self._ledger = ledger
        self._codecs = compressors(compression_level)
        self._config_digest = config_digest
        self._clock = clock
        # Settled once: the per-line path calls these without looking at the options.
        self._put_raw = self._write_raw if raw_spectra else self._skip_raw
        self._flush = flush_files if durable else _skip_flush
        self._maps: dict[str, dict[str, Any]] = {}
        self._y: dict[str, Any] = {}
        self._raw: dict[str, Any] = {}
        for direction in DIRECTIONS:
            trace = root[direction]
            if not isinstance(trace, zarr.Group):
                raise KeyError(direction)
            arrays = dict(trace.arrays())  # fetched concurrently, unlike one by one
            self._maps[direction] = {name: arrays[name] for name in MAP_NAMES}
            self._y[direction] = arrays["y"]
            self._raw[direction] = root[f"raw/{direction}"]
        self._failures: dict[Key, int] = {}
        # The slow-axis coordinate, kept in memory: written lines and what they hold.
        x = np.asarray(arrays["x"][:], dtype=np.float64)
        steps = np.abs(np.diff(x[np.isfinite(x)]))
        self._pitch_m = float(np.median(steps)) if steps.size and np.median(steps) > 0 else 1e-9
        self._y_m: dict[str, np.ndarray] = {
            d: np.asarray(self._y[d][:], dtype=np.float64) for d in DIRECTIONS
        }
        self._y_written: dict[str, np.ndarray] = {
            d: np.zeros(self.n_lines_planned, dtype=bool) for d in DIRECTIONS
        }
        for i, d in ledger.state.committed:
            self._y_written[d][i] = True

    # ------------------------------------------------------------------ opening

    @classmethod
    def open(
        cls,
        output_root: Path,
        scan_id: str,
        *,
        n_lines_planned: int,
        n_pixels: int,
        x_m: np.ndarray,
        config_json: dict[str, Any],
        config_digest: str,
        nv_axis_rad: tuple[float, float] | None = None,
        tip_id: str | None = None,
        raw_spectra: bool = False,
        compression_level: int = 5,
        chunk_lines: int = 1,
        clock: Callable[[], datetime] = _utc_now,
        durable: bool = True,
    ) -> ScanStore:
        """Create ``<output_root>/<scan_id>.zarr`` or reopen it, recovering after a crash.

        Parameters
        ----------
        output_root : Path
            Directory holding the scans' stores (created if missing).
        scan_id : str
            Scan identifier; letters, digits, ``_``, ``-``, ``.`` (not leading ``.``).
        n_lines_planned, n_pixels : int
            Map shape; must match an existing store.
        x_m : ndarray, shape (n_pixels,)
            Fast-axis pixel positions, m; stored as the ``x`` coordinate at creation
            (an existing store keeps its own).
        config_json : dict
            The configuration (JSON-serialisable); stored in the attributes.
        config_digest : str
            Its digest; recorded in the attributes and in every ledger commit.
        nv_axis_rad : (float, float), optional
            The scan's NV axis (θ, φ) in rad, recorded in the attributes (``nv_theta_rad``,
            ``nv_phi_rad``) so that readers need not go back to the line files.
        tip_id : str, optional
            The NV tip that took the scan (the line file's ``tip_id``), recorded in the
            attributes (``tip_id``) at creation, or later if the store has none yet.
        raw_spectra : bool
            Also store each line's raw spectra.
        compression_level : int
            Blosc-Zstd level 0–9 for maps (at creation) and raw spectra.
        chunk_lines : int
            Lines per chunk at creation; an existing store keeps its own chunking.
        clock : callable returning an aware datetime
            Source of the ledger's processed times (injectable for tests).
        durable : bool
            fsync every line's chunk files before its commit record, so a committed line
            survives power loss, not only a crash of the process.

        Returns
        -------
        ScanStore
            With :attr:`recovered_lines` listing the lines reset by recovery.

        Raises
        ------
        StoreError
            If the store cannot be created or read, is held by another writer, or is
            incompatible (another format, scan, n_pixels or n_lines_planned).

        Notes
        -----
        A store written by an older version that lacks a map added since gets it here,
        filled for the lines it already holds (:func:`strayline.store._layout.add_missing_maps`).
        ValueError
            If an argument is invalid (a caller's bug).
        """
        if not _SCAN_ID.match(scan_id):
            raise ValueError(f"scan_id must match {_SCAN_ID.pattern}; found {scan_id!r}")
        if n_lines_planned < 1 or n_pixels < 1 or chunk_lines < 1:
            raise ValueError(
                "n_lines_planned, n_pixels and chunk_lines must be >= 1; found "
                f"{n_lines_planned}, {n_pixels}, {chunk_lines}"
            )
        if not 0 <= compression_level <= 9:
            raise ValueError(f"compression_level must be in 0..9; found {compression_level}")
        x_m = np.sort(np.asarray(x_m, dtype=np.float64))  # maps run in increasing x
        if x_m.shape != (n_pixels,):
            raise ValueError(f"x_m must have shape ({n_pixels},); found {x_m.shape}")

        output_root = Path(output_root)
        path = store_path(output_root, scan_id)
        try:
            output_root.mkdir(parents=True, exist_ok=True)
            remove_creation_leftovers(path)
            if not path.exists():
                attributes = {
                    "store_format": STORE_FORMAT,
                    "store_format_version": STORE_FORMAT_VERSION,
                    "scan_id": scan_id,
                    "n_lines_planned": n_lines_planned,
                    "n_pixels": n_pixels,
                    "config": config_json,
                    "config_digest": config_digest,
                    "other_configs": {},
                    **_axis_attributes(nv_axis_rad),
                    **({} if tip_id is None else {"tip_id": tip_id}),
                    "software_version": strayline.__version__,
                    "created_time": format_time(clock()),
                }
                try:
                    create_layout(
                        path,
                        attributes=attributes,
                        n_lines_planned=n_lines_planned,
                        n_pixels=n_pixels,
                        x_m=x_m,
                        compression_level=compression_level,
                        chunk_lines=chunk_lines,
                    )
                except OSError:
                    if not path.exists():  # lost a creation race: reopen the winner's store
                        raise
        except OSError as exc:
            raise StoreError(f"{path}: creating the store failed: {exc}") from exc

        root = _open_root(path, scan_id, n_lines_planned, n_pixels)
        ledger = Ledger.open(path / LEDGER_FILE)  # takes the writer's lock
        try:
            remove_partials(path)
            add_missing_maps(path, root, compression_level)
            store = cls(
                path,
                root,
                ledger,
                raw_spectra=raw_spectra,
                compression_level=compression_level,
                config_digest=config_digest,
                clock=clock,
                durable=durable,
            )
            store._recover()
            store._plan_y()
            store._note_config(config_json, config_digest)
            store._note_nv_axis(nv_axis_rad)
            store._note_tip(tip_id)
        except KeyError as exc:
            ledger.close()
            raise StoreError(f"{path}: store layout incomplete: missing {exc}") from exc
        except OSError as exc:
            ledger.close()
            if isinstance(exc, StoreError):
                raise
            raise StoreError(f"{path}: recovering the store at open failed: {exc}") from exc
        except BaseException:
            ledger.close()
            raise
        return store

    def _note_config(self, config_json: dict[str, Any], config_digest: str) -> None:
        """Keep every configuration that wrote to this store in its attributes."""
        attrs = self._root.attrs.asdict()
        others = dict(cast(dict[str, Any], attrs.get("other_configs") or {}))
        if config_digest != attrs["config_digest"] and config_digest not in others:
            others[config_digest] = config_json
            self._guard(
                "recording the configuration",
                self._root.update_attributes,
                {"other_configs": others},
            )

    def _plan_y(self) -> None:
        """Give lines not yet written their planned position (stores written before did
        not: NaN), writing only what changes."""
        for direction in DIRECTIONS:
            y = planned_y(self._y_m[direction], self._y_written[direction], self._pitch_m)
            if not np.array_equal(y, self._y_m[direction], equal_nan=True):
                self._guard("planning the slow-axis coordinate", self._put_y, direction)

    def _note_nv_axis(self, nv_axis_rad: tuple[float, float] | None) -> None:
        """Record the NV axis in a store created before stores recorded it."""
        if nv_axis_rad is None or "nv_theta_rad" in self._root.attrs:
            return
        self._guard(
            "recording the NV axis", self._root.update_attributes, _axis_attributes(nv_axis_rad)
        )

    def _note_tip(self, tip_id: str | None) -> None:
        """Record the tip in a store that has none recorded (created before, or by lines
        that named none)."""
        if tip_id is None or self._root.attrs.get("tip_id") is not None:
            return
        self._guard("recording the tip", self._root.update_attributes, {"tip_id": tip_id})

    def _recover(self) -> None:
        """Reset rows of uncommitted lines, remove temporary files, count failures."""
        state = self._ledger.state
        to_reset: set[Key] = set(state.pending)
        for direction in DIRECTIONS:
            done = {i for (i, d) in state.committed if d == direction}
            to_reset |= {(i, direction) for i in self._stray_lines(direction, done)}
        for key in sorted(to_reset):
            self._clear_rows(key)
        self._flush_reset(sorted(to_reset))
        if to_reset:
            when = format_time(self._clock())
            self._ledger.append(
                {"event": "reset", "line_index": i, "direction": d, "time": when}
                for (i, d) in sorted(to_reset)
            )
        self.recovered_lines = sorted(to_reset)
        for direction in DIRECTIONS:
            done = {i for (i, d) in state.committed if d == direction}
            status = self._maps[direction]["status"]
            for start, stop in self._blocks_on_disk(direction, "status"):
                wanted = done.intersection(range(start, stop))
                if wanted:
                    rows = status[start:stop]
                    for i in wanted:
                        self._failures[(i, direction)] = count_failures(rows[i - start])

    def _stray_lines(self, direction: str, done: set[int]) -> set[int]:
        """Uncommitted line indices with any non-fill value in a map or raw spectra (``y``
        holds planned positions for every line and tells nothing).

        Only chunks that exist on disk and cover an uncommitted line are read, so a store
        closed cleanly costs a directory listing per map.
        """
        lines: set[int] = set()
        for spec in MAPS:
            array = self._maps[direction][spec.name]
            for start, stop in self._blocks_on_disk(direction, spec.name):
                if done.issuperset(range(start, stop)):
                    continue
                rows = array[start:stop]
                if spec.dtype == "uint8":
                    present = np.any(rows != STATUS_FILL, axis=1)
                else:
                    present = np.any(~np.isnan(rows), axis=1)
                lines |= {start + int(k) for k in np.flatnonzero(present)}
        raw_dir = self.path / "raw" / direction
        lines |= {int(p.name) for p in raw_dir.iterdir() if p.is_dir() and p.name.isdigit()}
        return lines - done

    def _blocks_on_disk(self, direction: str, name: str) -> list[tuple[int, int]]:
        """Row ranges of the chunks of one map that exist on disk."""
        block = self._maps[direction][name].chunks[0]
        return row_blocks_on_disk(self.path, f"{direction}/{name}", block, self.n_lines_planned)

    def _clear_rows(self, key: Key) -> None:
        index, direction = key
        for spec in MAPS:
            self._maps[direction][spec.name][index, :] = spec.fill
        self._y_written[direction][index] = False
        self._put_y(direction)
        raw_line = self.path / "raw" / direction / str(index)
        if raw_line.exists():
            shutil.rmtree(raw_line)
        self._failures.pop(key, None)

    def _flush_reset(self, keys: list[Key]) -> None:
        """Make the reset of ``keys`` durable: the files holding their rows (maps, ``y``)
        and every folder up to the store's root (a reset rarely runs; no need to know which
        folders changed)."""
        if not keys:
            return
        files = []
        for index, direction in keys:
            for spec in MAPS:
                block = self._maps[direction][spec.name].chunks[0]
                files.append(chunk_file(self.path, f"{direction}/{spec.name}", (index // block, 0)))
            files.append(chunk_file(self.path, f"{direction}/y", (0,)))
            files.append(self.path / "raw" / direction / str(index))  # its folder is flushed
        self._flush(*all_folders(files, self.path))

    # ------------------------------------------------------------------ writing

    def decide(self, line: ScanLine) -> Decision:
        """Whether a line is new, a duplicate of its committed version, or a changed file.

        A line without a checksum (``sha256`` None) never counts as a duplicate.
        """
        entry = self._ledger.state.committed.get((line.line_index, line.direction))
        if entry is None:
            return "new"
        if line.sha256 is not None and entry.sha256 == line.sha256:
            return "duplicate"
        return "changed"

    def write_line(self, line: ScanLine, fit: LineFit, field: LineField) -> WriteReceipt:
        """Write one line's rows, then commit it: :meth:`write_lines` with one line."""
        return self.write_lines([(line, fit, field)])[0]

    def write_lines(
        self, items: Sequence[tuple[ScanLine, LineFit, LineField]]
    ) -> list[WriteReceipt]:
        """Write several lines' rows, then commit them together (a group commit).

        One ``begin`` append for all of them, every row written in one pass over the maps
        (a chunk holding several of the lines is written once), one flush, one ``commit``
        append: each line is committed, or (crash before the commit append) reset at the
        next open, exactly as if written alone. Lines ready at the same moment cost one
        set of fsyncs instead of one per line.

        Parameters
        ----------
        items : sequence of (ScanLine, LineFit, LineField)
            The lines, each at most once (a (line_index, direction) may not repeat).

        Returns
        -------
        list of WriteReceipt
            One per line, in order; ``write_s`` is the group's time shared equally.

        Raises
        ------
        StoreMismatch
            If a line belongs to another scan or does not fit the store's shape (nothing
            is written: check lines with :meth:`check_line` first to single one out).
        StoreError
            If writing to disk fails; no line of the group is committed.
        ValueError
            If a line repeats, or ``fit``/``field`` disagree with their line (a caller's bug).
        """
        self._check_open()
        if not items:
            return []
        keys: list[Key] = []
        rows: list[dict[str, np.ndarray]] = []
        for line, fit, field in items:
            self.check_line(line)
            key: Key = (line.line_index, line.direction)
            if key in keys:
                raise ValueError(f"line {key[0]} ({key[1]}) appears twice in one group")
            keys.append(key)
            rows.append(line_rows(line, fit, field))
        lines = [line for line, _, _ in items]
        started = time.perf_counter()
        superseded = [key in self._ledger.state.committed for key in keys]
        what = _describe(keys)
        when = format_time(self._clock())
        self._ledger.append(
            {**_where(line), "event": "begin", "time": when, "sha256": line.sha256}
            for line in lines
        )
        files, dirs = self._guard(f"writing {what}", self._write_rows, keys, rows, lines)
        self._guard(f"flushing {what}", self._flush, files, dirs)
        group = self._ledger.state.commit_count
        commit = {
            "event": "commit",
            "group": group,
            "processed_time": format_time(self._clock()),
            "software_version": strayline.__version__,
            "config_digest": self._config_digest,
        }
        self._ledger.append({**_where(line), **commit, "sha256": line.sha256} for line in lines)
        for key, row in zip(keys, rows, strict=True):
            self._failures[key] = count_failures(row["status"])
        share = (time.perf_counter() - started) / len(keys)
        return [
            WriteReceipt(
                scan_id=self.scan_id,
                line_index=key[0],
                direction=key[1],
                write_s=share,
                superseded=old,
            )
            for key, old in zip(keys, superseded, strict=True)
        ]

    def _write_rows(
        self, keys: list[Key], rows: list[dict[str, np.ndarray]], lines: list[ScanLine]
    ) -> tuple[list[Path], set[Path]]:
        """Write the rows of ``keys`` into every map and ``y``, then their raw spectra;
        returns the files written and the folders whose entries changed (what a durable
        commit must flush).

        Each map's rows go in runs of consecutive lines. All maps are written together, one
        run each at a time (``rounds``): two runs of one map may share a chunk (lines 0 and
        2 in chunks of 3), and written concurrently each would read the chunk, change its
        own rows and write it back, the last undoing the first.
        """
        files: list[Path] = []
        dirs: set[Path] = set()
        rounds: list[list[tuple[Any, tuple[slice, ...], np.ndarray]]] = [[]]
        for direction in DIRECTIONS:
            picked = [k for k, key in enumerate(keys) if key[1] == direction]
            if not picked:
                continue
            maps = self._maps[direction]
            index = np.array([keys[k][0] for k in picked])
            for k in picked:
                self._y_m[direction][keys[k][0]] = float(lines[k].y_m)
                self._y_written[direction][keys[k][0]] = True
            self._y_m[direction] = planned_y(
                self._y_m[direction], self._y_written[direction], self._pitch_m
            )
            rounds[0].append((self._y[direction], (slice(None),), self._y_m[direction]))
            files.append(chunk_file(self.path, f"{direction}/y", (0,)))
            # Maps are in increasing x, whatever order the pixels were acquired in (a
            # backward trace is written in decreasing x; its x_m says where each pixel is).
            orders = [np.argsort(np.asarray(lines[k].x_m), kind="stable") for k in picked]
            for name in MAP_NAMES:
                array = maps[name]
                block = array.chunks[0]
                for n, (start, stop, members) in enumerate(_runs(index)):
                    data = np.stack([np.asarray(rows[picked[m]][name])[orders[m]] for m in members])
                    if n == len(rounds):
                        rounds.append([])
                    rounds[n].append((array, (slice(start, stop), slice(None)), data))
                for chunk in sorted({int(i) // block for i in index}):
                    files.append(chunk_file(self.path, f"{direction}/{name}", (chunk, 0)))
        dirs |= dirs_to_flush(files, self.path)
        for writes in rounds:
            write_together(writes)
        for key, line in zip(keys, lines, strict=True):
            raw_line = self.path / "raw" / key[1] / str(key[0])
            if raw_line.exists():  # spectra of a superseded version
                shutil.rmtree(raw_line)
                dirs.add(raw_line.parent)
            dirs |= dirs_to_flush([raw_line / "zarr.json"], self.path)
            self._put_raw(key, line)
            if raw_line.is_dir():
                for path in raw_line.rglob("*"):
                    (dirs.add if path.is_dir() else files.append)(path)
        return files, dirs

    def _put_y(self, direction: str) -> None:
        """Write the slow-axis coordinate whole (one chunk): written lines' own positions,
        planned ones for the rest (:func:`planned_y`)."""
        y = planned_y(self._y_m[direction], self._y_written[direction], self._pitch_m)
        self._y_m[direction] = y
        self._y[direction][:] = y

    def _skip_raw(self, key: Key, line: ScanLine) -> None:
        """Raw spectra are off for this store."""

    def _write_raw(self, key: Key, line: ScanLine) -> None:
        """Store the line's spectra as group ``raw/<direction>/<line_index>``."""
        write_raw_group(self._raw[key[1]], line, self._codecs)

    def check_line(self, line: ScanLine) -> None:
        """Raise :class:`StoreMismatch` if ``line`` cannot be written to this store (another
        scan, direction, shape or an index outside the plan)."""
        store = f"store {self.path.name}"
        if line.scan_id != self.scan_id:
            raise StoreMismatch(
                line.source, "scan_id", f"{self.scan_id!r} ({store})", repr(line.scan_id)
            )
        if line.direction not in DIRECTIONS:
            raise StoreMismatch(
                line.source, "direction", "'forward' or 'backward'", repr(line.direction)
            )
        if line.n_lines_planned != self.n_lines_planned:
            raise StoreMismatch(
                line.source,
                "n_lines_planned",
                f"{self.n_lines_planned} (as in {store})",
                str(line.n_lines_planned),
            )
        if line.n_pixels != self.n_pixels:
            raise StoreMismatch(
                line.source, "n_pixels", f"{self.n_pixels} (as in {store})", str(line.n_pixels)
            )
        if not 0 <= line.line_index < self.n_lines_planned:
            raise StoreMismatch(
                line.source,
                "line_index",
                f"in 0..{self.n_lines_planned - 1} ({store} plans {self.n_lines_planned} lines)",
                str(line.line_index),
            )

    # ------------------------------------------------------------------ reading

    def committed(self) -> dict[tuple[int, str], LedgerEntry]:
        """Committed lines by (line_index, direction), with their superseded versions."""
        return dict(self._ledger.state.committed)

    def last_group(self) -> tuple[tuple[Key, ...], int]:
        """The lines of the latest group commit, in commit order, and how many commit
        records the ledger holds (superseding commits included): what the pipeline checks
        the rule engine's last evaluated line against after a restart (a crash between a
        group's commit and its evaluation leaves the group's lines unevaluated)."""
        state = self._ledger.state
        return state.last_group, state.commit_count

    def statistics(self) -> StoreStatistics:
        """A frozen snapshot of progress; reads no data from disk."""
        committed = self._ledger.state.committed
        return StoreStatistics(
            scan_id=self.scan_id,
            n_lines_planned=self.n_lines_planned,
            committed_forward=sum(1 for (_, d) in committed if d == "forward"),
            committed_backward=sum(1 for (_, d) in committed if d == "backward"),
            lines_recovered=len(self.recovered_lines),
            fit_failures=sum(self._failures.values()),
            last_commit_time=self._ledger.state.last_commit_time,
        )

    def read_map(self, name: str, direction: str) -> np.ndarray:
        """One whole map, shape (n_lines_planned, n_pixels), fill where not written.

        Raises
        ------
        KeyError
            If ``name`` is not in :data:`MAP_NAMES` or ``direction`` is unknown.
        """
        return self._guard(
            f"reading {direction}/{name}", self._maps[direction][name].__getitem__, slice(None)
        )

    def read_raw(self, line_index: int, direction: str) -> RawSpectra | None:
        """The stored raw spectra of a committed line, or None if none were stored."""
        if (line_index, direction) not in self._ledger.state.committed:
            return None
        if not (self.path / "raw" / direction / str(line_index)).is_dir():
            return None
        return read_raw_group(self._raw[direction][str(line_index)], line_index, direction)

    # ------------------------------------------------------------------ lifetime

    def close(self) -> None:
        """Release the store (idempotent). Every committed line is already on disk."""
        self._ledger.close()

    def __enter__(self) -> ScanStore:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def _check_open(self) -> None:
        if self._ledger.closed:
            raise StoreError(f"{self.path}: the store is closed")

    def _guard(self, operation: str, call: Callable[..., Any], *args: Any) -> Any:
        """Run an I/O call, turning an OSError into a StoreError naming store and operation."""
        try:
            return call(*args)
        except StoreError:
            raise
        except OSError as exc:
            raise StoreError(f"{self.path}: {operation} failed: {exc}") from exc


def _skip_flush(files: list[Path], dirs: set[Path]) -> None:
    """Durability against power loss is off: the OS writes the rows back in its time."""


def _where(line: ScanLine) -> dict[str, Any]:
    """The fields that name a line's file in its ledger records."""
    return {"line_index": line.line_index, "direction": line.direction, "source": str(line.source)}


def _describe(keys: list[Key]) -> str:
    """``line 4 (forward)``, or ``lines 4 (forward) … 9 (backward) (6 lines)``."""
    first, last = keys[0], keys[-1]
    if len(keys) == 1:
        return f"line {first[0]} ({first[1]})"
    return f"lines {first[0]} ({first[1]}) … {last[0]} ({last[1]}) ({len(keys)} lines)"


def _runs(index: np.ndarray) -> Iterator[tuple[int, int, list[int]]]:
    """Runs of consecutive row indices: (start, stop, positions in ``index``), in row
    order; ``index`` holds distinct rows in any order."""
    order = np.argsort(index, kind="stable")
    rows = index[order]
    breaks = np.flatnonzero(np.diff(rows) != 1) + 1
    for part in np.split(np.arange(rows.size), breaks):
        yield int(rows[part[0]]), int(rows[part[-1]]) + 1, [int(order[p]) for p in part]


def _axis_attributes(nv_axis_rad: tuple[float, float] | None) -> dict[str, float]:
    if nv_axis_rad is None:
        return {}
    return {"nv_theta_rad": float(nv_axis_rad[0]), "nv_phi_rad": float(nv_axis_rad[1])}


def _open_root(path: Path, scan_id: str, n_lines_planned: int, n_pixels: int) -> zarr.Group:
    """Open an existing store's root group and check it can take this scan."""
    try:
        root = zarr.open_group(path, mode="r+", zarr_format=3)
        attrs = root.attrs.asdict()
    except (OSError, ValueError) as exc:
        raise StoreError(f"{path}: cannot open as a zarr 3 group: {exc}") from exc
    layout = (attrs.get("store_format"), attrs.get("store_format_version"))
    if layout != (STORE_FORMAT, STORE_FORMAT_VERSION):
        raise StoreError(
            f"{path}: attributes store_format, store_format_version must be "
            f"{STORE_FORMAT!r}, {STORE_FORMAT_VERSION}; found {layout[0]!r}, {layout[1]!r}"
        )
    for key, wanted in (
        ("scan_id", scan_id),
        ("n_lines_planned", n_lines_planned),
        ("n_pixels", n_pixels),
    ):
        if attrs.get(key) != wanted:
            # The incoming line disagrees with its scan's store: the line's file is the odd
            # one out, so this is a StoreMismatch (the caller quarantines the file).
            raise StoreMismatch(
                path,
                f"attribute '{key}'",
                f"{attrs.get(key)!r} (as in the scan's store)",
                repr(wanted),
            )
    return root
