"""Tests of strayline.logs: JSON lines, rotation safety, journald lines, idempotence."""

from __future__ import annotations

import io
import json
import logging
import os
import re
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import structlog

from strayline import logs
from strayline.errors import ConfigError

ISO_UTC = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?Z")


@pytest.fixture(autouse=True)
def _restore_logging() -> Iterator[None]:
    """Leave the process-wide logging setup as it was before each test."""
    saved_config = structlog.get_config()
    root = logging.getLogger()
    saved_level = root.level
    yield
    logs.shutdown_logging()
    structlog.configure(**saved_config)
    root.setLevel(saved_level)


def _one_rich_event(name: str = "strayline.service") -> None:
    logs.get_logger(name).info(
        "line_processed",
        scan="S-0007",
        line=42,
        pixels=np.int64(256),
        failures=3,
        fit_s=np.float64(0.0123456789),
        write_s=0.004,
        source=Path("/data/in/S-0007/line_00042.h5"),
    )


def _json_lines(path: Path) -> list[dict[str, object]]:
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def test_json_file_lines_parse(tmp_path: Path) -> None:
    """Each record in the JSON file is one JSON object with time, level, event and the
    event's keys as plain values."""
    path = tmp_path / "logs" / "strayline.jsonl"
    logs.configure_logging(console="off", json_file=path)
    _one_rich_event()
    logs.get_logger().warning("disk_low", free_mib=812.5)
    first, second = _json_lines(path)
    assert list(first)[:4] == ["time", "level", "event", "logger"]
    assert ISO_UTC.fullmatch(str(first["time"]))
    assert first["event"] == "line_processed"
    assert first["level"] == "info"
    assert first["logger"] == "strayline.service"
    assert first["pixels"] == 256
    assert first["fit_s"] == 0.0123456789
    assert first["source"] == "/data/in/S-0007/line_00042.h5"
    assert (second["event"], second["level"], second["free_mib"]) == ("disk_low", "warning", 812.5)
    assert second["logger"] == "strayline"


def test_json_file_keeps_exceptions_and_non_finite_numbers(tmp_path: Path) -> None:
    """A logged exception becomes a traceback string and NaN a string, so every line stays
    strict JSON."""
    path = tmp_path / "log.jsonl"
    logs.configure_logging(console="off", json_file=path)
    try:
        raise RuntimeError("store vanished")
    except RuntimeError:
        logs.get_logger().exception("write_failed", chi2=float("nan"))
    (record,) = [
        json.loads(line, parse_constant=pytest.fail) for line in path.read_text().splitlines()
    ]
    assert record["level"] == "error"
    assert record["chi2"] == "nan"
    assert "RuntimeError: store vanished" in str(record["exception"])


def test_file_moved_away_is_recreated(tmp_path: Path) -> None:
    """After the log file is moved away (rotation), the next record creates a new file at
    the configured path and the moved file keeps the older records."""
    path = tmp_path / "strayline.jsonl"
    logs.configure_logging(console="off", json_file=path)
    logs.get_logger().info("before_rotation")
    rotated = tmp_path / "strayline.jsonl.1"
    path.rename(rotated)
    logs.get_logger().info("after_rotation")
    assert [r["event"] for r in _json_lines(rotated)] == ["before_rotation"]
    assert [r["event"] for r in _json_lines(path)] == ["after_rotation"]


def test_file_deleted_is_recreated(tmp_path: Path) -> None:
    """After the log file is deleted, the next record creates it again."""
    path = tmp_path / "strayline.jsonl"
    logs.configure_logging(console="off", json_file=path)
    logs.get_logger().info("first")
    path.unlink()
    logs.get_logger().info("second")
    assert [r["event"] for r in _json_lines(path)] == ["second"]


def test_a_log_folder_replaced_by_a_file_drops_records_and_never_raises(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """With a file where the log's folder was (the output disk failing) a record is
    dropped with one note on stderr instead of an exception that would end the daemon;
    a reopen (SIGHUP) does not raise either; once the folder is back, records go to the
    file again."""
    folder = tmp_path / "output"
    folder.mkdir()
    path = folder / "strayline.jsonl"
    logs.configure_logging(console="off", json_file=path)
    logs.get_logger().info("before")
    folder.rename(tmp_path / "away")
    folder.write_text("not a folder\n")
    logs.get_logger().info("dropped_1")
    logs.get_logger().info("dropped_2")
    logs.reopen_log_files()
    err = capsys.readouterr().err
    assert err.count("records go to the console only") == 1
    assert "cannot reopen" in err
    folder.unlink()
    folder.mkdir()
    logs.get_logger().info("after")
    assert [r["event"] for r in _json_lines(path)] == ["after"]
    assert [r["event"] for r in _json_lines(tmp_path / "away" / "strayline.jsonl")] == ["before"]


def test_reopen_log_files_switches_to_a_fresh_file(tmp_path: Path) -> None:
    """reopen_log_files (the SIGHUP action) closes the old stream and writes to the file
    now at the path, losing and duplicating nothing."""
    path = tmp_path / "strayline.jsonl"
    logs.configure_logging(console="off", json_file=path)
    logs.get_logger().info("one")
    (handler,) = [h for h in logging.getLogger().handlers if h in logs._installed]
    old_stream = handler.stream  # type: ignore[attr-defined]
    path.rename(tmp_path / "old.jsonl")
    logs.reopen_log_files()
    assert old_stream.closed
    logs.get_logger().info("two")
    assert [r["event"] for r in _json_lines(tmp_path / "old.jsonl")] == ["one"]
    assert [r["event"] for r in _json_lines(path)] == ["two"]


@pytest.mark.parametrize(
    ("method", "prefix"),
    [("debug", "<7>"), ("info", "<6>"), ("warning", "<4>"), ("error", "<3>"), ("critical", "<2>")],
)
def test_journald_priority_prefix(method: str, prefix: str) -> None:
    """Under journald each record is one line starting with its sd-daemon priority
    (SD_DEBUG <7>, SD_INFO <6>, SD_WARNING <4>, SD_ERR <3>, SD_CRIT <2>; sd-daemon(3))
    and carrying no timestamp."""
    out = io.StringIO()
    logs.configure_logging(level="debug", console="journald", stream=out)
    getattr(logs.get_logger(), method)("tip_check", scan="S1", line=7)
    assert out.getvalue() == f"{prefix}tip_check scan=S1 line=7 logger=strayline\n"


def test_journald_keeps_a_traceback_on_one_line() -> None:
    """Under journald a logged exception stays inside its record's single line."""
    out = io.StringIO()
    logs.configure_logging(console="journald", stream=out)
    try:
        raise OSError("disk full")
    except OSError:
        logs.get_logger().exception("write_failed", scan="S1")
    (line,) = out.getvalue().splitlines()
    assert line.startswith("<3>write_failed scan=S1 exception=")
    assert "OSError: disk full" in line


def test_plain_console_renders_key_values() -> None:
    """On a terminal a rich event is one readable line: UTC time, level, event, then
    key=value pairs with numbers shortened and text with spaces quoted."""
    out = io.StringIO()
    logs.configure_logging(console="plain", stream=out)
    _one_rich_event()
    logs.get_logger().info("scan_started", note="two words", done=False, planned=None)
    first, second = out.getvalue().splitlines()
    time, rest = first.split(" ", 1)
    assert ISO_UTC.fullmatch(time)
    assert rest == (
        "info     line_processed scan=S-0007 line=42 pixels=256 failures=3 "
        "fit_s=0.0123457 write_s=0.004 source=/data/in/S-0007/line_00042.h5 "
        "logger=strayline.service"
    )
    assert second.split(" ", 1)[1] == (
        'info     scan_started note="two words" done=false planned=null logger=strayline'
    )


def test_json_console() -> None:
    """The json console mode writes the same JSON objects as the file."""
    out = io.StringIO()
    logs.configure_logging(console="json", stream=out)
    _one_rich_event()
    (record,) = [json.loads(line) for line in out.getvalue().splitlines()]
    assert (record["event"], record["line"], record["failures"]) == ("line_processed", 42, 3)


def test_foreign_stdlib_records_are_rendered() -> None:
    """Records of other libraries' stdlib loggers pass through the same renderer."""
    out = io.StringIO()
    logs.configure_logging(console="journald", stream=out)
    logging.getLogger("some.library").warning("queue %s overflowed", "inotify")
    assert out.getvalue() == "<4>queue inotify overflowed logger=some.library\n"


def test_level_filters_records() -> None:
    """Records below the configured level are dropped."""
    out = io.StringIO()
    logs.configure_logging(level="warning", console="journald", stream=out)
    logs.get_logger().info("quiet")
    logs.get_logger().warning("loud")
    assert out.getvalue() == "<4>loud logger=strayline\n"


def test_configure_twice_does_not_duplicate(tmp_path: Path) -> None:
    """Configuring again replaces the earlier handlers: one record, one line per output."""
    path = tmp_path / "log.jsonl"
    first_out, out = io.StringIO(), io.StringIO()
    logs.configure_logging(console="journald", json_file=path, stream=first_out)
    n_handlers = len(logging.getLogger().handlers)
    logs.configure_logging(console="journald", json_file=path, stream=out)
    assert len(logging.getLogger().handlers) == n_handlers
    logs.get_logger().info("once")
    assert out.getvalue() == "<6>once logger=strayline\n"
    assert first_out.getvalue() == ""
    assert [r["event"] for r in _json_lines(path)] == ["once"]


def test_auto_detects_the_journal_stream(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """console="auto" picks journald when $JOURNAL_STREAM names the device and inode of the
    console stream, and plain lines otherwise (systemd.exec(5), $JOURNAL_STREAM)."""
    with (tmp_path / "stderr.txt").open("w+", encoding="utf-8") as stream:
        stat = os.fstat(stream.fileno())
        monkeypatch.setenv("JOURNAL_STREAM", f"{stat.st_dev}:{stat.st_ino}")
        assert logs.detect_console_mode(stream) == "journald"
        logs.configure_logging(console="auto", stream=stream)
        logs.get_logger().warning("pl_low")
        monkeypatch.setenv("JOURNAL_STREAM", f"{stat.st_dev}:{stat.st_ino + 1}")
        assert logs.detect_console_mode(stream) == "plain"
        monkeypatch.delenv("JOURNAL_STREAM")
        assert logs.detect_console_mode(stream) == "plain"
        stream.flush()
    assert (tmp_path / "stderr.txt").read_text(encoding="utf-8") == "<4>pl_low logger=strayline\n"


def test_bad_settings_are_config_errors(tmp_path: Path) -> None:
    """An unknown level, an unknown console mode or an unopenable file is a ConfigError
    naming the logging key."""
    with pytest.raises(ConfigError, match=r"^logging\.level: expected one of debug, "):
        logs.configure_logging(level="verbose")
    with pytest.raises(ConfigError, match=r"^logging\.console: expected one of auto, "):
        logs.configure_logging(console="syslog")  # type: ignore[arg-type]
    blocker = tmp_path / "file"
    blocker.write_text("")
    with pytest.raises(ConfigError, match=r"^logging\.json_file: cannot open "):
        logs.configure_logging(console="off", json_file=blocker / "log.jsonl")
