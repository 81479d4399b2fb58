"""``strayline process DIR``: every line file below a folder, once, through the daemon's
own pipeline, one task per scan folder: in this process, or on a Dask distributed cluster
(an embedded local one, or a running scheduler by address).

A scan's lines must be judged by the rules in order, so a scan is one task; scans are
independent, so they run side by side. Each task keeps its rule state in its own file
(``<state_dir>/process/<scan folder>.json``), so tasks never share a file but the stores,
whose one-writer lock keeps two tasks from one store, and the append-only alert log and
JSON log. The stores are the same, bit for bit, whatever the number of workers.
"""

from __future__ import annotations

import math
import re
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TextIO, TypeVar

from strayline._numbers import duration_text
from strayline.config import Config
from strayline.lines import line_key_from_name
from strayline.pipeline._cluster import (
    cap_fit_threads,
    dask_client,
    default_workers,
    fit_threads,
    run_tasks,
)
from strayline.pipeline.line_pipeline import LinePipeline
from strayline.pipeline.outcome import LineOutcome
from strayline.watch import LineNames, list_tree

T = TypeVar("T")

__all__ = [
    "ProcessProgress",
    "ProcessSummary",
    "acquisition_order",
    "default_workers",
    "in_batches",
    "process_folder",
    "process_scan_files",
    "rule_state_file",
    "run_scan_tasks",
    "scan_tasks",
    "summarise",
]


@dataclass(frozen=True)
class ProcessSummary:
    """What one ``process`` pass did (``scans``: scan folders; ``wall_s``: its duration)."""

    files: int
    written: int
    duplicates: int
    quarantined: int
    vanished: int
    pixels_failed: int
    alerts: int
    scans: int = 0
    wall_s: float = 0.0
    workers: int = 1

    def __add__(self, other: ProcessSummary) -> ProcessSummary:
        return ProcessSummary(
            files=self.files + other.files,
            written=self.written + other.written,
            duplicates=self.duplicates + other.duplicates,
            quarantined=self.quarantined + other.quarantined,
            vanished=self.vanished + other.vanished,
            pixels_failed=self.pixels_failed + other.pixels_failed,
            alerts=self.alerts + other.alerts,
            scans=self.scans + other.scans,
            wall_s=max(self.wall_s, other.wall_s),
            workers=max(self.workers, other.workers),
        )


def summarise(outcomes: list[LineOutcome]) -> ProcessSummary:
    """Add up outcomes (a growing file gives one per line, counted as a file each)."""
    kinds = [o.kind for o in outcomes]
    return ProcessSummary(
        files=len(outcomes),
        written=kinds.count("written"),
        duplicates=kinds.count("duplicate"),
        quarantined=kinds.count("quarantined"),
        vanished=kinds.count("vanished"),
        pixels_failed=sum(o.failures for o in outcomes),
        alerts=sum(len(o.events) for o in outcomes),
        scans=1,
    )


def acquisition_order(path: Path) -> tuple[Path, float, int, str]:
    """Sort key of a line file in the order an instrument writes them: per scan folder, by
    line index, the forward trace before the backward one; names that do not follow the
    contract's pattern come last, by name."""
    index, direction = line_key_from_name(path.name)
    return (
        path.parent,
        math.inf if index is None else index,
        1 if direction == "backward" else 0,
        path.name,
    )


#: Files handed to the pipeline at once by a ``process`` pass: the consecutive lines of one
#: scan among them are committed as one group (one set of fsyncs, each chunk written once).
PROCESS_BATCH = 64

_UNSAFE = re.compile(r"[^A-Za-z0-9_.\-]+")


def scan_tasks(config: Config, folder: Path) -> list[tuple[Path, list[Path]]]:
    """Every line file below ``folder``, per scan folder (the folder holding it), in
    acquisition order; scan folders in path order.

    Raises
    ------
    FileNotFoundError
        If ``folder`` cannot be listed.
    """
    folder = Path(folder).absolute()
    listing = list_tree(folder, LineNames(folder, readers=config.reader_choice))
    if listing.error is not None and not listing.files:
        raise FileNotFoundError(f"{folder}: {listing.error}")
    tasks: dict[Path, list[Path]] = {}
    for path in sorted(listing.files, key=acquisition_order):
        tasks.setdefault(path.parent, []).append(path)
    return list(tasks.items())


def rule_state_file(config: Config, root: Path, scan_folder: Path) -> Path:
    """Where a ``process`` pass keeps the rule state of one scan folder."""
    relative = scan_folder.relative_to(root).as_posix() if scan_folder != root else "_"
    return config.paths.state_dir / "process" / f"{_UNSAFE.sub('_', relative)}.json"


def process_scan_files(config: Config, root: Path, files: list[Path]) -> ProcessSummary:
    """One task: the line files of one scan folder through one pipeline, in order,
    :data:`PROCESS_BATCH` at a time, its rule state in :func:`rule_state_file`.

    Raises
    ------
    OSError
        If the store fails or a file cannot be read: the task stops (files before it are
        done; a second pass skips them).
    """
    pipeline = LinePipeline(
        config, root=root, rule_state=rule_state_file(config, root, files[0].parent)
    )
    return in_batches(pipeline, pipeline.process_many, files, OSError)


def in_batches(
    pipeline: LinePipeline,
    run: Callable[[Sequence[T]], list[LineOutcome]],
    items: Sequence[T],
    error: Callable[[str], Exception],
) -> ProcessSummary:
    """``run`` over ``items`` :data:`PROCESS_BATCH` at a time, then close ``pipeline``; the
    first ``unreadable`` outcome stops the task with ``error`` (what is done is kept)."""
    outcomes: list[LineOutcome] = []
    try:
        for start in range(0, len(items), PROCESS_BATCH):
            batch = run(items[start : start + PROCESS_BATCH])
            outcomes += batch
            unreadable = [o for o in batch if o.kind == "unreadable"]
            if unreadable:
                raise error(f"{unreadable[0].path}: {unreadable[0].problem}")
    finally:
        pipeline.close()
    return summarise(outcomes)


@dataclass
class ProcessProgress:
    """Progress of a pass, printed as one line per update (rewritten in place on a
    terminal): scans and lines done, the line rate and the time left."""

    scans_total: int
    lines_total: int
    stream: TextIO | None = None
    scans_done: int = 0
    lines_done: int = 0
    started_s: float = 0.0

    def __post_init__(self) -> None:
        self.started_s = time.monotonic()

    def add(self, summary: ProcessSummary) -> None:
        self.scans_done += 1
        self.lines_done += summary.files
        self.show()

    def text(self) -> str:
        elapsed = max(time.monotonic() - self.started_s, 1e-9)
        rate = self.lines_done / elapsed
        left = (self.lines_total - self.lines_done) / rate if rate > 0 else math.inf
        eta = "?" if not math.isfinite(left) else duration_text(left)
        return (
            f"scans {self.scans_done}/{self.scans_total} · lines {self.lines_done}/"
            f"{self.lines_total} · {rate:.1f} lines/s · {eta} left"
        )

    def show(self) -> None:
        if self.stream is None:
            return
        if self.stream.isatty():
            end = "\n" if self.scans_done == self.scans_total else ""
            self.stream.write(f"\r{self.text()}{end}")
        else:
            self.stream.write(self.text() + "\n")
        self.stream.flush()


def process_folder(
    config: Config,
    folder: Path,
    *,
    workers: int = 1,
    scheduler: str | None = None,
    progress: TextIO | None = None,
) -> ProcessSummary:
    """Process every line file below ``folder`` once, scan folder by scan folder
    (:func:`scan_tasks`), then return.

    The same pipeline as the daemon: already committed identical files are skipped, bad
    files are quarantined.

    Parameters
    ----------
    workers : int
        The cores to use (:func:`run_scan_tasks`): 1, the scans one after another in this
        process on one core; more, that many single-threaded worker processes of an
        embedded Dask cluster (fewer when there are fewer scans, their fits then
        threaded over the cores left).
    scheduler : str or None
        Address of a running Dask scheduler (``tcp://host:8786``): its workers run the
        scans, one fit thread each (they must reach the folders and have strayline
        installed); ``workers`` is then unused.
    progress : text stream or None
        Where the progress line goes (None: nowhere).

    Raises
    ------
    OSError
        If a store fails or a file cannot be read: the pass stops after the scans under
        way (work done is kept; a second pass skips it).
    """
    root = Path(folder).absolute()
    tasks = scan_tasks(config, root)
    meter = ProcessProgress(len(tasks), sum(len(files) for _, files in tasks), progress)
    arguments = [(root, files) for _, files in tasks]
    return run_scan_tasks(
        process_scan_files, config, arguments, workers=workers, scheduler=scheduler, meter=meter
    )


def run_scan_tasks(
    task: Callable[..., ProcessSummary],
    config: Config,
    arguments: list[tuple[Any, ...]],
    *,
    workers: int,
    scheduler: str | None,
    meter: ProcessProgress,
) -> ProcessSummary:
    """``task(config, *args)`` for each ``args`` (a scan each) on ``workers`` cores: one
    after another here when one worker is enough (``workers`` 1, or a single scan: its fit
    kernels then get the ``workers`` cores), else on Dask: as many single-threaded worker
    processes of an embedded cluster as there are scans, at most ``workers``, the cores
    shared out; or on the cluster of ``scheduler``, one fit thread per task. The summaries
    are added up as they finish.

    Raises
    ------
    Exception
        The first task's failure, once every task has ended.
    """
    started = time.monotonic()
    total = ProcessSummary(0, 0, 0, 0, 0, 0, 0)
    cores, workers = workers, max(1, min(workers, len(arguments)))  # a worker per scan at most
    if workers == 1 and scheduler is None:
        with fit_threads(cores):
            for args in arguments:
                summary = task(config, *args)
                meter.add(summary)
                total += summary
    else:
        threads = max(1, cores // workers) if scheduler is None else 1
        calls = [(task, config, threads, *args) for args in arguments]
        with dask_client(workers, scheduler) as client:
            for summary in run_tasks(client, _in_worker, calls, task.__name__):
                meter.add(summary)
                total += summary
    wall_s = time.monotonic() - started
    return ProcessSummary(**{**total.__dict__, "wall_s": wall_s, "workers": workers})


def _in_worker(
    task: Callable[..., ProcessSummary], config: Config, threads: int, *args: Any
) -> ProcessSummary:
    """A task on a Dask worker: logs to the config's JSON file only (the console is the
    client's), the fit kernels on ``threads`` threads, then ``task(config, *args)``."""
    from strayline.logs import configure_logging

    configure_logging(level=config.logging.level, console="off", json_file=config.logging.json_file)
    cap_fit_threads(threads)
    return task(config, *args)
