"""What the pipeline makes beside a scan's store: the products once the scan is complete
(images, vector field, sheet moment, report) and, while it runs, its live picture; on a
background worker when there is one (the daemon), so a line never waits for them."""

from __future__ import annotations

import time
from collections.abc import Callable
from functools import partial

import structlog

from strayline.config import Config
from strayline.lines import ScanLine
from strayline.pipeline._background import BackgroundWorker
from strayline.pipeline._live import LiveRefresh
from strayline.pipeline._setup import ScanContext, scan_complete
from strayline.products import make_products, products_dir, use_calibration

__all__ = ["ScanByproducts"]

#: How long closing waits for products under way, s (within systemd's TimeoutStopSec;
#: products left unfinished are remade with ``strayline products``).
_PRODUCTS_WAIT_S = 30.0


class ScanByproducts:
    """A pipeline's products and live pictures.

    Parameters
    ----------
    config : Config
        The daemon's base configuration (the output root, the state folder, the alert log,
        the live picture's settings); each scan's own ``products`` section says what to
        make of it.
    background : bool
        Make them on a worker thread (only then is a live picture drawn); otherwise the
        products are made at once, on the caller's thread.
    clock : callable returning float
        Wall-clock seconds, for the live picture's timing.
    """

    def __init__(self, config: Config, *, background: bool, clock: Callable[[], float]) -> None:
        self._config = config
        self._log = structlog.get_logger("strayline.pipeline")
        self._worker = BackgroundWorker("strayline-products") if background else None
        section = config.products
        self._live: LiveRefresh | None = None
        if self._worker is not None and section.live_image:
            self._live = LiveRefresh(
                self._worker,
                every_lines=section.live_every_lines,
                every_s=section.live_every_s,
                alert_log=config.paths.alert_log,
                clock=clock,
            )

    def lines_committed(self, scan: ScanContext, n_lines: int) -> None:
        """Count a commit's lines towards the scan's next live picture."""
        if self._live is None:
            return
        out_dir = products_dir(
            self._config.paths.output_root, self._config.products.folder, scan.scan_id
        )
        self._live.lines_committed(
            scan.scan_id, scan.store.path, out_dir, n_lines, complete=scan_complete(scan.store)
        )

    def when_complete(self, scan: ScanContext, line: ScanLine) -> None:
        """Make the scan's products once, when its last planned line is committed.

        Complete means: the last planned forward line is committed and, if the scan has a
        backward trace at all, its last planned line too (an instrument writing trace and
        retrace finishes with the retrace of the last line). A line committed after that
        (one that came late, or a changed file) makes them again, so they never leave out
        a line the store has. A failure is logged as an error and never retried
        automatically (``strayline products`` remakes them).
        """
        if not scan_complete(scan.store):
            return
        if scan.products_done:
            self._log.info(
                "products_remade", scan=scan.scan_id, line=line.line_index, reason="a late line"
            )
        scan.products_done = True
        job = partial(self._make, scan, line.nv_theta_rad, line.nv_phi_rad, line.tip_id)
        if self._worker is None:
            job()
        else:
            self._worker.submit(job)

    def wait_idle(self, timeout_s: float) -> bool:
        """Wait for what is queued so far, at most ``timeout_s``; True once it has run."""
        return self._worker is None or self._worker.wait_idle(timeout_s)

    def close(self) -> None:
        """Let products under way finish (a bounded wait), then stop the drawing process."""
        if self._worker is not None:
            self._worker.close(timeout_s=_PRODUCTS_WAIT_S)
        if self._live is not None:
            self._live.close()

    def _make(
        self, scan: ScanContext, nv_theta_rad: float, nv_phi_rad: float, tip_id: str | None
    ) -> None:
        """Make one finished scan's products (reads the store without its lock); a tip
        calibration named in the config is looked up now, so the newest one counts."""
        section = scan.config.products
        paths = self._config.paths
        out_dir = products_dir(paths.output_root, section.folder, scan.scan_id)
        started = time.perf_counter()
        try:
            calibration = (
                None
                if section.calibration is None
                else use_calibration(paths.state_dir, section.calibration, tip_id)
            )
            report = make_products(
                scan.store.path,
                standoff_m=section.standoff_m,
                nv_theta_rad=nv_theta_rad,
                nv_phi_rad=nv_phi_rad,
                out_dir=out_dir,
                alert_log=paths.alert_log,
                images=section.images,
                calibration=calibration,
            )
        except Exception as error:  # products are a by-product: never stop the daemon
            self._log.error(
                "products_failed",
                scan=scan.scan_id,
                out_dir=str(out_dir),
                error=f"{type(error).__name__}: {error}",
                products_s=round(time.perf_counter() - started, 3),
            )
            return
        self._log.info(
            "products_written",
            scan=scan.scan_id,
            out_dir=str(out_dir),
            paths=[str(item.path) for item in report.files],
            skipped=[f"{item.product}: {item.reason}" for item in report.skipped],
            products_s=round(time.perf_counter() - started, 3),
        )
