"""When to redraw a running scan's live picture, on the background worker, coalesced.

The pipeline tells :class:`LiveRefresh` how many lines a commit added
(:meth:`LiveRefresh.lines_committed`, a few counter updates on the line's thread); once
``products.live_every_lines`` lines were committed since the last picture, or a line
lands ``products.live_every_s`` after it, or the scan's last planned line lands, a redraw
is queued on the background worker; but never sooner than :data:`DUTY_GAP` times the last
picture's drawing time after it, so that pictures take at most about a tenth of the time
when lines come in a burst. A scan has at most one redraw waiting: while one is
queued, new lines only wait for it (it reads the store when it runs, so it shows them
too). A redraw that fails is logged and the next one tries again; lines never wait for a
picture.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from functools import partial
from multiprocessing import get_context
from pathlib import Path

import structlog

from strayline.pipeline._background import BackgroundWorker
from strayline.products import LivePicture, draw_live_picture

__all__ = ["LiveRefresh"]

#: A picture waits at least this many times as long as the last one took to draw, so that
#: drawing takes at most about a tenth of the time even when lines come in a burst (a
#: catch-up after a pause: redrawing every few lines then halved the line rate).
DUTY_GAP = 10.0

#: Draw in a child process: matplotlib holds the interpreter for the ~0.5 s a picture
#: takes, and a line arriving meanwhile would wait for it (the line latency's p95 rose
#: by about 60 ms with pictures drawn on a thread). Off: on the worker thread itself.
DRAW_IN_CHILD = True

#: Scans whose refresh state is kept (a scan that never completes leaves its state
#: behind; the oldest go first).
_MAX_SCANS = 64


@dataclass
class _ScanLive:
    """One scan's refresh state; ``queued`` is shared with the worker (under the lock)."""

    picture: LivePicture
    lines_since: int
    drawn_s: float
    queued: bool = False
    failures: int = 0
    cost_s: float = 0.0  # how long the last picture took to draw


class LiveRefresh:
    """Queue live-picture redraws of running scans on a background worker.

    Parameters
    ----------
    worker : BackgroundWorker
        Where pictures are drawn.
    every_lines : int or None
        Redraw after this many committed lines (None: by time only).
    every_s : float or None
        Redraw when a line lands this long after the last picture, s (None: by count
        only); the first picture counts from the scan's first line seen.
    alert_log : Path or None
        Where the alert marks come from.
    clock : callable returning float
        Seconds (``time.time``).
    """

    def __init__(
        self,
        worker: BackgroundWorker,
        *,
        every_lines: int | None,
        every_s: float | None,
        alert_log: Path | None,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self._worker = worker
        self._every_lines = every_lines if every_lines is not None else 2**62
        self._every_s = every_s if every_s is not None else float("inf")
        self._alert_log = alert_log
        self._clock = clock
        self._lock = threading.Lock()
        self._scans: dict[str, _ScanLive] = {}
        self._child: ProcessPoolExecutor | None = None
        self._log = structlog.get_logger("strayline.pipeline")

    def lines_committed(
        self, scan_id: str, store_path: Path, out_dir: Path, n_lines: int, complete: bool
    ) -> None:
        """Count ``n_lines`` just committed to a scan; queue a redraw when one is due
        (never more than one waiting per scan). Returns at once."""
        now = self._clock()
        state = self._scans.get(scan_id)
        if state is None:
            picture = LivePicture(store_path, out_dir, alert_log=self._alert_log)
            state = self._scans[scan_id] = _ScanLive(picture, 0, now)
            while len(self._scans) > _MAX_SCANS:
                del self._scans[next(iter(self._scans))]
        state.lines_since += n_lines
        since_s = now - state.drawn_s
        due = complete or (
            (state.lines_since >= self._every_lines or since_s >= self._every_s)
            and since_s >= DUTY_GAP * state.cost_s
        )
        if not due:
            return
        state.lines_since, state.drawn_s = 0, now
        with self._lock:
            if state.queued:  # the redraw waiting reads the store when it runs
                return
            state.queued = True
        self._worker.submit(partial(self._redraw, scan_id, state))

    def _redraw(self, scan_id: str, state: _ScanLive) -> None:
        """On the worker: draw the scan's live picture; a failure is logged (a warning
        the first time for a scan, then at debug level), never raised."""
        with self._lock:
            state.queued = False  # lines committed from now on may queue the next one
        started = time.perf_counter()
        try:
            paths = self._draw(state.picture)
        except Exception as error:
            state.failures += 1
            log = self._log.warning if state.failures == 1 else self._log.debug
            log(
                "live_image_failed",
                scan=scan_id,
                out_dir=str(state.picture.out_dir),
                error=f"{type(error).__name__}: {error}",
                failures=state.failures,
            )
            return
        state.failures = 0
        state.cost_s = time.perf_counter() - started
        self._log.debug(
            "live_image_written",
            scan=scan_id,
            paths=[str(p) for p in paths],
            live_s=round(time.perf_counter() - started, 3),
        )

    def _draw(self, picture: LivePicture) -> tuple[Path, ...]:
        """Draw ``picture``: in the drawing process (started on first use, started again
        after it died), or here when :data:`DRAW_IN_CHILD` is off."""
        if not DRAW_IN_CHILD:
            return picture.draw()
        if self._child is None:
            # spawn: a fork would copy the daemon's threads' locks mid-use
            self._child = ProcessPoolExecutor(max_workers=1, mp_context=get_context("spawn"))
        job = (picture.store_path, picture.out_dir, self._alert_log)
        try:
            return self._child.submit(draw_live_picture, *job).result()
        except BrokenProcessPool:
            self._child = None  # the next picture starts a new one
            raise

    def close(self) -> None:
        """Stop the drawing process (a picture under way is abandoned)."""
        if self._child is not None:
            self._child.shutdown(wait=False, cancel_futures=True)
            self._child = None
