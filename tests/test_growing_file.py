"""Tests for the growing scan file (strayline.lines.growing_file) and its way through the
watcher and the pipeline: rows handed over once, committed rows only, a malformed file
holding its scan with an alert, a restart resuming from the store's ledger, and a writer
never locked out (by a reader in another process, as HDF5 file locks work between
processes)."""

from __future__ import annotations

import subprocess
import sys
import textwrap
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

import demo_stream as ds
import strayline.lines.growing_file as growing_module
from strayline.alerts import read_alert_log
from strayline.config import Config, config_from_mapping
from strayline.errors import LineFileError
from strayline.lines import (
    GROWING_FILE_READER,
    GrowingFileWriter,
    ReaderChoice,
    ScanHeader,
    ScanLine,
    read_line_file,
)
from strayline.pipeline import LinePipeline
from strayline.watch import LineWatcher, WatchOptions

SCAN = "grow-1"


@pytest.fixture(scope="module")
def demo_lines(tmp_path_factory: pytest.TempPathFactory) -> list[ScanLine]:
    """A small demo scan's lines (forward and backward), read from contract-v1 files."""
    folder = tmp_path_factory.mktemp("demo")
    demo = ds.DemoConfig(n_lines=6, n_pixels=8, trace_retrace=True, scan_id=SCAN, seed=3)
    ds.run_scan(demo, folder / "in", folder / "truth", sleep=lambda _s: None)
    files = sorted((folder / "in" / SCAN).glob("*.h5"))
    lines = [read_line_file(f) for f in files]
    return sorted(lines, key=lambda ln: (ln.line_index, ln.direction == "backward"))


def _write(path: Path, lines: list[ScanLine]) -> GrowingFileWriter:
    """A growing file (closed after each line) holding ``lines``."""
    path.parent.mkdir(parents=True, exist_ok=True)
    writer = GrowingFileWriter(path, ScanHeader.of(lines[0]), swmr=False)
    for line in lines:
        writer.append(line)
    return writer


def _read(path: Path, **kw: object) -> list[ScanLine]:
    return list(GROWING_FILE_READER.read(path, **kw))  # type: ignore[arg-type]


def _config(folder: Path) -> Config:
    return config_from_mapping(
        {
            "paths": {"watch_root": "incoming", "output_root": "output"},
            "readers": {"default": "growing-file"},
            "alerts": {"console": False},
            "logging": {"console": "off"},
        },
        base_dir=folder,
    )


# -- the reader -------------------------------------------------------------------------


def test_rows_read_back_as_the_lines_written(tmp_path: Path, demo_lines: list[ScanLine]) -> None:
    """Every committed row reads back as the line appended (counts, positions, times, key),
    with a checksum that is the same on every read and differs between rows."""
    path = tmp_path / SCAN / "scan.h5"
    _write(path, demo_lines[:5])
    first, again = _read(path), _read(path)
    assert [(ln.line_index, ln.direction) for ln in first] == [
        (ln.line_index, ln.direction) for ln in demo_lines[:5]
    ]
    for got, want in zip(first, demo_lines[:5], strict=True):
        np.testing.assert_array_equal(got.counts, want.counts)
        assert got.counts.dtype == want.counts.dtype
        np.testing.assert_array_equal(got.x_m, want.x_m)
        np.testing.assert_array_equal(got.freq_hz, want.freq_hz)
        assert (got.y_m, got.start_time, got.end_time) == (want.y_m, want.start_time, want.end_time)
        assert (got.dwell_s, got.nv_theta_rad, got.nv_phi_rad) == (
            want.dwell_s,
            want.nv_theta_rad,
            want.nv_phi_rad,
        )
    assert [ln.sha256 for ln in first] == [ln.sha256 for ln in again]
    assert len({ln.sha256 for ln in first}) == 5
    assert GROWING_FILE_READER.check(path) is None


def test_lines_handed_over_are_skipped_unread(
    tmp_path: Path, demo_lines: list[ScanLine], monkeypatch: pytest.MonkeyPatch
) -> None:
    """Rows whose line the daemon already has are not read at all: only the others are."""
    path = tmp_path / SCAN / "scan.h5"
    _write(path, demo_lines)
    read_rows: list[int] = []
    real = growing_module._row_line

    def counting(**kw: object) -> ScanLine:
        read_rows.append(kw["row"])  # type: ignore[arg-type]
        return real(**kw)  # type: ignore[arg-type]

    monkeypatch.setattr(growing_module, "_row_line", counting)
    have = {(ln.line_index, ln.direction) for ln in demo_lines[:9]}
    got = _read(path, handed_over=lambda scan_id: have if scan_id == SCAN else ())
    assert [(ln.line_index, ln.direction) for ln in got] == [
        (ln.line_index, ln.direction) for ln in demo_lines[9:]
    ]
    assert read_rows == [9, 10, 11]


def test_rows_not_yet_committed_are_not_read(tmp_path: Path, demo_lines: list[ScanLine]) -> None:
    """A row the writer has begun but not committed (rows_committed not raised) is left."""
    path = tmp_path / SCAN / "scan.h5"
    _write(path, demo_lines[:3])
    with h5py.File(path, "a") as h5:  # a fourth row on its way, not committed
        for name in ("counts", "x_m", "y_m", "line_index", "backward"):
            h5[name].resize(4, axis=0)
    assert len(_read(path)) == 3


def test_a_catch_up_is_read_in_steps_with_the_file_closed_between(
    tmp_path: Path, demo_lines: list[ScanLine], monkeypatch: pytest.MonkeyPatch
) -> None:
    """More rows than one opening takes are read over several openings, each line once,
    and the file is closed while the lines are used."""
    monkeypatch.setattr(growing_module, "ROWS_PER_OPEN", 5)
    path = tmp_path / SCAN / "scan.h5"
    _write(path, demo_lines)
    lines = GROWING_FILE_READER.read(path)
    first = next(lines)
    with h5py.File(path, "a"):  # opens with a lock: nobody holds the file now
        pass
    rest = list(lines)
    assert [(ln.line_index, ln.direction) for ln in [first, *rest]] == [
        (ln.line_index, ln.direction) for ln in demo_lines
    ]


def test_missing_attribute_names_the_field(tmp_path: Path, demo_lines: list[ScanLine]) -> None:
    """A growing file without dwell_s is refused naming the attribute, as contract v1 does."""
    path = tmp_path / SCAN / "scan.h5"
    _write(path, demo_lines[:2])
    with h5py.File(path, "a") as h5:
        del h5.attrs["dwell_s"]
    with pytest.raises(LineFileError) as caught:
        _read(path)
    assert str(caught.value) == (
        "scan.h5: attribute 'dwell_s' must be present (a finite number of seconds > 0); "
        "found no such attribute"
    )


def test_a_bad_row_gives_the_rows_before_it_then_names_the_row(
    tmp_path: Path, demo_lines: list[ScanLine]
) -> None:
    """An infinite position in row 3 gives rows 0–2, then an error naming dataset and row."""
    path = tmp_path / SCAN / "scan.h5"
    _write(path, demo_lines[:5])
    with h5py.File(path, "a") as h5:
        h5["y_m"][3] = np.inf
    lines = GROWING_FILE_READER.read(path)
    got = [next(lines) for _ in range(3)]
    assert [ln.line_index for ln in got] == [0, 0, 1]
    with pytest.raises(LineFileError) as caught:
        next(lines)
    assert str(caught.value) == (
        "scan.h5: dataset 'y_m' row 3 must be a finite position in m; found inf (float)"
    )


def test_a_line_in_two_rows_is_refused(tmp_path: Path, demo_lines: list[ScanLine]) -> None:
    """Each (line, direction) has one row: a repeat names both rows."""
    path = tmp_path / SCAN / "scan.h5"
    _write(path, [demo_lines[0], demo_lines[1], demo_lines[0]])
    with pytest.raises(LineFileError, match=r"dataset 'line_index' row 2 must be a \(line, "):
        _read(path)


def test_the_check_refuses_another_format(tmp_path: Path) -> None:
    """The cheap check names a contract-v1 file (or any other HDF5) as not a growing file."""
    path = tmp_path / "other.h5"
    with h5py.File(path, "w") as h5:
        h5.attrs["format"] = "strayline-line"
    assert GROWING_FILE_READER.check(path) == (
        "other.h5: root attribute 'format' is 'strayline-line', not 'strayline-growing-scan'"
    )


_HOLDER = textwrap.dedent(
    """
    import sys, time
    from pathlib import Path
    from strayline.lines.growing_file import _open
    with _open(Path(sys.argv[1])) as h5:
        print(int(h5.attrs["rows_committed"]), flush=True)
        time.sleep(float(sys.argv[2]))
    """
)


def test_a_reader_holding_the_file_never_locks_the_writer_out(
    tmp_path: Path, demo_lines: list[ScanLine]
) -> None:
    """While another process holds the file open the way the reader opens it, a writer that
    reopens it with HDF5 file locking on (the default) appends without a lock error."""
    path = tmp_path / SCAN / "scan.h5"
    writer = _write(path, demo_lines[:2])
    holder = subprocess.Popen(
        [sys.executable, "-c", _HOLDER, str(path), "5"], stdout=subprocess.PIPE, text=True
    )
    try:
        assert holder.stdout is not None
        assert holder.stdout.readline().strip() == "2"  # the reader has the file open now
        writer.append(demo_lines[2])  # reopens with locking: must not raise
        assert holder.poll() is None
    finally:
        holder.kill()
        holder.wait()
        if holder.stdout is not None:
            holder.stdout.close()
    assert len(_read(path)) == 3


# -- the watcher ------------------------------------------------------------------------


def test_the_watcher_hands_a_growing_file_over_each_time_it_grows(
    tmp_path: Path, demo_lines: list[ScanLine]
) -> None:
    """Polling on a fake clock: the file is ready after each new row, even when rows come
    faster than the settle time, and is never given up as still changing."""
    now = [1000.0]
    options = WatchOptions(mode="polling", poll_interval_s=1.0, settle_s=2.0, give_up_s=10.0)
    watcher = LineWatcher(
        tmp_path, options, clock=lambda: now[0], readers=ReaderChoice.single(GROWING_FILE_READER)
    )
    writer = _write(tmp_path / SCAN / "scan.h5", demo_lines[:1])
    watcher.start()
    reported = []
    for line in demo_lines[1:]:  # a row every second, settle_s 2 s, give_up_s 10 s
        writer.append(line)
        now[0] += 1.0
        watcher.tick()
        reported += watcher.ready_nowait()
    now[0] += 3.0
    watcher.tick()
    reported += watcher.ready_nowait()
    watcher.stop()
    assert {r.kind for r in reported} == {"ready"}
    assert len(reported) >= len(demo_lines) // 3  # at least every settle time
    assert reported[-1].size_bytes == (tmp_path / SCAN / "scan.h5").stat().st_size


# -- the pipeline -----------------------------------------------------------------------


def test_the_pipeline_takes_each_new_line_once(tmp_path: Path, demo_lines: list[ScanLine]) -> None:
    """Processed as it grows, the file gives each line once; unchanged, nothing new."""
    path = tmp_path / "incoming" / SCAN / "scan.h5"
    writer = _write(path, demo_lines[:4])
    pipeline = LinePipeline(_config(tmp_path))
    try:
        first = pipeline.process_many([path])
        writer.append(demo_lines[4])
        writer.append(demo_lines[5])
        second = pipeline.process_many([path])
        third = pipeline.process_many([path])
    finally:
        pipeline.close()
    assert [o.kind for o in first] == ["written"] * 4
    assert [(o.line_index, o.direction) for o in second] == [(2, "forward"), (2, "backward")]
    assert [o.kind for o in third] == ["no_new_lines"]
    assert path.exists()


def test_a_restart_resumes_from_the_ledger_without_reading_committed_rows(
    tmp_path: Path, demo_lines: list[ScanLine], monkeypatch: pytest.MonkeyPatch
) -> None:
    """After a restart (a new pipeline) the rows of committed, judged lines are not read:
    the reader is told the store's lines from its ledger."""
    path = tmp_path / "incoming" / SCAN / "scan.h5"
    writer = _write(path, demo_lines[:6])
    pipeline = LinePipeline(_config(tmp_path))
    try:
        pipeline.process_many([path])
    finally:
        pipeline.close()
    writer.append(demo_lines[6])
    read_rows: list[int] = []
    real = growing_module._row_line

    def counting(**kw: object) -> ScanLine:
        read_rows.append(kw["row"])  # type: ignore[arg-type]
        return real(**kw)  # type: ignore[arg-type]

    monkeypatch.setattr(growing_module, "_row_line", counting)
    restarted = LinePipeline(_config(tmp_path))
    try:
        outcomes = restarted.process_many([path])
    finally:
        restarted.close()
    assert read_rows == [6]
    assert [(o.kind, o.line_index) for o in outcomes] == [("written", 3)]


def test_a_malformed_growing_file_holds_its_scan_with_one_alert_until_it_reads_again(
    tmp_path: Path, demo_lines: list[ScanLine]
) -> None:
    """A bad row holds the scan: the file stays (no quarantine), one alert names the field,
    reading again raises no second alert, and once the file reads cleanly the alert is
    cleared."""
    path = tmp_path / "incoming" / SCAN / "scan.h5"
    _write(path, demo_lines[:3])
    with h5py.File(path, "a") as h5:
        h5["x_m"][2, 0] = np.nan
    config = _config(tmp_path)
    pipeline = LinePipeline(config)
    try:
        first = pipeline.process_many([path])
        again = pipeline.process_many([path])
        _write(path, demo_lines[:4])  # the writer starts the file afresh, correctly
        fixed = pipeline.process_many([path])
    finally:
        pipeline.close()
    assert [o.kind for o in first] == ["written", "written", "held"]
    assert [o.kind for o in again] == ["held"]
    assert again[0].events == ()
    assert [o.kind for o in fixed] == ["written", "written"]
    assert path.exists()
    assert not (path.parent / "_quarantine").exists()
    events = [e for e in read_alert_log(config.paths.alert_log) if e.rule == "scan_held"]
    assert [e.state for e in events] == ["raised", "cleared"]
    assert events[0].message == (
        "scan held: scan.h5: dataset 'x_m' row 2 must be finite; found nan at index 0"
    )
    assert events[0].scan_id == SCAN


def test_giving_up_on_a_growing_file_holds_it_instead_of_moving_it(
    tmp_path: Path, demo_lines: list[ScanLine]
) -> None:
    """When the watcher gives up on a growing file, it is held with an alert, not moved."""
    path = tmp_path / "incoming" / SCAN / "scan.h5"
    _write(path, demo_lines[:1])
    pipeline = LinePipeline(_config(tmp_path))
    try:
        outcome = pipeline.give_up(path, "does not open cleanly after 600 s")
    finally:
        pipeline.close()
    assert outcome.kind == "held"
    assert path.exists()


# -- a real writer and a killed daemon -----------------------------------------------------

_WRITER = textwrap.dedent(
    """
    import sys, time
    from pathlib import Path
    from strayline.lines import GrowingFileWriter, ScanHeader, read_line_file
    source, target, pace = Path(sys.argv[1]), Path(sys.argv[2]), float(sys.argv[3])
    lines = sorted((read_line_file(p) for p in source.glob("*.h5")),
                   key=lambda ln: (ln.line_index, ln.direction == "backward"))
    with GrowingFileWriter(target, ScanHeader.of(lines[0]), swmr=True) as writer:
        for line in lines:
            writer.append(line)
            print(writer.rows, flush=True)
            time.sleep(pace)
    """
)


@pytest.mark.slow
def test_kill_9_while_the_writer_appends_commits_every_line_once(tmp_path: Path) -> None:
    """The daemon is killed (SIGKILL) while a real writer process appends in SWMR mode, then
    restarted: every line ends up committed exactly once in the ledger, and the writer,
    which keeps HDF5 file locking on, never meets a lock error."""
    import json

    from tests._daemon import start_daemon, wait_committed, write_config

    demo = ds.DemoConfig(n_lines=24, n_pixels=8, trace_retrace=True, scan_id=SCAN, seed=4)
    ds.run_scan(demo, tmp_path / "source", tmp_path / "truth", sleep=lambda _s: None)
    config = write_config(tmp_path, readers={"default": "growing-file"})
    target = tmp_path / "incoming" / SCAN / f"{SCAN}.h5"
    target.parent.mkdir(parents=True)
    writer = subprocess.Popen(
        [sys.executable, "-c", _WRITER, str(tmp_path / "source" / SCAN), str(target), "0.15"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    store = tmp_path / "output" / f"{SCAN}.zarr"
    log = tmp_path / "daemon.log"
    daemon = start_daemon(config, log)
    try:
        assert wait_committed(store, 8, daemon, timeout_s=120) >= 8
        daemon.kill()  # SIGKILL: no clean stop
        daemon.wait(timeout=30)
        time.sleep(0.5)  # the writer goes on meanwhile
        daemon = start_daemon(config, log)
        out, err = writer.communicate(timeout=120)
        assert writer.returncode == 0, err
        assert "lock" not in err.lower()
        assert out.split()[-1] == "48"
        assert wait_committed(store, 48, daemon, timeout_s=120) == 48
    finally:
        if writer.poll() is None:
            writer.kill()
        daemon.kill()
        daemon.wait(timeout=30)
    records = [
        json.loads(text)
        for text in (store / "ledger" / "records.jsonl").read_text().splitlines()
        if text.strip()
    ]
    commits = [(r["line_index"], r["direction"]) for r in records if r["event"] == "commit"]
    assert sorted(commits) == sorted((i, d) for i in range(24) for d in ("forward", "backward"))
