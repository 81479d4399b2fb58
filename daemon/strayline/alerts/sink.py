"""Alert delivery: JSON-lines log, structured log, hook command, stop-request file.

:class:`AlertSink` is built once from options and then only delivers:

- every event is appended as one JSON object per line to the alert log, flushed and
  fsynced (``tail -f`` friendly; :func:`read_alert_log` reads it back);
- every event is logged through structlog (``alert_raised`` / ``alert_cleared``);
- if a hook is configured for the event's severity, its argument list is run WITHOUT a
  shell, placeholders ``{scan_id} {rule} {severity} {state} {line} {message}`` filled in
  per argument, on a background thread with a bounded queue and a timeout; a failing,
  missing or hanging command is logged and never stops delivery;
- on a *critical raised* event, if a stop-request file is configured, a small JSON file
  (time, scan_id, rule, line, message, ``"requested_by": "strayline"``) is written
  atomically (temporary file in the same folder, fsync, rename).

The stop-request file is a request, not a control: acquisition software MAY poll it and
pause the scan when it appears. It NEVER replaces the instrument's own interlocks and
safety limits, and strayline never deletes it (the operator does, after looking).
"""

from __future__ import annotations

import json
import os
import queue
import re
import subprocess
import sys
import threading
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from os import PathLike
from pathlib import Path
from typing import Any

import structlog

from strayline._atomic import write_text_atomic
from strayline.alerts.event import AlertEvent
from strayline.alerts.log import format_alert

__all__ = [
    "HOOK_PLACEHOLDERS",
    "AlertNotLogged",
    "AlertSink",
    "SinkStatistics",
    "fill_hook_arguments",
    "write_stop_request",
]

#: The placeholders a hook argument may carry, filled from the event per argument.
HOOK_PLACEHOLDERS = ("scan_id", "rule", "severity", "state", "line", "message")


@dataclass(frozen=True)
class SinkStatistics:
    """Snapshot of an :class:`AlertSink`'s counters."""

    delivered: int
    hooks_run: int
    hooks_failed: int
    hooks_dropped: int
    hook_queue_depth: int
    stop_requests_written: int


_PLACEHOLDER = re.compile("{(" + "|".join(HOOK_PLACEHOLDERS) + ")}")


def fill_hook_arguments(argv: Sequence[str], event: AlertEvent) -> list[str]:
    """The hook's arguments with the event's values in place of the placeholders.

    One pass per argument: a value that itself holds ``{message}`` (a scan id comes from a
    folder name) is not expanded again. The values are untrusted text: passed as
    separate arguments, never through a shell.
    """
    values = {
        "scan_id": event.scan_id,
        "rule": event.rule,
        "severity": event.severity,
        "state": event.state,
        "line": "" if event.line_index is None else str(event.line_index),
        "message": event.message,
    }
    return [_PLACEHOLDER.sub(lambda m: values[m.group(1)], template) for template in argv]


class AlertNotLogged(OSError):
    """The alert log could not be written; the event was announced all the same."""


def write_stop_request(path: Path, event: AlertEvent) -> None:
    """Write the stop-request JSON atomically: temporary file, fsync, rename."""
    payload = {
        "time": event.time,
        "scan_id": event.scan_id,
        "rule": event.rule,
        "line": event.line_index,
        "message": event.message,
        "requested_by": "strayline",
    }
    path.parent.mkdir(parents=True, exist_ok=True)
    write_text_atomic(path, json.dumps(payload, ensure_ascii=False, indent=2) + "\n")


def _console_is_plain(mode: str) -> bool:
    """The readable alert line goes only to a plain terminal console: under journald or
    with JSON console records it would break one-record-per-line output, and the log's
    own ``alert_raised``/``alert_cleared`` record already carries the event."""
    from strayline.logs import detect_console_mode

    if mode == "auto":
        return detect_console_mode(sys.stderr) == "plain"
    return mode == "plain"


class AlertSink:
    """Delivers alert events; options are settled here, once.

    Parameters
    ----------
    alert_log : path or None
        JSON-lines file the events are appended to (parent folders are created when the
        first event is written).
    console : bool
        Also print a one-line summary of each event to stderr.
    hook : mapping severity → argument list, optional
        Command run for events of that severity, without a shell.
    hook_timeout_s : float
        A hook still running after this long is killed (and the kill is logged).
    stop_request_file : path or None
        Written atomically on critical raised events.
    hook_queue_size : int
        Hook runs waiting beyond this are dropped (and logged), so delivery never blocks.
    logger : structlog logger, optional
        Defaults to the ``strayline.alerts`` logger.
    """

    def __init__(
        self,
        alert_log: str | PathLike[str] | None,
        *,
        console: bool = False,
        hook: Mapping[str, Sequence[str]] | None = None,
        hook_timeout_s: float = 10.0,
        stop_request_file: str | PathLike[str] | None = None,
        hook_queue_size: int = 64,
        logger: Any = None,
    ) -> None:
        self._log_path = None if alert_log is None else Path(alert_log)
        self._console = bool(console)
        self._hook = {sev: [str(a) for a in argv] for sev, argv in (hook or {}).items() if argv}
        self._hook_timeout_s = float(hook_timeout_s)
        self._stop_path = None if stop_request_file is None else Path(stop_request_file)
        self._log = logger if logger is not None else structlog.get_logger("strayline.alerts")
        self._lock = threading.Lock()
        self._delivered = 0
        self._hooks_run = 0
        self._hooks_failed = 0
        self._hooks_dropped = 0
        self._stops = 0
        self._queue: queue.Queue[list[str] | None] = queue.Queue(maxsize=hook_queue_size)
        self._thread: threading.Thread | None = None
        if self._hook:
            self._thread = threading.Thread(
                target=self._run_hooks, name="strayline-alert-hooks", daemon=True
            )
            self._thread.start()

    @classmethod
    def from_config(cls, config: Any) -> AlertSink:
        """Build from the daemon config: ``paths.alert_log`` and the ``alerts`` section
        (``console``, ``hook``, ``hook_timeout_s``, ``stop_request_file``)."""
        section = config.alerts
        return cls(
            config.paths.alert_log,
            console=section.console and _console_is_plain(config.logging.console),
            hook=section.hook,
            hook_timeout_s=section.hook_timeout_s,
            stop_request_file=section.stop_request_file,
        )

    # -- delivery -----------------------------------------------------------------------

    def deliver(self, event: AlertEvent, *, notify: bool = True) -> None:
        """Announce one event (log record, console, stop request, hook), then append it to
        the alert log; returns without waiting for the hook.

        The announcement comes first and does not depend on the alert log, so an alert
        about a failing output disk (where the log may live) still reaches the hook and
        the stop-request file.

        Parameters
        ----------
        notify : bool
            False to only append to the alert log an event announced before (one whose
            earlier delivery raised :class:`AlertNotLogged`).

        Raises
        ------
        AlertNotLogged
            The alert log could not be written (the event was announced if asked to be).
        """
        if notify:
            self._announce(event)
        if self._log_path is not None:
            line = event.to_json() + "\n"
            try:
                self._log_path.parent.mkdir(parents=True, exist_ok=True)
                with self._lock, open(self._log_path, "a", encoding="utf-8") as fh:
                    fh.write(line)
                    fh.flush()
                    os.fsync(fh.fileno())
            except OSError as exc:
                raise AlertNotLogged(
                    exc.errno, f"{self._log_path}: the alert could not be logged: {exc}"
                ) from exc
        self._delivered += 1

    def _announce(self, event: AlertEvent) -> None:
        log_method = self._log.warning if event.severity != "info" else self._log.info
        if event.severity == "critical" and event.state == "raised":
            log_method = self._log.error
        log_method(f"alert_{event.state}", **event.to_dict())
        if self._console:
            print(format_alert(event), file=sys.stderr, flush=True)
        if event.state == "raised" and event.severity == "critical" and self._stop_path:
            try:
                write_stop_request(self._stop_path, event)
                self._stops += 1
                self._log.error(
                    "stop_requested",
                    path=str(self._stop_path),
                    scan_id=event.scan_id,
                    rule=event.rule,
                )
            except OSError as exc:
                self._log.error("stop_request_failed", path=str(self._stop_path), error=str(exc))
        argv = self._hook.get(event.severity)
        if argv:
            try:
                self._queue.put_nowait(fill_hook_arguments(argv, event))
            except queue.Full:
                self._hooks_dropped += 1
                self._log.error("alert_hook_dropped", argv=argv, reason="hook queue full")

    def _run_hooks(self) -> None:
        while True:
            argv = self._queue.get()
            try:
                if argv is None:
                    return
                self._run_one(argv)
            finally:
                self._queue.task_done()

    def _run_one(self, argv: list[str]) -> None:
        self._hooks_run += 1
        try:
            proc = subprocess.run(
                argv,
                shell=False,
                stdin=subprocess.DEVNULL,
                capture_output=True,
                timeout=self._hook_timeout_s,
                check=False,
            )
        except subprocess.TimeoutExpired:
            self._hooks_failed += 1
            self._log.error("alert_hook_timeout", argv=argv, timeout_s=self._hook_timeout_s)
            return
        except OSError as exc:
            self._hooks_failed += 1
            self._log.error("alert_hook_failed", argv=argv, error=str(exc))
            return
        if proc.returncode != 0:
            self._hooks_failed += 1
            self._log.error(
                "alert_hook_failed",
                argv=argv,
                returncode=proc.returncode,
                stderr=proc.stderr.decode("utf-8", "replace")[-500:],
            )
        else:
            self._log.info("alert_hook_ran", argv=argv)

    # -- lifecycle ----------------------------------------------------------------------

    def wait_hooks(self, timeout_s: float | None = None) -> bool:
        """Block until queued hooks have run; False if ``timeout_s`` passed first."""
        if self._thread is None:
            return True
        done = threading.Event()

        def waiter() -> None:
            self._queue.join()
            done.set()

        threading.Thread(target=waiter, daemon=True).start()
        return done.wait(timeout_s)

    def close(self, timeout_s: float | None = None) -> None:
        """Stop the hook thread after the queued hooks (waits at most ``timeout_s``)."""
        if self._thread is None:
            return
        try:
            self._queue.put(None, timeout=timeout_s)
        except queue.Full:
            return
        self._thread.join(timeout_s)

    def statistics(self) -> SinkStatistics:
        """Counters snapshot."""
        return SinkStatistics(
            delivered=self._delivered,
            hooks_run=self._hooks_run,
            hooks_failed=self._hooks_failed,
            hooks_dropped=self._hooks_dropped,
            hook_queue_depth=self._queue.qsize(),
            stop_requests_written=self._stops,
        )
