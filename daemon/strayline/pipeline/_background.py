"""One worker thread for slow by-products (a finished scan's products, a running scan's
live picture), so the service loop keeps serving lines and pinging the watchdog while
they are made."""

from __future__ import annotations

import queue
import threading
from collections.abc import Callable

import structlog

__all__ = ["BackgroundWorker"]


class BackgroundWorker:
    """Runs submitted jobs one after the other on a daemon thread.

    A job's exception is logged (``background_job_failed``), never raised: jobs are
    by-products that can be remade. :meth:`close` waits a bounded time for the jobs
    queued so far; what is still running then ends with the process.
    """

    def __init__(self, name: str) -> None:
        self._jobs: queue.Queue[Callable[[], None] | None] = queue.Queue()
        self._log = structlog.get_logger("strayline.pipeline")
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    def submit(self, job: Callable[[], None]) -> None:
        """Queue ``job``; returns at once."""
        self._jobs.put(job)

    def wait_idle(self, timeout_s: float) -> bool:
        """Block until the jobs queued so far have run, at most ``timeout_s``; True if
        they have."""
        done = threading.Event()
        self._jobs.put(done.set)
        return done.wait(timeout_s)

    def close(self, timeout_s: float) -> bool:
        """Stop after the queued jobs, waiting at most ``timeout_s``; True if all ran."""
        self._jobs.put(None)
        self._thread.join(timeout_s)
        if self._thread.is_alive():
            self._log.warning("background_jobs_abandoned", waited_s=timeout_s)
            return False
        return True

    def _run(self) -> None:
        while (job := self._jobs.get()) is not None:
            try:
                job()
            except Exception as error:  # by-products: log and go on with the next
                self._log.error("background_job_failed", error=f"{type(error).__name__}: {error}")
