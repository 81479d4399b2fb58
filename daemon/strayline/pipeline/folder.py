"""``strayline process DIR``: every line file below a folder, once, through the daemon's
own pipeline."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from strayline.config import Config
from strayline.pipeline.line_pipeline import LineOutcome, LinePipeline
from strayline.watch import LineNames, list_tree

__all__ = ["ProcessSummary", "process_folder"]


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


def process_folder(config: Config, folder: Path) -> ProcessSummary:
    """Process every line file below ``folder`` once (sorted by name), then return.

    The same pipeline as the daemon: already committed identical files are skipped, bad
    files are quarantined.
    """
    folder = Path(folder).absolute()
    listing = list_tree(folder, LineNames(folder, config.watch.pattern))
    if listing.error is not None and not listing.files:
        raise FileNotFoundError(f"{folder}: {listing.error}")
    pipeline = LinePipeline(config)
    outcomes: list[LineOutcome] = []
    try:
        for path in sorted(listing.files, key=lambda p: (p.parent, p.name)):
            try:
                outcomes.append(pipeline.process(path))
            except OSError:  # the store failing, or the file unreadable: stop the pass
                raise
            except Exception as error:  # a fault of ours: set the file aside, carry on
                outcomes.append(pipeline.set_aside(path, error))
    finally:
        pipeline.close()
    return _summarise(outcomes)
