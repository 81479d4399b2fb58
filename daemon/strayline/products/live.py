"""The live picture of a running scan: ``live_<direction>.png`` beside its products.

:class:`LivePicture` draws, for each trace with a committed line, the quick-look figure of
the scan-end products (:func:`strayline.products._figures.quicklook_figure`: field with a
ΔB scale where weak, PL scaled by the lines with fluorescence, contrast, fit status, the
lines where an alert was raised marked) titled as a live picture: scan, trace, profile,
lines done of those planned, the local time it was drawn. It reads the store through its
read-only reader (:func:`strayline.products._read.read_snapshot`), so only committed lines
are drawn, never a half-written row, and the writer is never locked out. The alert marks
come from the alert log, read a little at a time (:class:`AlertLogCursor`). Each PNG is
rendered under a temporary name in the same folder and renamed over the previous one, so
a viewer sees the old picture or the new one, never half of one.

The daemon decides when to draw (``products.live_*`` keys) and does so on its background
worker (:mod:`strayline.pipeline`), never on the thread that processes lines.
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path

from strayline.lines import DIRECTIONS
from strayline.products._marks import AlertLogCursor
from strayline.products._read import read_snapshot

__all__ = ["LIVE_PREFIX", "LivePicture", "draw_live_picture", "live_image_name"]

#: Start of a live picture's file name: ``live_<direction>.png``.
LIVE_PREFIX = "live_"


def live_image_name(direction: str) -> str:
    """File name of the live picture of one trace."""
    return f"{LIVE_PREFIX}{direction}.png"


def _utc_now() -> datetime:
    return datetime.now(UTC)


class LivePicture:
    """The live picture of one scan, redrawn on request.

    Building one does no I/O; :meth:`draw` reads the store and writes the PNGs. One
    caller at a time (it keeps its place in the alert log).

    Parameters
    ----------
    store_path : Path
        The scan's ``<scan_id>.zarr``.
    out_dir : Path
        The scan's products folder (created when first drawn).
    alert_log : Path or None
        The JSON-lines alert log the marks come from; None draws no marks.
    clock : callable returning an aware datetime
        When a picture is drawn (its title's time).
    """

    def __init__(
        self,
        store_path: Path,
        out_dir: Path,
        *,
        alert_log: Path | None,
        clock: Callable[[], datetime] = _utc_now,
    ) -> None:
        self.store_path = Path(store_path)
        self.out_dir = Path(out_dir)
        self._clock = clock
        self._cursor: AlertLogCursor | None = None
        self._alert_log = None if alert_log is None else Path(alert_log)

    def draw(self) -> tuple[Path, ...]:
        """Draw the committed lines of every trace and replace the live PNGs.

        Returns
        -------
        tuple of Path
            The pictures written, one per trace with a committed line (none before the
            scan's first line is committed).

        Raises
        ------
        StoreError
            If the store cannot be read.
        OSError
            If a picture cannot be written.
        """
        # matplotlib on first use only: it adds ~0.5 s to the daemon's start-up
        from strayline.products._figures import (
            QUICKLOOK_MAPS,
            FigureHeading,
            quicklook_figure,
            save_png,
        )

        snapshot = read_snapshot(self.store_path, QUICKLOOK_MAPS)
        if self._cursor is None:
            self._cursor = AlertLogCursor(self._alert_log, snapshot.scan_id)
        marks = self._cursor.marks()
        heading = FigureHeading(
            snapshot.scan_id,
            snapshot.profile,
            snapshot.lines_planned,
            snapshot.started,
            self._clock(),
            live=True,
        )
        written = []
        if snapshot.traces:
            self.out_dir.mkdir(parents=True, exist_ok=True)
        for direction in DIRECTIONS:
            trace = snapshot.traces.get(direction)
            if trace is None:
                continue
            path = self.out_dir / live_image_name(direction)
            save_png(quicklook_figure(trace, heading, marks), path)
            written.append(path)
        return tuple(written)


#: Pictures kept by :func:`draw_live_picture` (each keeps its place in the alert log).
_KEPT = 64
_PICTURES: dict[tuple[Path, Path], LivePicture] = {}


def draw_live_picture(store_path: Path, out_dir: Path, alert_log: Path | None) -> tuple[Path, ...]:
    """:meth:`LivePicture.draw` for the scan at ``store_path``, keeping the picture (its
    place in the alert log) for the next call: what a drawing process runs."""
    key = (Path(store_path), Path(out_dir))
    picture = _PICTURES.pop(key, None) or LivePicture(store_path, out_dir, alert_log=alert_log)
    _PICTURES[key] = picture  # most recently used last
    while len(_PICTURES) > _KEPT:
        del _PICTURES[next(iter(_PICTURES))]
    return picture.draw()
