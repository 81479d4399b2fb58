"""The daemon: watcher → pipeline, in the foreground, under systemd or by hand.

The only module that talks to systemd and handles signals.

- sd_notify (:mod:`strayline.service._sdnotify`): ``READY=1`` once the watcher is armed and the
  catch-up listing has started; ``STATUS=`` with progress (scan, line, queue, last alert);
  ``WATCHDOG=1`` from the main loop only, every half ``$WATCHDOG_USEC``, so a hung line or
  a loop blocked in a system call stops the pings; ``RELOADING=1`` / ``READY=1`` around a
  reload; ``STOPPING=1`` on the way out.
- Signals: SIGTERM/SIGINT finish the current line (it is committed or was never begun)
  and exit 0; SIGHUP reloads the config (validated first; an invalid one is refused and
  the old one kept) and reopens the log files.
- Resource guards: free space of the output root below ``service.min_free_disk_mib``
  raises one critical alert and stops raw-spectra writing (maps go on); the output folder
  failing (unwritable, replaced, vanished) raises one critical alert, keeps every line
  file on a retry list and retries with backoff, and, once writing works again, lists the
  watch root anew so that no line is lost. A missing watch root is waited for.

:func:`strayline.pipeline.process_folder` runs exactly the same pipeline once over what is
there.
"""

from __future__ import annotations

import faulthandler
import os
import signal
import sys
import threading
import time
from collections import deque
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from types import FrameType
from typing import Literal

import structlog

from strayline import __version__
from strayline._numbers import MIB
from strayline.alerts import (
    ACTIVE_ALERTS_FILE,
    ActiveAlerts,
    AlertEvent,
    AlertSink,
    deliver_remembered,
)
from strayline.config import Config, load_config
from strayline.errors import ConfigError, StoreError
from strayline.fit import prepare_kernels
from strayline.heartbeat import HEARTBEAT_INTERVAL_S, Heartbeat, write_heartbeat
from strayline.logs import configure_logging, reopen_log_files
from strayline.metrics_file import (
    MetricsSnapshot,
    ScanStatusCache,
    alerts_by_severity,
    scan_metrics,
    write_metrics_file,
)
from strayline.pipeline import (
    LineOutcome,
    LinePipeline,
    PipelineStatistics,
    fit_model_from_config,
)
from strayline.service._events import (
    ServiceAlert,
    disk_low_cleared,
    disk_low_raised,
    output_unavailable_cleared,
    output_unavailable_raised,
    service_event,
)
from strayline.service._guards import (
    RESOURCE_CHECK_INTERVAL_S,
    SERVICE_RULES,
    DiskGuard,
    Outage,
    UnreadableFiles,
    free_disk_bytes,
)
from strayline.service._sdnotify import Notifier
from strayline.service._status import status_text
from strayline.store import is_orphaned_store, store_metadata_present, store_path
from strayline.watch import LineWatcher, ReadyFile, WatchOptions

__all__ = ["Service", "watch_options_from_config"]

#: STATUS is re-sent at least this often even when unchanged, s.
_STATUS_REFRESH_S = 10.0

#: Preparing the fit kernels takes longer than this only when they were built, not loaded
#: from the cache (a built set takes tens of seconds, a cached one well under one).
_KERNELS_BUILT_S = 5.0

#: Files handed to the pipeline at once (a catch-up or burst is committed in groups of up
#: to this many; the watchdog is pinged between groups, a second or two apart at most).
BATCH_FILES = 32


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


def _new_watcher(config: Config) -> LineWatcher:
    """The watcher of ``config``'s watch root, each scan folder's files as its reader says."""
    return LineWatcher(
        config.paths.watch_root, watch_options_from_config(config), readers=config.reader_choice
    )


def _utc_now_text() -> str:
    return datetime.now(UTC).isoformat(timespec="milliseconds")


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
    free_bytes : callable, optional
        ``free_bytes(folder) -> int`` for the disk guard (default :func:`free_disk_bytes`).
    clock : callable returning float, optional
        Monotonic seconds for the resource checks and the retry backoff.
    """

    def __init__(
        self,
        config: Config,
        *,
        notifier: Notifier | None = None,
        stop_when: Callable[[], bool] | None = None,
        free_bytes: Callable[[Path], int] = free_disk_bytes,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.config = config
        self._notifier = notifier if notifier is not None else Notifier()
        self._stop_when = stop_when
        self._free_bytes = free_bytes
        self._clock = clock
        self._log = structlog.get_logger("strayline.service")
        self._stop = threading.Event()
        self._reload = threading.Event()
        # Settled once: the watchdog period (half of systemd's, sd_watchdog_enabled(3)).
        interval = self._notifier.watchdog_interval_s
        self._ping_period_s = interval / 2 if interval and config.service.watchdog else None
        self._next_ping_s = 0.0
        self._status_sent_s = -float("inf")
        self._last_status_text = ""
        self._next_status_log_s = 0.0
        self._next_check_s = -float("inf")
        self._held: deque[ReadyFile] = deque()
        self._unreadable = UnreadableFiles()
        self._unlogged: list[AlertEvent] = []  # announced, not yet in the alert log
        self._counted: PipelineStatistics | None = None  # counts of the pipeline closed last
        self._started = datetime.now(UTC)
        self._next_beat_s = 0.0
        self._beat_failing = False
        # The metrics file's memory: scans handled and alerts active (a closed pipeline,
        # a reload or the last file of a stop still know them).
        self._scans = ScanStatusCache(config.paths.output_root)
        self._progress: dict[str, tuple[int, int]] = {}
        self._active_seen: tuple[AlertEvent, ...] = ()
        self._metrics_failing = False
        self._outage: Outage | None = None
        self._last_alert: AlertEvent | None = None
        self._last_scan_id: str | None = None
        # The one record of alerts raised outside the rule engine, shared with the pipeline.
        self._alerts = ActiveAlerts(config.paths.state_dir / ACTIVE_ALERTS_FILE)
        # One sink for the daemon's life (rebuilt on reload), shared with every pipeline:
        # it announces an alert even while the output, and so the alert log, is down.
        self._sink = AlertSink.from_config(config)
        self._lost_stores: set[Path] = set()
        self._disk = self._new_disk_guard(config, low=False)
        self.pipeline: LinePipeline | None = None
        try:
            self.pipeline = LinePipeline(
                config, sink=self._sink, active=self._alerts, background_products=True
            )
        except OSError as exc:  # output folder unusable at start: wait for it, alerting
            self._begin_outage(f"building the pipeline failed: {exc}")
        else:
            self._adopt_raised(self.pipeline)
        self.watcher = _new_watcher(config)

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
        self._beat("running")
        self._prepare_fit()
        self.watcher.start()  # arms the observer and lists the tree (catch-up)
        self._check_resources(force=True)
        self._notifier.notify("READY=1", f"STATUS={self._status_text()}")
        config = self.config
        if config.profiles_folder != config.profiles_dir:
            self._log.warning(
                "profiles_dir_empty",
                profiles_dir=str(config.profiles_dir),
                using=str(config.profiles_folder),
            )
        elif "profiles_dir" in config.model_fields_set and not config.available_profiles():
            self._log.warning(
                "no_profiles",
                profiles_dir=str(config.profiles_dir),
                problem="no sample-type profile there: every scan runs with the base config",
            )
        self._log.info(
            "service_ready",
            watch_root=str(self.config.paths.watch_root),
            output_root=str(self.config.paths.output_root),
            mode=self.config.watch.mode,
            watchdog_period_s=self._ping_period_s,
        )
        try:
            while not self._stop.is_set():
                self._turn()
                if self._stop_when is not None and self._stop_when():
                    break
        finally:
            self._notifier.notify("STOPPING=1", "STATUS=stopping: the current line is finished")
            self._shutdown()
        self._log.info("service_stopped", lines_left_for_next_start=len(self._held))
        return 0

    def _prepare_fit(self) -> None:
        """Get the fit kernels ready before the first line (built once after an install,
        about half a minute; loaded from the cache after that), saying so meanwhile."""
        self._notifier.notify(
            "STATUS=preparing the fit kernels (built once after an install, then cached)"
        )
        self._log.info("fit_kernels_preparing")
        seconds = prepare_kernels(fit_model_from_config(self.config))
        self._log.info(
            "fit_kernels_ready",
            seconds=round(seconds, 2),
            built=seconds > _KERNELS_BUILT_S,  # first start after an install (or an upgrade)
        )

    def _turn(self) -> None:
        """One loop turn: reload if asked, guard resources, take ready files, work, report."""
        if self._reload.is_set():
            self._do_reload()
        self._check_resources()
        busy = bool(self._held) and self._outage is None
        ready = self.watcher.wait_ready(timeout_s=0.0 if busy else self._wait_s())
        self._held.extend(ready)
        self._requeue_unreadable()
        if self._outage is not None:
            if self._clock() >= self._outage.next_try_s:
                self._try_recover()
        else:
            self._drain_held()
        if self._outage is None and self.pipeline is not None and not self._stop.is_set():
            try:
                self._note_events(self.pipeline.tick())
            except StoreError as exc:
                self._begin_outage(str(exc))
        self._ping()
        now = time.monotonic()
        if now >= self._next_status_log_s:
            self._next_status_log_s = now + self.config.service.status_interval_s
            self._log_status()
        if now >= self._next_beat_s:
            self._next_beat_s = now + HEARTBEAT_INTERVAL_S
            self._beat("running")

    def _wait_s(self) -> float:
        """How long the watcher may block: 1 s, less if a ping or retry falls due sooner."""
        wait = 1.0
        if self._ping_period_s is not None:
            wait = min(wait, max(self._next_ping_s - time.monotonic(), 0.0))
        if self._outage is not None:
            wait = min(wait, max(self._outage.next_try_s - self._clock(), 0.0))
        soonest = self._unreadable.next_try_s()
        if soonest is not None:
            wait = min(wait, max(soonest - self._clock(), 0.0))
        return wait

    def _drain_held(self) -> None:
        """Process held files in order until done, stopped, or the output fails; the files
        ready at once go to the pipeline together (up to :data:`BATCH_FILES`), so that a
        catch-up or a burst is committed in groups."""
        while self._held and not self._stop.is_set():
            before = self._outage
            self._check_resources()  # a long catch-up still watches the disk
            if self._outage is not before:
                return
            problem = self._output_problem()
            if problem is not None:
                self._begin_outage(problem)
                return
            batch = self._next_batch()
            if not self._handle(batch):
                return  # output failed: the files stay first in line
            for _ in batch:
                self._held.popleft()
            self._ping()

    def _next_batch(self) -> list[ReadyFile]:
        """The held files to process next: the first one if the watcher gave up on it,
        else the run of ready files at the head of the line."""
        batch: list[ReadyFile] = []
        for ready in self._held:
            if ready.kind == "gave_up" or len(batch) == BATCH_FILES:
                break
            batch.append(ready)
        return batch or [self._held[0]]

    def _handle(self, batch: list[ReadyFile]) -> bool:
        """Run files through the pipeline; False if the output failed (keep them all)."""
        if self.pipeline is None:
            return False
        try:
            if batch[0].kind == "gave_up":
                outcomes = [self.pipeline.give_up(batch[0].path, batch[0].reason)]
            else:
                outcomes = self.pipeline.process_many([ready.path for ready in batch])
        except StoreError as exc:
            self._begin_outage(str(exc))
            return False
        except Exception as exc:  # our own bug outside any one file: set them aside, carry on
            outcomes = [self.pipeline.set_aside(ready.path, exc) for ready in batch]
        by_path: dict[Path, list[LineOutcome]] = {}
        for outcome in outcomes:  # a growing file gives one per line it had
            by_path.setdefault(outcome.path, []).append(outcome)
        for ready in batch:
            mine = by_path.pop(ready.path, [])
            unreadable = [o for o in mine if o.kind == "unreadable"]
            if unreadable:  # try again later
                self._note_unreadable(ready, unreadable[0].problem)
            else:
                self._unreadable.read(ready.path)
            for outcome in mine:
                if outcome.scan_id is not None:
                    self._last_scan_id = outcome.scan_id
                self._note_events(outcome.events)
        return True

    def _note_events(self, events: tuple[AlertEvent, ...]) -> None:
        if events:
            self._last_alert = events[-1]

    def _shutdown(self) -> None:
        self.watcher.stop()
        self._close_pipeline()
        self._beat("stopped")
        self._sink.close()
        self._notifier.close()

    def _beat(self, state: Literal["running", "stopped"]) -> None:
        """Rewrite the heartbeat ``strayline status`` reads (a failure is logged once per
        outage of it: the daemon never stops over its heartbeat)."""
        stats = self.pipeline.statistics() if self.pipeline is not None else self._counted
        beat = Heartbeat(
            pid=os.getpid(),
            state=state,
            started=self._started,
            seen=datetime.now(UTC),
            lines_written=0 if stats is None else stats.lines_written,
            waiting=len(self._held) + self.watcher.statistics().candidates_pending,
            last_scan_id=self._last_scan_id,
            output_failing=self._outage is not None,
            version=__version__,
        )
        try:
            write_heartbeat(self.config.paths.state_dir, beat)
        except OSError as exc:
            if not self._beat_failing:
                self._log.warning("heartbeat_not_written", error=str(exc))
            self._beat_failing = True
        else:
            self._beat_failing = False
        if self.config.service.metrics_file is not None:
            self._write_metrics(self.config.service.metrics_file, beat)

    def _write_metrics(self, path: Path, beat: Heartbeat) -> None:
        """Rewrite the metrics file beside the heartbeat (``service.metrics_file``): the
        scans this daemon has handled (kept across reloads), the active alerts; a failure
        is logged once per outage of it."""
        if self.pipeline is not None:
            self._progress.update(self.pipeline.scan_progress())
            self._active_seen = self.pipeline.active_alerts()
        if self._scans.output_root != self.config.paths.output_root:
            self._scans = ScanStatusCache(self.config.paths.output_root)
        try:
            snapshot = MetricsSnapshot(
                up=beat.state == "running",
                seen=beat.seen,
                lines_written=beat.lines_written,
                files_waiting=beat.waiting,
                alerts_active=alerts_by_severity(self._active_seen),
                scans=tuple(
                    scan_metrics(status, beat.seen)
                    for status in self._scans.statuses(self._progress)
                ),
            )
            write_metrics_file(path, snapshot)
        except (OSError, StoreError, ValueError, KeyError) as exc:
            if not self._metrics_failing:
                self._log.warning("metrics_file_not_written", file=str(path), error=str(exc))
            self._metrics_failing = True
        else:
            self._metrics_failing = False

    # -- unreadable files ---------------------------------------------------------------

    def _note_unreadable(self, ready: ReadyFile, problem: str) -> None:
        delay = self._unreadable.failed(ready, problem, self._clock())
        if delay is None:
            self._log.error("line_unreadable_gave_up", file=str(ready.path), error=problem)
            if self.pipeline is not None:
                outcome = self.pipeline.give_up(ready.path, f"cannot be read: {problem}")
                self._note_events(outcome.events)
            return
        self._log.warning(
            "line_unreadable_retry", file=str(ready.path), error=problem, retry_in_s=delay
        )

    def _requeue_unreadable(self) -> None:
        """Put unreadable files whose retry is due back in line."""
        self._held.extend(self._unreadable.due(self._clock()))

    # -- output failures ----------------------------------------------------------------

    def _begin_outage(self, reason: str) -> None:
        """The output cannot be written: alert once, close the pipeline, back off."""
        now = self._clock()
        if self._outage is None:
            self._outage = Outage.begin(reason, now)
            self._log.error("output_unavailable", reason=reason, held_files=len(self._held))
            self._deliver(
                self._service_event(
                    output_unavailable_raised(self.config.paths.output_root, reason)
                )
            )
        else:
            outage = self._outage
            outage.failed_again(now)
            self._log.warning(
                "output_retry_failed",
                reason=reason,
                attempts=outage.attempts,
                next_retry_s=outage.backoff_s,
                held_files=len(self._held),
            )
        self._close_pipeline()

    def _try_recover(self) -> None:
        """Rebuild the pipeline, write the held files, and clear the outage if all went."""
        outage = self._outage
        if outage is None:
            return
        outage.attempts += 1
        problem = self._output_problem()
        if problem is not None:
            self._begin_outage(problem)
            return
        self._set_aside_lost_stores()
        if self.pipeline is None:
            try:
                self.pipeline = self._new_pipeline(self.config)
            except OSError as exc:
                self._begin_outage(f"building the pipeline failed: {exc}")
                return
        self._drain_held()
        if self._held:
            return  # failed again (backoff set) or stopping
        self._outage = None
        down_s = self._clock() - outage.since_s
        self._log.info("output_recovered", down_s=round(down_s, 1), attempts=outage.attempts)
        self._deliver(
            self._service_event(output_unavailable_cleared(self.config.paths.output_root, down_s))
        )
        # Lines written meanwhile into a store that had vanished are found again: every
        # file is reconsidered, and the ledger skips those already committed.
        self._restart_watcher(self.config)

    def _output_problem(self) -> str | None:
        """Why the output cannot be used now (folder replaced or gone, a store gone), or None.

        A handful of stat calls: cheap enough to run before every line, so that a line is
        not written into a store whose folder was deleted while it was open.
        """
        root = self.config.paths.output_root
        if root.exists() and not root.is_dir():
            return f"output folder {root} is not a folder"
        if self.pipeline is None:
            return None
        if not root.is_dir():
            return f"output folder {root} vanished"
        for scan_id in self.pipeline.scan_progress():
            store = store_path(root, scan_id)
            if not store_metadata_present(store):
                self._lost_stores.add(store)
                return f"scan store {store} vanished"
        return None

    def _set_aside_lost_stores(self) -> None:
        """Move aside what writes into a deleted store left at its path, so that the store
        can be created afresh there.

        zarr creates missing folders when it writes a chunk, so lines written after a
        store's folder was deleted leave a folder of chunks with neither the group
        metadata (``zarr.json``) nor a ledger. Such a folder is renamed to a hidden
        ``.<name>.orphaned-<UTC time>`` beside it, never deleted; a folder that has either
        file is left alone.
        """
        lost, self._lost_stores = self._lost_stores, set()
        for store in lost:
            try:
                if not is_orphaned_store(store):
                    continue
                stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
                aside = store.with_name(f".{store.name}.orphaned-{stamp}")
                store.rename(aside)
            except OSError as exc:
                self._log.warning("lost_store_not_moved", store=str(store), error=str(exc))
            else:
                self._log.warning("lost_store_moved_aside", store=str(store), to=str(aside))

    def _check_resources(self, *, force: bool = False) -> None:
        """Output folder and free space, at most every RESOURCE_CHECK_INTERVAL_S."""
        now = self._clock()
        if not force and now < self._next_check_s:
            return
        self._next_check_s = now + RESOURCE_CHECK_INTERVAL_S
        if self._outage is None:
            problem = self._output_problem()
            if problem is not None:
                self._begin_outage(problem)
        change = self._disk.check()
        if change == "raised":
            self._disk_low_raised()
        elif change == "cleared":
            self._disk_low_cleared()

    def _disk_low_raised(self) -> None:
        disk = self._disk
        free_mib = (disk.last_free_bytes or 0) / MIB
        floor_mib = disk.min_free_bytes / MIB
        self._log.error("disk_space_low", free_mib=round(free_mib, 1), floor_mib=floor_mib)
        if self.pipeline is not None:
            try:
                self.pipeline.set_raw_spectra(False)
            except StoreError as exc:
                self._begin_outage(str(exc))
        clear_mib = disk.clear_bytes / MIB
        root = self.config.paths.output_root
        self._deliver(self._service_event(disk_low_raised(root, free_mib, floor_mib, clear_mib)))

    def _disk_low_cleared(self) -> None:
        free_mib = (self._disk.last_free_bytes or 0) / MIB
        self._log.info("disk_space_recovered", free_mib=round(free_mib, 1))
        # A fresh pipeline stores raw spectra again wherever each scan's config asks.
        if self.pipeline is not None:
            self._close_pipeline()
            try:
                self.pipeline = self._new_pipeline(self.config)
            except OSError as exc:
                self._begin_outage(f"building the pipeline failed: {exc}")
        floor_mib = self._disk.min_free_bytes / MIB
        root = self.config.paths.output_root
        self._deliver(self._service_event(disk_low_cleared(root, free_mib, floor_mib)))

    # -- building and closing -----------------------------------------------------------

    def _new_disk_guard(self, config: Config, *, low: bool) -> DiskGuard:
        return DiskGuard(
            config.paths.output_root,
            config.service.min_free_disk_bytes,
            free_bytes=self._free_bytes,
            low=low,
        )

    def _new_pipeline(self, config: Config) -> LinePipeline:
        """A pipeline for ``config``, told about low disk, with held-back alerts sent."""
        pipeline = LinePipeline(
            config, sink=self._sink, active=self._alerts, background_products=True
        )
        if self._counted is not None:  # a reload or an outage: the service's counts go on
            pipeline.count_on_from(self._counted)
        if self._disk.low:
            pipeline.set_raw_spectra(False)  # no scan is open yet: nothing to reopen
        unlogged, self._unlogged = self._unlogged, []
        self.pipeline = pipeline
        for event in unlogged:  # announced when raised; the output works again: log them
            self._deliver(event, notify=False)
        return pipeline

    def _adopt_raised(self, pipeline: LinePipeline) -> None:
        """Take over this service's alerts still raised by a previous run, so that they
        are cleared when their cause is gone (the first resource check decides)."""
        for event in self._alerts.active():
            if event.rule in SERVICE_RULES:
                self._log.info("alert_still_raised", rule=event.rule, scan=event.scan_id)
        if self._alerts.raised("disk_space_low") is not None:
            self._disk.low = True
            pipeline.set_raw_spectra(False)  # no scan is open yet: nothing to reopen
        if self._alerts.raised("output_unavailable") is not None and self._outage is None:
            now = self._clock()
            self._outage = Outage.begin("raised by a previous run", now)
            self._outage.next_try_s = now  # try at once: the first resource check decides

    def _close_pipeline(self) -> None:
        pipeline, self.pipeline = self.pipeline, None
        if pipeline is None:
            return
        self._counted = pipeline.statistics()  # the next pipeline counts on from here
        self._progress.update(pipeline.scan_progress())  # for the metrics file
        self._active_seen = pipeline.active_alerts()
        try:
            pipeline.close()
        except OSError as exc:  # the output is failing; what is committed is on disk
            self._log.warning("pipeline_close_failed", error=str(exc))

    def _restart_watcher(self, config: Config) -> None:
        """A new watcher (new options or a catch-up), started at once."""
        self.watcher.stop()
        self.watcher = _new_watcher(config)
        self.watcher.start()

    # -- alerts of the service itself ---------------------------------------------------

    def _service_event(self, alert: ServiceAlert) -> AlertEvent:
        """The event of a service alert; a clear names the scan its raise named."""
        raised = self._alerts.raised(alert.rule)
        if alert.state == "cleared" and raised is not None:
            scan_id = raised.scan_id  # the pair is matched by (scan, rule)
        else:
            scan_id = self._last_scan_id or "-"
        return service_event(alert, scan_id=scan_id, time_text=_utc_now_text())

    def _deliver(self, event: AlertEvent, *, notify: bool = True) -> None:
        """Announce an alert of the service's own (log, console, stop request, hook) and
        append it to the alert log; one the log cannot take yet is kept and logged once
        the output works again (``notify=False``: it was announced already)."""
        self._last_alert = event
        try:
            deliver_remembered(self._sink, self._alerts, event, notify=notify)
        except StoreError as exc:  # delivered; only remembering it failed
            self._log.warning("alert_state_not_saved", rule=event.rule, error=str(exc))
        except OSError as exc:  # the alert log's disk: the announcement went out
            self._log.error("alert_not_logged", rule=event.rule, error=str(exc))
            self._unlogged.append(event)

    # -- systemd ------------------------------------------------------------------------

    def _ping(self) -> None:
        """Watchdog ping and status, from the main loop only (a hung line stops them).

        STATUS goes with every ping, when its text changed (at most once a second), and
        at least every ``_STATUS_REFRESH_S``.
        """
        now = time.monotonic()
        states = []
        if self._ping_period_s is not None and now >= self._next_ping_s:
            self._next_ping_s = now + self._ping_period_s
            states.append("WATCHDOG=1")
        since_s = now - self._status_sent_s
        if states or since_s >= 1.0:
            text = self._status_text()
            if states or text != self._last_status_text or since_s >= _STATUS_REFRESH_S:
                self._last_status_text = text
                self._status_sent_s = now
                states.append(f"STATUS={text}")
        if states:
            self._notifier.notify(*states)

    def _status_text(self) -> str:
        """One line for ``systemctl status``: scan, line, queue, last alert, troubles."""
        return status_text(
            outage=self._outage,
            held=len(self._held),
            disk=self._disk,
            watch=self.watcher.statistics(),
            watch_root=self.config.paths.watch_root,
            progress=self.pipeline.scan_progress() if self.pipeline is not None else {},
            stats=self.pipeline.statistics() if self.pipeline is not None else None,
            last_alert=self._last_alert,
        )

    def _log_status(self) -> None:
        stats = self.pipeline.statistics() if self.pipeline is not None else None
        watch = self.watcher.statistics()
        self._log.info(
            "service_status",
            lines_written=None if stats is None else stats.lines_written,
            duplicates=None if stats is None else stats.duplicates,
            quarantined=None if stats is None else stats.quarantined,
            pixels_failed=None if stats is None else stats.pixels_failed,
            scans_open=None if stats is None else stats.scans_open,
            active_alerts=None if stats is None else stats.active_alerts,
            queue=watch.candidates_pending,
            held=len(self._held),
            watch_root_present=watch.watch_root_present,
            output_failing=self._outage is not None,
            disk_low=self._disk.low,
            free_mib=None
            if self._disk.last_free_bytes is None
            else round(self._disk.last_free_bytes / MIB, 1),
        )

    # -- reload -------------------------------------------------------------------------

    def _do_reload(self) -> None:
        """Re-read the config file; apply it whole or refuse it whole, then reopen logs."""
        self._reload.clear()
        source = self.config.source
        self._notifier.notify("RELOADING=1", f"MONOTONIC_USEC={time.monotonic_ns() // 1000}")
        try:
            if source is None:
                raise ConfigError(None, "<config>", "the running config has no file to reload")
            new = load_config(source)
            if new.logging != self.config.logging:
                configure_logging(
                    level=new.logging.level,
                    console=new.logging.console,
                    json_file=new.logging.json_file,
                )
        except ConfigError as error:
            self._log.error("config_reload_refused", file=str(source), problem=str(error))
            reopen_log_files()
        else:
            self._apply_config(new)
            reopen_log_files()
            self._log.info("config_reloaded", file=str(source))
        self._notifier.notify("READY=1", f"STATUS={self._status_text()}")

    def _apply_config(self, new: Config) -> None:
        old = self.config
        self.config = new
        interval = self._notifier.watchdog_interval_s
        self._ping_period_s = interval / 2 if interval and new.service.watchdog else None
        self._disk = self._new_disk_guard(new, low=self._disk.low)
        if new.paths.state_dir != old.paths.state_dir:  # the record moves with the folder
            moved = ActiveAlerts(new.paths.state_dir / ACTIVE_ALERTS_FILE)
            for event in self._alerts.active():
                moved.note(event)
            self._alerts = moved
        if (old.paths.watch_root, old.watch, old.readers) != (
            new.paths.watch_root,
            new.watch,
            new.readers,
        ):
            self._restart_watcher(new)
        self._close_pipeline()
        self._sink.close()
        self._sink = AlertSink.from_config(new)
        if self._outage is None:
            try:
                self._new_pipeline(new)
            except OSError as exc:
                self._begin_outage(f"building the pipeline failed: {exc}")
        self._check_resources(force=True)
