"""The daemon: watcher → pipeline, in the foreground, under systemd or by hand.

The only module that talks to systemd (sd_notify: READY, STATUS, WATCHDOG, STOPPING) and
handles signals: SIGTERM/SIGINT finish the current line and exit 0; SIGHUP reloads the
config (validated first; an invalid one is refused and the old one kept) and reopens log
files. ``process_folder`` runs exactly the same pipeline once over what is there.
"""

from __future__ import annotations

import faulthandler
import signal
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from types import FrameType

import structlog

from strayline._sdnotify import Notifier
from strayline._watch_tree import LineNames, list_tree
from strayline.config import Config, load_config
from strayline.errors import ConfigError, StoreError
from strayline.logs import reopen_log_files
from strayline.pipeline import LineOutcome, LinePipeline
from strayline.watch import LineWatcher, WatchOptions

__all__ = ["ProcessSummary", "Service", "process_folder", "watch_options_from_config"]


def watch_options_from_config(config: Config) -> WatchOptions:
    """The watcher's options from ``config.watch``."""
    w = config.watch
    return WatchOptions(
        mode=w.mode,
        poll_interval_s=w.poll_interval_s,
        settle_s=w.settle_s,
        give_up_s=w.give_up_s,
        reconcile_interval_s=w.reconcile_interval_s,
        pattern=w.pattern,
    )


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
            outcomes.append(pipeline.process(path))
    finally:
        pipeline.close()
    return _summarise(outcomes)


class Service:
    """The long-running daemon.

    Parameters
    ----------
    config : Config
        Validated configuration.
    notifier : Notifier, optional
        sd_notify sender (default: from ``$NOTIFY_SOCKET``, a no-op outside systemd).
    stop_when : callable returning bool, optional
        Checked after every loop turn; True ends the run (used by ``strayline demo``).
    """

    def __init__(
        self,
        config: Config,
        *,
        notifier: Notifier | None = None,
        stop_when: Callable[[], bool] | None = None,
    ) -> None:
        self.config = config
        self._notifier = notifier if notifier is not None else Notifier()
        self._stop_when = stop_when
        self._log = structlog.get_logger("strayline.service")
        self._stop = threading.Event()
        self._reload = threading.Event()
        self.pipeline, self.watcher = self._build(config)
        self._last_status_s = 0.0
        self._last_ping_s = 0.0

    # -- signals ------------------------------------------------------------------------

    def request_stop(self) -> None:
        """Ask the loop to finish the current line and exit."""
        self._stop.set()

    def request_reload(self) -> None:
        """Ask the loop to reload the config before the next line."""
        self._reload.set()

    def _on_signal(self, signum: int, _frame: FrameType | None) -> None:
        if signum == signal.SIGHUP:
            self.request_reload()
        else:
            self.request_stop()

    def install_signal_handlers(self) -> None:
        """SIGTERM/SIGINT → stop after the current line; SIGHUP → reload."""
        for signum in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
            signal.signal(signum, self._on_signal)

    # -- the loop -----------------------------------------------------------------------

    def run(self) -> int:
        """Run until stopped; return the process exit code (0 on a clean stop)."""
        faulthandler.enable(file=sys.stderr, all_threads=True)
        self.watcher.start()
        self._notifier.notify("READY=1", f"STATUS={self._status_text()}")
        self._log.info(
            "service_ready",
            watch_root=str(self.config.paths.watch_root),
            output_root=str(self.config.paths.output_root),
            mode=self.config.watch.mode,
        )
        try:
            while not self._stop.is_set():
                self._turn()
                if self._stop_when is not None and self._stop_when():
                    break
        finally:
            self._notifier.notify("STOPPING=1", "STATUS=stopping")
            self._shutdown()
        self._log.info("service_stopped")
        return 0

    @staticmethod
    def _build(config: Config) -> tuple[LinePipeline, LineWatcher]:
        pipeline = LinePipeline(config)
        watcher = LineWatcher(config.paths.watch_root, watch_options_from_config(config))
        return pipeline, watcher

    def _shutdown(self) -> None:
        self.watcher.stop()
        self.pipeline.close()
        self._notifier.close()

    def _turn(self) -> None:
        """One loop turn: wait for ready files, process them, tick rules, report."""
        if self._reload.is_set():
            self._do_reload()
        for ready in self.watcher.wait_ready(timeout_s=1.0):
            if self._stop.is_set():
                break  # the file stays; it is caught up on the next start
            try:
                if ready.kind == "gave_up":
                    self.pipeline.give_up(ready.path, ready.reason)
                else:
                    self.pipeline.process(ready.path)
            except StoreError:
                raise  # the output is unusable: stop cleanly, systemd restarts us
            except Exception:  # our own bug: keep the file, log it whole, carry on
                self._log.exception("line_failed", file=str(ready.path))
            self._ping()
        self.pipeline.tick()
        self._ping()
        now = time.monotonic()
        if now - self._last_status_s >= self.config.service.status_interval_s:
            self._last_status_s = now
            self._log_status()

    def _ping(self) -> None:
        """Watchdog ping and status, from the main loop only (a hung line stops them)."""
        now = time.monotonic()
        if now - self._last_ping_s < 1.0:
            return
        self._last_ping_s = now
        states = [f"STATUS={self._status_text()}"]
        if self.config.service.watchdog:
            states.append("WATCHDOG=1")
        self._notifier.notify(*states)

    def _status_text(self) -> str:
        stats = self.pipeline.statistics()
        watch = self.watcher.statistics()
        parts = []
        for scan_id, (done, planned) in self.pipeline.scan_progress().items():
            parts.append(f"scan {scan_id}: {done}/{planned} traces")
        if not parts:
            parts.append("waiting for lines")
        parts.append(f"queue {watch.candidates_pending}")
        parts.append(f"quarantined {stats.quarantined}")
        parts.append(f"active alerts {stats.active_alerts}")
        return ", ".join(parts)

    def _log_status(self) -> None:
        stats = self.pipeline.statistics()
        watch = self.watcher.statistics()
        self._log.info(
            "service_status",
            lines_written=stats.lines_written,
            duplicates=stats.duplicates,
            quarantined=stats.quarantined,
            pixels_failed=stats.pixels_failed,
            scans_open=stats.scans_open,
            queue=watch.candidates_pending,
            active_alerts=stats.active_alerts,
        )

    def _do_reload(self) -> None:
        self._reload.clear()
        source = self.config.source
        self._notifier.notify("RELOADING=1", f"MONOTONIC_USEC={time.monotonic_ns() // 1000}")
        try:
            if source is None:
                raise ConfigError(None, "<config>", "the running config has no file to reload")
            new = load_config(source)
        except ConfigError as error:
            self._log.error("config_reload_refused", problem=str(error))
        else:
            self.watcher.stop()
            self.pipeline.close()
            self.config = new
            self.pipeline, self.watcher = self._build(new)
            self.watcher.start()
            self._log.info("config_reloaded", file=str(source))
        reopen_log_files()
        self._notifier.notify("READY=1", f"STATUS={self._status_text()}")
