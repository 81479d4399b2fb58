"""The daemon's own log: structlog processor chains over stdlib logging.

One rich event per unit of work is the habit (``line_processed`` with scan, line,
pixels, failures, fit and write times), so every output renders key-value events well:

- ``json_file``: one JSON object per line (``time``, ``level``, ``event``, ``logger``, then
  the event's keys), safe with log rotation: the file is reopened when it was moved or
  deleted, and :func:`reopen_log_files` reopens it on demand (SIGHUP).
- console ``plain``: ``2026-03-01T12:00:00.123456Z info     line_processed scan=S1 line=42``.
- console ``journald``: one line per record with an sd-daemon priority prefix and no
  timestamp, since journald adds its own: ``<4>pl_low scan=S1 line=42``.
- console ``json``: the same JSON lines as the file.
- console ``auto``: ``journald`` when standard error is connected to the journal (the
  ``JOURNAL_STREAM`` variable names its device and inode), else ``plain``.

Records from other libraries' stdlib loggers go through the same renderers.

References
----------
sd-daemon(3), systemd manual: the ``<N>`` syslog priority prefixes on standard error.
systemd.exec(5), systemd manual: ``$JOURNAL_STREAM`` and how to compare it with stderr.
"""

from __future__ import annotations

import io
import json
import logging
import logging.handlers
import math
import os
import sys
from collections.abc import MutableMapping
from pathlib import Path
from typing import Any, Literal, TextIO

import structlog

from strayline.errors import ConfigError

__all__ = [
    "ConsoleMode",
    "configure_logging",
    "detect_console_mode",
    "get_logger",
    "reopen_log_files",
    "shutdown_logging",
]

ConsoleMode = Literal["auto", "plain", "journald", "json", "off"]

_LEVELS = {
    "debug": logging.DEBUG,
    "info": logging.INFO,
    "warning": logging.WARNING,
    "error": logging.ERROR,
    "critical": logging.CRITICAL,
}
# sd-daemon(3): SD_CRIT <2>, SD_ERR <3>, SD_WARNING <4>, SD_INFO <6>, SD_DEBUG <7>.
_PRIORITY = {"debug": 7, "info": 6, "warning": 4, "error": 3, "critical": 2}
_COLORS = {"debug": "\x1b[2m", "warning": "\x1b[33m", "error": "\x1b[31m", "critical": "\x1b[1;31m"}
_FIRST_KEYS = ("time", "level", "event", "logger")

# Handlers this module installed on the root logger (so reconfiguring replaces them).
_installed: list[logging.Handler] = []


# --------------------------------------------------------------------------- values


def _plain(value: Any) -> Any:
    """Python builtins for numpy scalars and paths, so every renderer shows them plainly."""
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if type(value).__module__ == "numpy" and getattr(value, "ndim", None) == 0:
        return value.item()
    return value


def _json_default(value: Any) -> Any:
    plain = _plain(value)
    if plain is not value:
        return plain
    if hasattr(value, "tolist"):
        return value.tolist()
    return repr(value)


def _json_safe(value: Any) -> Any:
    """Non-finite floats as text ("nan", "inf"), since JSON has no spelling for them."""
    value = _plain(value)
    if isinstance(value, float) and not math.isfinite(value):
        return repr(value)
    return value


def _format_value(value: Any) -> str:
    value = _plain(value)
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, list | tuple | dict):
        text = json.dumps(value, default=_json_default, ensure_ascii=False, separators=(",", ":"))
    else:
        text = str(value)
    if not text or any(c.isspace() or c in "\"'=" for c in text):
        text = json.dumps(text, ensure_ascii=False)
    return text


# --------------------------------------------------------------------------- renderers


class _JsonLine:
    """Render an event dict as one JSON object, with time, level, event, logger first."""

    def __call__(self, _logger: Any, _name: str, event_dict: MutableMapping[str, Any]) -> str:
        ordered = {k: _json_safe(event_dict[k]) for k in _FIRST_KEYS if k in event_dict}
        ordered.update((k, _json_safe(v)) for k, v in event_dict.items() if k not in ordered)
        return json.dumps(ordered, default=_json_default, ensure_ascii=False)


class _KeyValueLine:
    """Render an event dict as ``event key=value ...`` on one line.

    Parameters
    ----------
    journald : bool
        Prefix the sd-daemon priority (``<4>``) and leave out time and level; a traceback
        stays on the same line (escaped), since journald makes each line its own record.
    colors : bool
        Colour the level name (terminal only).
    """

    def __init__(self, *, journald: bool, colors: bool) -> None:
        self._journald = journald
        self._colors = colors

    def __call__(self, _logger: Any, _name: str, event_dict: MutableMapping[str, Any]) -> str:
        ed = dict(event_dict)
        level = str(ed.pop("level", "info"))
        time = ed.pop("time", None)
        event = str(ed.pop("event", ""))
        logger_name = ed.pop("logger", None)
        exception = ed.pop("exception", None) if not self._journald else None
        parts = [f"{key}={_format_value(value)}" for key, value in ed.items()]
        if logger_name is not None:
            parts.append(f"logger={logger_name}")
        body = " ".join([_format_value(event) if "\n" in event else event, *parts])
        if self._journald:
            return f"<{_PRIORITY.get(level, 6)}>{body}"
        shown = f"{level:<8}"
        if self._colors and level in _COLORS:
            shown = f"{_COLORS[level]}{shown}\x1b[0m"
        line = f"{time} {shown} {body}" if time is not None else f"{shown} {body}"
        return f"{line}\n{exception}" if exception else line


# --------------------------------------------------------------------------- handlers


class _JsonLinesFileHandler(logging.handlers.WatchedFileHandler):
    """A WatchedFileHandler (reopens when the file was moved or deleted) that can also be
    told to reopen, e.g. on SIGHUP after a rotation tool renamed the file."""

    _failing = False

    def emit(self, record: logging.LogRecord) -> None:
        """Write one record; while the file's folder cannot be looked at (its disk failed,
        or a file stands where the folder was) records are dropped here (the console
        keeps them) and the daemon goes on, saying so once on stderr."""
        try:
            self.reopenIfNeeded()
            logging.FileHandler.emit(self, record)
        except OSError as exc:
            if not self._failing:
                self._failing = True
                print(
                    f"strayline: log file {self.baseFilename} unusable ({exc}); records "
                    "go to the console only until it is back",
                    file=sys.stderr,
                    flush=True,
                )
            return
        self._failing = False

    def reopen(self) -> None:
        """Close the stream and open the file at its path again."""
        self.acquire()
        try:
            if self.stream is not None:
                stream, self.stream = self.stream, None  # None if the open below fails
                stream.flush()
                stream.close()
            self.dev, self.ino = -1, -1
            self.stream = self._open()
            self._statstream()
        finally:
            self.release()


def _formatter(renderer: Any, foreign_chain: list[Any]) -> structlog.stdlib.ProcessorFormatter:
    return structlog.stdlib.ProcessorFormatter(
        foreign_pre_chain=foreign_chain,
        processors=[
            structlog.stdlib.ProcessorFormatter.remove_processors_meta,
            structlog.processors.format_exc_info,
            renderer,
        ],
    )


def detect_console_mode(stream: TextIO) -> Literal["plain", "journald"]:
    """``journald`` when ``stream`` is the journal stream named by ``$JOURNAL_STREAM``.

    systemd.exec(5): the variable holds ``<device>:<inode>`` of the stream connected to the
    journal; a process whose stderr was redirected elsewhere must not trust it blindly.
    """
    named = os.environ.get("JOURNAL_STREAM", "")
    try:
        dev_text, ino_text = named.split(":")
        stat = os.fstat(stream.fileno())
    except (ValueError, OSError, AttributeError, io.UnsupportedOperation):
        return "plain"
    if (stat.st_dev, stat.st_ino) == (int(dev_text), int(ino_text)):
        return "journald"
    return "plain"


def _wants_colors(stream: TextIO) -> bool:
    try:
        return stream.isatty() and "NO_COLOR" not in os.environ
    except (AttributeError, ValueError):
        return False


def configure_logging(
    *,
    level: str = "info",
    console: ConsoleMode = "auto",
    json_file: str | os.PathLike[str] | None = None,
    stream: TextIO | None = None,
) -> None:
    """Route structlog and stdlib logging to the console and/or a JSON-lines file.

    Idempotent: calling it again replaces the handlers it installed before.

    Parameters
    ----------
    level : {"debug", "info", "warning", "error", "critical"}
        Lowest level logged.
    console : {"auto", "plain", "journald", "json", "off"}
        Console format (see the module docstring).
    json_file : path or None
        File receiving JSON lines; its folder is created when missing.
    stream : text stream, optional
        Console stream (default: ``sys.stderr`` at call time).

    Raises
    ------
    ConfigError
        Unknown level or console mode, or the JSON file cannot be opened.
    """
    if level.lower() not in _LEVELS:
        raise ConfigError(
            None, "logging.level", f"expected one of {', '.join(_LEVELS)}; found {level!r}"
        )
    modes = ("auto", "plain", "journald", "json", "off")
    if console not in modes:
        raise ConfigError(
            None, "logging.console", f"expected one of {', '.join(modes)}; found {console!r}"
        )
    out = stream if stream is not None else sys.stderr

    timestamper = structlog.processors.TimeStamper(fmt="iso", utc=True, key="time")
    foreign_chain: list[Any] = [
        structlog.stdlib.add_log_level,
        structlog.stdlib.add_logger_name,
        timestamper,
    ]
    handlers: list[logging.Handler] = []
    if json_file is not None:
        path = Path(json_file)
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            file_handler: logging.Handler = _JsonLinesFileHandler(path, encoding="utf-8")
        except OSError as exc:
            raise ConfigError(
                None, "logging.json_file", f"cannot open {path} for appending: {exc}"
            ) from exc
        file_handler.setFormatter(_formatter(_JsonLine(), foreign_chain))
        handlers.append(file_handler)
    mode = detect_console_mode(out) if console == "auto" else console
    if mode != "off":
        renderer: Any = (
            _JsonLine()
            if mode == "json"
            else _KeyValueLine(journald=mode == "journald", colors=_wants_colors(out))
        )
        console_handler = logging.StreamHandler(out)
        console_handler.setFormatter(_formatter(renderer, foreign_chain))
        handlers.append(console_handler)

    _remove_installed()
    root = logging.getLogger()
    root.setLevel(_LEVELS[level.lower()])
    for handler in handlers:
        root.addHandler(handler)
    _installed.extend(handlers)

    structlog.configure(
        processors=[
            structlog.stdlib.filter_by_level,
            structlog.contextvars.merge_contextvars,
            structlog.stdlib.add_log_level,
            structlog.stdlib.add_logger_name,
            structlog.stdlib.PositionalArgumentsFormatter(),
            timestamper,
            structlog.processors.StackInfoRenderer(),
            structlog.stdlib.ProcessorFormatter.wrap_for_formatter,
        ],
        logger_factory=structlog.stdlib.LoggerFactory(),
        wrapper_class=structlog.stdlib.BoundLogger,
        cache_logger_on_first_use=False,
    )


def _remove_installed() -> None:
    root = logging.getLogger()
    while _installed:
        handler = _installed.pop()
        root.removeHandler(handler)
        handler.close()


def reopen_log_files() -> None:
    """Reopen the JSON-lines log file (for SIGHUP after log rotation)."""
    for handler in list(_installed):
        if isinstance(handler, _JsonLinesFileHandler):
            try:
                handler.reopen()
            except OSError as exc:  # its folder is unusable now: the next record retries
                print(f"strayline: cannot reopen {handler.baseFilename}: {exc}", file=sys.stderr)


def shutdown_logging() -> None:
    """Flush and close the handlers :func:`configure_logging` installed and restore
    structlog's defaults."""
    _remove_installed()
    structlog.reset_defaults()


def get_logger(name: str | None = None) -> structlog.stdlib.BoundLogger:
    """A structlog logger named ``name`` (default ``"strayline"``)."""
    logger: structlog.stdlib.BoundLogger = structlog.stdlib.get_logger(name or "strayline")
    return logger
