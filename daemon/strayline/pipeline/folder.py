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


def process_folder(config: Config, folder: Path) -> ProcessSummary:
    """Process every line file below ``folder`` once, in acquisition order
    (:func:`acquisition_order`), then return.

    The same pipeline as the daemon: already committed identical files are skipped, bad
    files are quarantined.
    """
    folder = Path(folder).absolute()
    listing = list_tree(folder, LineNames(folder, config.watch.pattern))
    if listing.error is not None and not listing.files:
        raise FileNotFoundError(f"{folder}: {listing.error}")
    pipeline = LinePipeline(config, root=folder)
    outcomes: list[LineOutcome] = []
    try:
        for path in sorted(listing.files, key=acquisition_order):
            try:
                outcomes.append(pipeline.process(path))
            except OSError:  # the store failing, or the file unreadable: stop the pass
                raise
            except Exception as error:  # a fault of ours: set the file aside, carry on
                outcomes.append(pipeline.set_aside(path, error))
    finally:
        pipeline.close()
    return _summarise(outcomes)
