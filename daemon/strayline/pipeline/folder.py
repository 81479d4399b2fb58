"""``strayline process DIR``: every line file below a folder, once, through the daemon's
own pipeline."""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

from strayline.config import Config
from strayline.lines import line_key_from_name
from strayline.pipeline.line_pipeline import LineOutcome, LinePipeline
from strayline.watch import LineNames, list_tree

__all__ = ["ProcessSummary", "acquisition_order", "process_folder"]


@dataclass(frozen=True)
class ProcessSummary:
    """What one ``process`` pass did."""

    files: int
    written: int
    duplicates: int
    quarantined: int
    vanished: int
    pixels_failed: int
    alerts: int


def _summarise(outcomes: list[LineOutcome]) -> ProcessSummary:
    kinds = [o.kind for o in outcomes]
    return ProcessSummary(
        files=len(outcomes),
        written=kinds.count("written"),
        duplicates=kinds.count("duplicate"),
        quarantined=kinds.count("quarantined"),
        vanished=kinds.count("vanished"),
        pixels_failed=sum(o.failures for o in outcomes),
        alerts=sum(len(o.events) for o in outcomes),
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


def process_folder(config: Config, folder: Path) -> ProcessSummary:
    """Process every line file below ``folder`` once, in acquisition order
    (:func:`acquisition_order`), then return.

    The same pipeline as the daemon: already committed identical files are skipped, bad
    files are quarantined. Files go to the pipeline :data:`PROCESS_BATCH` at a time.

    Raises
    ------
    OSError
        If the store fails or a file cannot be read: the pass stops (files before it are
        done; a second pass skips them).
    """
    folder = Path(folder).absolute()
    listing = list_tree(folder, LineNames(folder, config.watch.pattern))
    if listing.error is not None and not listing.files:
        raise FileNotFoundError(f"{folder}: {listing.error}")
    files = sorted(listing.files, key=acquisition_order)
    pipeline = LinePipeline(config, root=folder)
    outcomes: list[LineOutcome] = []
    try:
        for start in range(0, len(files), PROCESS_BATCH):
            batch = pipeline.process_many(files[start : start + PROCESS_BATCH])
            outcomes += batch
            unreadable = [o for o in batch if o.kind == "unreadable"]
            if unreadable:
                raise OSError(f"{unreadable[0].path}: {unreadable[0].problem}")
    finally:
        pipeline.close()
    return _summarise(outcomes)
