"""Tests of the live picture of a running scan: strayline.products.live (drawing),
strayline.products._marks (alert marks read from the log) and the pipeline's refresh on
its background worker (strayline.pipeline._live)."""

from __future__ import annotations

import dataclasses
import struct
import threading
import time
from itertools import pairwise
from pathlib import Path
from typing import Any

import pytest
from structlog.testing import capture_logs

import demo_stream as ds
from strayline.alerts import AlertEvent
from strayline.config import config_from_mapping
from strayline.errors import ConfigError
from strayline.pipeline import LinePipeline, _live
from strayline.products import LivePicture, live_image_name, products_dir
from strayline.products._marks import AlertLogCursor, AlertMark, alert_marks

SCAN = "live-scan"
LINES = 8
PIXELS = 12


@pytest.fixture(scope="module")
def scan_files(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    """A small demo scan (fixed seed), forward trace only: its line files in order."""
    root = tmp_path_factory.mktemp("live")
    config = ds.DemoConfig(
        scene=ds.labyrinth(), n_lines=LINES, n_pixels=PIXELS, seed=9, scan_id=SCAN
    )
    ds.run_scan(config, root / "incoming", root / "truth")
    files = sorted((root / "incoming" / SCAN).glob("line_*.h5"))
    assert len(files) == LINES
    return files


@pytest.fixture(autouse=True)
def _draw_here(monkeypatch: pytest.MonkeyPatch) -> None:
    """Pictures drawn on the worker thread, where a test can stand in for the drawing (the
    drawing process is tested on its own)."""
    monkeypatch.setattr(_live, "DRAW_IN_CHILD", False)


def _pipeline(
    tmp_path: Path, *, background: bool = True, clock: Any = None, **products: Any
) -> LinePipeline:
    """A pipeline writing below ``tmp_path``; scan-end products off unless asked for."""
    data = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "logging": {"console": "off"},
        "alerts": {"console": False},
        "products": {"enabled": False, "live_every_lines": 3, "live_every_s": None, **products},
    }
    config = config_from_mapping(data, base_dir=tmp_path)
    extra = {} if clock is None else {"clock": clock}
    return LinePipeline(config, background_products=background, **extra)


def _live_path(tmp_path: Path) -> Path:
    return products_dir(tmp_path / "output", None, SCAN) / live_image_name("forward")


@pytest.fixture
def titles(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """The first title line of every quick-look figure drawn while the test runs."""
    from strayline.products import _figures

    seen: list[str] = []
    draw = _figures.quicklook_figure

    def spy(trace: Any, heading: Any, marks: Any = ()) -> Any:
        seen.append(heading.lines(trace).split("\n")[0])
        return draw(trace, heading, marks)

    monkeypatch.setattr(_figures, "quicklook_figure", spy)
    return seen


def _png_size(path: Path) -> tuple[int, int]:
    """Width and height from a PNG's IHDR chunk (PNG specification, section 11.2.2)."""
    head = path.read_bytes()[:24]
    assert head[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", head[16:24])


def test_live_picture_appears_after_n_lines_and_is_replaced_as_lines_arrive(
    scan_files: list[Path], tmp_path: Path, titles: list[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """With live_every_lines 3 the picture appears once 3 lines are committed, stays
    until 3 more are, and is then replaced by a newer one through a rename (a new file at
    the path, no temporary file left beside it). (The lines come faster than pictures are
    drawn here: the duty-cycle floor is off, tested on its own below.)"""
    monkeypatch.setattr(_live, "DUTY_GAP", 0.0)
    pipeline = _pipeline(tmp_path)
    live = _live_path(tmp_path)
    try:
        for path in scan_files[:2]:
            pipeline.process(path)
        assert pipeline.wait_background(30.0)
        assert not live.exists()
        pipeline.process(scan_files[2])
        assert pipeline.wait_background(30.0)
        first = live.read_bytes()
        first_inode = live.stat().st_ino
        assert _png_size(live)[0] >= 800
        for path in scan_files[3:5]:
            pipeline.process(path)
        assert pipeline.wait_background(30.0)
        assert live.read_bytes() == first  # 5 lines: not due yet
        pipeline.process(scan_files[5])
        assert pipeline.wait_background(30.0)
    finally:
        pipeline.close()
    assert live.read_bytes() != first
    assert live.stat().st_ino != first_inode  # replaced by a rename, not rewritten in place
    prefix = f"{SCAN} — forward trace — profile none (base config) — "
    assert titles == [
        f"{prefix}3 of {LINES} lines × {PIXELS} pixels",
        f"{prefix}6 of {LINES} lines × {PIXELS} pixels",
    ]
    assert [p.name for p in live.parent.iterdir()] == [live.name]  # no temporary file


@pytest.fixture
def draws(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Stand in for the drawing (what is tested is when it runs): the name of the thread
    of every LivePicture.draw call."""
    seen: list[str] = []

    def record(self: LivePicture) -> tuple[Path, ...]:
        seen.append(threading.current_thread().name)
        return ()

    monkeypatch.setattr(LivePicture, "draw", record)
    return seen


def test_live_picture_by_time_and_at_the_last_line(
    scan_files: list[Path], tmp_path: Path, draws: list[str]
) -> None:
    """With live_every_s 10 and lines every 4 s, a picture is drawn by the first line
    landing 10 s or more after the last picture (the first counted from the first line),
    and by the scan's last line whenever it lands."""
    now = [1.9e9]
    pipeline = _pipeline(tmp_path, clock=lambda: now[0], live_every_lines=None, live_every_s=10)
    counts = []
    try:
        for path in scan_files:
            pipeline.process(path)
            assert pipeline.wait_background(30.0)
            counts.append(len(draws))
            now[0] += 4.0
    finally:
        pipeline.close()
    # lines at 0, 4, 8, 12 (12 s after the first), 16, 20, 24 (12 s after), 28 (the last)
    assert counts == [0, 0, 0, 1, 1, 1, 2, 3]


def test_pictures_take_at_most_a_tenth_of_the_time_in_a_burst(
    scan_files: list[Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Lines every 0.1 s, a picture due after every line, each taking 0.05 s to draw: a
    picture waits ten times the last one's drawing time, so there are far fewer pictures
    than lines and at least 0.5 s between them; the last line still gets one."""
    now = [1.9e9]
    drawn_at: list[float] = []

    def slow_draw(self: LivePicture) -> tuple[Path, ...]:
        drawn_at.append(now[0])
        time.sleep(0.05)
        return ()

    monkeypatch.setattr(LivePicture, "draw", slow_draw)
    pipeline = _pipeline(tmp_path, clock=lambda: now[0], live_every_lines=1)
    try:
        for path in scan_files:
            pipeline.process(path)
            assert pipeline.wait_background(30.0)
            now[0] += 0.1
    finally:
        pipeline.close()
    assert 2 <= len(drawn_at) < len(scan_files) / 2
    gaps = [b - a for a, b in pairwise(drawn_at[:-1])]
    assert all(gap >= 10 * 0.05 - 1e-9 for gap in gaps)
    assert drawn_at[-1] == pytest.approx(1.9e9 + 0.1 * (len(scan_files) - 1))  # the last line


@pytest.mark.slow
def test_the_daemon_draws_its_pictures_in_a_child_process(
    scan_files: list[Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """With the drawing process on (the default), the picture appears, and a stand-in for
    the drawing patched into this process is never called: a line never waits for
    matplotlib's hold on this interpreter."""
    monkeypatch.setattr(_live, "DRAW_IN_CHILD", True)
    here: list[str] = []
    monkeypatch.setattr(LivePicture, "draw", lambda self: here.append("drawn here") or ())
    pipeline = _pipeline(tmp_path)
    try:
        for path in scan_files[:3]:
            pipeline.process(path)
        assert pipeline.wait_background(120.0)
    finally:
        pipeline.close()
    assert _png_size(_live_path(tmp_path))[0] >= 800
    assert here == []


def test_live_refresh_runs_off_the_pipeline_thread_and_coalesces(
    scan_files: list[Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """While a live picture is being drawn (held up here), the pipeline keeps committing
    lines; of the refreshes due meanwhile only one waits, and every drawing runs on the
    background worker's thread."""
    started, release = threading.Event(), threading.Event()
    threads: list[str] = []

    def held(self: LivePicture) -> tuple[Path, ...]:
        threads.append(threading.current_thread().name)
        started.set()
        release.wait(30.0)
        return ()

    monkeypatch.setattr(LivePicture, "draw", held)
    pipeline = _pipeline(tmp_path, live_every_lines=1)
    try:
        pipeline.process(scan_files[0])
        assert started.wait(30.0)  # the first drawing has begun, and is held
        outcomes = [pipeline.process(path) for path in scan_files[1:5]]
        assert [o.kind for o in outcomes] == ["written"] * 4  # lines go on meanwhile
        assert threads == ["strayline-products"]
        release.set()
        assert pipeline.wait_background(30.0)
    finally:
        release.set()
        pipeline.close()
    assert threads == ["strayline-products", "strayline-products"]  # 4 requests, 1 queued
    assert threading.main_thread().name not in threads


def test_no_live_picture_without_a_worker_or_when_turned_off(
    scan_files: list[Path], tmp_path: Path, draws: list[str]
) -> None:
    """A pipeline without a background worker (a ``process`` pass) draws no live picture,
    and neither does the daemon's with live_image off."""
    for name, background, products in (
        ("pass", False, {}),
        ("off", True, {"live_image": False}),
    ):
        pipeline = _pipeline(tmp_path / name, background=background, **products)
        try:
            for path in scan_files[:4]:
                pipeline.process(path)
            assert pipeline.wait_background(30.0)
        finally:
            pipeline.close()
    assert draws == []


def test_a_failing_live_picture_is_logged_once_and_lines_go_on(
    scan_files: list[Path], tmp_path: Path
) -> None:
    """When the live picture cannot be written (its folder is a file), the first failure
    of the scan is a warning naming the error, later ones are not, and every line is
    still written."""
    blocker = tmp_path / "blocked"
    blocker.write_text("a file where the products folder should go", encoding="utf-8")
    pipeline = _pipeline(tmp_path, folder=str(blocker), live_every_lines=2)
    try:
        with capture_logs() as logs:
            outcomes = [pipeline.process(path) for path in scan_files[:6]]
            assert pipeline.wait_background(30.0)
    finally:
        pipeline.close()
    assert [o.kind for o in outcomes] == ["written"] * 6
    failed = [e for e in logs if e["event"] == "live_image_failed"]
    assert [e["log_level"] for e in failed] == ["warning", "debug", "debug"]
    assert failed[0]["scan"] == SCAN
    assert "Error" in failed[0]["error"]


# -- config ---------------------------------------------------------------------------------


def test_live_config_keys_defaults_and_checks(tmp_path: Path) -> None:
    """The live keys have documented defaults; a live picture with neither a line count nor
    a time is refused naming the key; off, both may be null; a profile cannot set them."""
    base = {"paths": {"watch_root": "in", "output_root": "out"}}
    config = config_from_mapping(base, base_dir=tmp_path)
    products = config.products
    assert (products.live_image, products.live_every_lines, products.live_every_s) == (
        True,
        32,
        30.0,
    )
    never = {"live_every_lines": None, "live_every_s": None}
    with pytest.raises(
        ConfigError,
        match=r"products\.live_every_lines: the live image needs live_every_lines or "
        r"live_every_s \(or both\); found both null \(set live_image: false to turn it off\)",
    ):
        config_from_mapping(base | {"products": never}, base_dir=tmp_path)
    off = config_from_mapping(base | {"products": never | {"live_image": False}}, base_dir=tmp_path)
    assert not off.products.live_image
    for key, expected in (("live_every_lines", "of at least 1"), ("live_every_s", "above 0")):
        with pytest.raises(ConfigError, match=rf"products\.{key}: expected a value {expected}"):
            config_from_mapping(base | {"products": {key: 0}}, base_dir=tmp_path)
    (tmp_path / "profiles").mkdir()
    (tmp_path / "profiles" / "fast.yaml").write_text(
        "products:\n  live_every_lines: 1\n", encoding="utf-8"
    )
    with pytest.raises(ConfigError, match=r"products\.live_every_lines: a profile may set only"):
        config.with_profile("fast")


# -- alert marks ----------------------------------------------------------------------------


def _event(rule: str, state: str, line: int | None, **fields: Any) -> AlertEvent:
    """An alert event of the scan (only the fields the marks read matter)."""
    event = AlertEvent(
        time="2031-05-04T12:00:30.000+00:00",
        scan_id=SCAN,
        rule=rule,
        severity="warning",
        state=state,  # type: ignore[arg-type]
        line_index=line,
        direction="forward",
        message=f"{rule} {state}",
        advice="look",
    )
    return dataclasses.replace(event, **fields)


def test_alert_marks_keep_raised_events_of_the_scan_that_name_a_line() -> None:
    """Marks come from raised events of the scan with a line, sorted and without repeats;
    cleared events, events without a line and other scans' are left out."""
    events = [
        _event("jump", "raised", 9),
        _event("lost", "raised", 3, severity="critical", direction=None),
        _event("jump", "raised", 9),
        _event("jump", "cleared", 11),
        _event("stalled", "raised", None),
        _event("jump", "raised", 4, scan_id="other"),
    ]
    assert alert_marks(events, SCAN) == (
        AlertMark(3, None, "critical", "lost"),
        AlertMark(9, "forward", "warning", "jump"),
    )
    assert AlertMark(3, None, "critical", "lost").on("backward")
    assert not AlertMark(9, "forward", "warning", "jump").on("backward")


def test_alert_log_cursor_reads_what_was_appended(tmp_path: Path) -> None:
    """The cursor gives no marks without a log, reads the log, then only what was appended
    (a partial last line once it is complete), and reads a rotated log from its start
    keeping the marks found before; a line that is no event is skipped."""
    log = tmp_path / "alerts.jsonl"
    cursor = AlertLogCursor(log, SCAN)
    assert cursor.marks() == ()
    assert AlertLogCursor(None, SCAN).marks() == ()
    log.write_text(_event("jump", "raised", 2).to_json() + "\nnot an event\n", encoding="utf-8")
    assert [m.line_index for m in cursor.marks()] == [2]
    whole = _event("lost", "raised", 5).to_json()
    with open(log, "a", encoding="utf-8") as fh:
        fh.write(whole[:20])  # a writer mid-line
    assert [m.line_index for m in cursor.marks()] == [2]
    with open(log, "a", encoding="utf-8") as fh:
        fh.write(whole[20:] + "\n")
    assert [m.line_index for m in cursor.marks()] == [2, 5]
    log.rename(tmp_path / "alerts.jsonl.1")  # rotated: a new, shorter file at the path
    log.write_text(_event("jump", "raised", 7).to_json() + "\n", encoding="utf-8")
    assert [m.line_index for m in cursor.marks()] == [2, 5, 7]


def test_live_picture_draws_each_trace_with_the_logs_marks(
    scan_files: list[Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """LivePicture draws one picture per trace with committed lines, titled as live at the
    clock's time, with the marks of the scan's alerts read from the log; before any line
    it writes nothing."""
    from datetime import UTC, datetime

    from strayline.products import _figures

    seen: list[tuple[Any, Any]] = []
    draw = _figures.quicklook_figure

    def spy(trace: Any, heading: Any, marks: Any = ()) -> Any:
        seen.append((heading, marks))
        return draw(trace, heading, marks)

    monkeypatch.setattr(_figures, "quicklook_figure", spy)
    pipeline = _pipeline(tmp_path, background=False)
    try:
        pipeline.process(scan_files[0])
        pipeline.process(scan_files[1])
    finally:
        pipeline.close()
    store = tmp_path / "output" / f"{SCAN}.zarr"
    log = tmp_path / "alerts.jsonl"
    log.write_text(_event("jump", "raised", 1).to_json() + "\n", encoding="utf-8")
    drawn = datetime(2031, 5, 4, 2, 30, tzinfo=UTC)
    out = tmp_path / "live"
    picture = LivePicture(store, out, alert_log=log, clock=lambda: drawn)
    started = time.perf_counter()
    assert picture.draw() == (out / "live_forward.png",)
    assert time.perf_counter() - started < 10.0
    [(heading, marks)] = seen
    assert (heading.scan_id, heading.lines_planned, heading.drawn, heading.live) == (
        SCAN,
        LINES,
        drawn,
        True,
    )
    assert marks == (AlertMark(1, "forward", "warning", "jump"),)
