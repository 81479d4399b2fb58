"""``strayline refit SOURCE --out DIR``: fit archived scans again from the raw spectra their
stores kept, with another config (a better model, a recalibrated D, a new fitter), into new
stores; the source stores are only read.

Each refitted line goes through the daemon's own pipeline after reading (fit, field, store,
rules, products), so a refit with the config a store was written with gives the same maps,
bit for bit. Lines go in acquisition order (by line index, the forward trace first), one
task per source store; tasks run as :func:`~strayline.pipeline.folder.process_folder`
runs them (here, or on Dask distributed).

What the new store records of where it came from: every ledger commit names the line's
source as ``<source store>/raw/<direction>/<line index>`` with the original line file's
SHA-256, the software version and the digest of the refit's config; the store's attributes
hold that config. The refit's config is the given one with its outputs moved under
``--out`` (stores, products, state, alert log) and with no hook, stop-request file or
console alerts: old scans must not page anyone or stop the instrument.

A rerun with the same config and ``--out`` resumes: lines already committed are skipped
by their checksum. A store at the target that was written with another config (or from
another source) is refused, never mixed.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import TextIO

from strayline.config import Config, config_digest, config_from_mapping
from strayline.errors import StoreError
from strayline.lines import ScanLine
from strayline.pipeline.folder import ProcessProgress, ProcessSummary, in_batches, run_scan_tasks
from strayline.pipeline.line_pipeline import LinePipeline
from strayline.pipeline.outcome import LineOutcome
from strayline.store import StoreReader, open_store_reader, store_metadata_present, store_path

__all__ = ["refit_config", "refit_store", "refit_stores", "source_stores"]

#: The folder suffix of a scan store (``<scan_id>.zarr``).
_STORE_SUFFIX = ".zarr"


def source_stores(source: Path) -> list[Path]:
    """``source`` if it is a scan store, else every scan store below it, in path order.

    Raises
    ------
    FileNotFoundError
        If ``source`` does not exist.
    """
    source = Path(source).absolute()
    if not source.exists():
        raise FileNotFoundError(f"{source}: no such store or folder")
    if _is_store(source):
        return [source]
    found: list[Path] = []
    for folder, subfolders, _ in os.walk(source):
        here = Path(folder)
        stores = sorted(name for name in subfolders if _is_store(here / name))
        found += [here / name for name in stores]
        subfolders[:] = sorted(name for name in subfolders if name not in stores)
    return sorted(found)


def _is_store(path: Path) -> bool:
    return path.suffix == _STORE_SUFFIX and store_metadata_present(path)


def refit_config(config: Config, out: Path) -> Config:
    """``config`` with its outputs under ``out`` (stores and products in it, state in
    ``out/.strayline``, the alert log ``out/alerts.jsonl``) and its alerts kept to that log
    (no hook, no stop-request file, no console)."""
    out = Path(out).absolute()
    data = config.as_json_dict()
    data["paths"] = {
        **data["paths"],
        "output_root": str(out),
        "state_dir": str(out / ".strayline"),
        "alert_log": str(out / "alerts.jsonl"),
    }
    data["alerts"] = {**data["alerts"], "hook": {}, "stop_request_file": None, "console": False}
    data["products"] = {**data["products"], "folder": None}
    return config_from_mapping(data, base_dir=out, source=config.source)


def _stored_lines(
    reader: StoreReader, batch: Sequence[tuple[int, str]]
) -> list[tuple[Path, ScanLine]]:
    """The lines of ``batch`` as their raw spectra give them, each with its original file."""
    lines = []
    for index, direction in batch:
        raw = reader.read_raw(index, direction)
        if raw is None:
            raise StoreError(
                f"{reader.path}: line {index} ({direction}) has no raw spectra "
                "(store.raw_spectra was off when it was written): it cannot be refitted"
            )
        here = reader.path / "raw" / direction / str(index)
        lines.append(
            (Path(raw.source), raw.scan_line(reader.scan_id, reader.n_lines_planned, here))
        )
    return lines


def _check_target(reader: StoreReader, config: Config) -> None:
    """Refuse to refit into the source itself, or into a store holding another refit."""
    target = store_path(config.paths.output_root, reader.scan_id)
    if target.resolve() == reader.path.resolve():
        raise StoreError(
            f"{reader.path}: --out is the store's own folder; a refit never overwrites its source"
        )
    if not store_metadata_present(target):
        return
    existing = open_store_reader(target)
    digest = config_digest(config)
    if existing.attrs.get("config_digest") != digest:
        raise StoreError(
            f"{target}: holds a store written with another config (digest "
            f"{str(existing.attrs.get('config_digest'))[:12]}…, this refit's "
            f"{digest[:12]}…); choose another --out"
        )
    raw_of = f"{reader.path}/raw/"
    foreign = [
        e.source for e in existing.ledger.committed.values() if not e.source.startswith(raw_of)
    ]
    if foreign:
        raise StoreError(
            f"{target}: holds lines from {foreign[0]}, not from {reader.path}; choose another --out"
        )


def refit_store(config: Config, source: Path) -> ProcessSummary:
    """One task: every committed line of the store ``source`` fitted again with ``config``
    (a :func:`refit_config`) into the store of the same scan under its output root.

    Raises
    ------
    StoreError
        If the source cannot be read, a line has no raw spectra, the target holds another
        refit, or a store fails: lines committed before stay committed (a rerun skips them).
    """
    reader = open_store_reader(source)
    _check_target(reader, config)
    keys = sorted(reader.ledger.committed, key=lambda key: (key[0], key[1] != "forward"))
    pipeline = LinePipeline(
        config,
        root=reader.path,
        rule_state=config.paths.state_dir / "refit" / f"{reader.scan_id}.json",
        move_bad_files=False,
    )

    def run(batch: Sequence[tuple[int, str]]) -> list[LineOutcome]:
        return pipeline.process_lines(_stored_lines(reader, batch))

    return in_batches(pipeline, run, keys, lambda problem: StoreError(f"{reader.path}: {problem}"))


def refit_stores(
    config: Config,
    source: Path,
    out: Path,
    *,
    workers: int = 1,
    scheduler: str | None = None,
    progress: TextIO | None = None,
) -> ProcessSummary:
    """Refit every store at or below ``source`` with ``config`` into stores under ``out``.

    ``workers``, ``scheduler`` and ``progress`` as for
    :func:`~strayline.pipeline.folder.process_folder`: a task per source store.

    Raises
    ------
    FileNotFoundError
        If ``source`` does not exist or holds no scan store.
    StoreError
        The first task's failure, once every task has ended (work done is kept).
    """
    sources = source_stores(source)
    if not sources:
        raise FileNotFoundError(
            f"{Path(source).absolute()}: no scan store (<scan>.zarr) at or below it"
        )
    config = refit_config(config, out)
    lines = [len(open_store_reader(path).ledger.committed) for path in sources]
    meter = ProcessProgress(len(sources), sum(lines), progress)
    arguments = [(path,) for path in sources]
    return run_scan_tasks(
        refit_store, config, arguments, workers=workers, scheduler=scheduler, meter=meter
    )
