"""Tests of ``strayline status`` (strayline.status): progress read from real scan stores."""

from __future__ import annotations

import json
import shutil
from dataclasses import replace
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

import demo_stream as ds
from strayline.alerts import format_alert, read_alert_log
from strayline.cli import main
from strayline.config import Config, config_from_mapping
from strayline.field import field_from_fit
from strayline.fit import FitModel, FitStatus, fit_line
from strayline.lines import quarantine_file, read_line_file
from strayline.pipeline import LinePipeline
from strayline.status import format_scan_status, scan_status, scan_statuses
from strayline.store import ScanStore
from strayline.store._layout import LEDGER_FILE
from strayline.store._ledger import parse_records, parse_time

SCAN = "status-scan"
N_LINES = 8
N_PIXELS = 32
T0 = datetime(2026, 3, 1, 22, 0, 0, tzinfo=UTC)


@pytest.fixture(scope="module")
def scan_files(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small demo scan (8 lines x 32 px, fixed seed), written once for the module."""
    root = tmp_path_factory.mktemp("demo")
    scan = ds.DemoConfig(
        scene=ds.labyrinth(), n_lines=N_LINES, n_pixels=N_PIXELS, seed=17, scan_id=SCAN
    )
    ds.run_scan(scan, root / "incoming", root / "truth")
    return root / "incoming" / SCAN


def _config_data() -> dict[str, Any]:
    return {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "logging": {"console": "off"},
        "alerts": {"console": False},
    }


def _config(tmp_path: Path) -> Config:
    return config_from_mapping(_config_data(), base_dir=tmp_path)


def _write_config(tmp_path: Path) -> Path:
    path = tmp_path / "strayline.yaml"
    path.write_text(yaml.safe_dump(_config_data()), encoding="utf-8")
    return path


def _lines(folder: Path) -> list[Path]:
    return sorted(folder.glob("line_*.h5"))


def _store_with_clock(tmp_path: Path, scan_files: Path, times: list[datetime]) -> Path:
    """A store whose lines 0..len(times)-1 were committed at ``times`` (fake clock)."""
    now = [times[0]]
    output = tmp_path / "output"
    paths = _lines(scan_files)
    first = read_line_file(paths[0])
    model = FitModel()
    with ScanStore.open(
        output,
        SCAN,
        n_lines_planned=N_LINES,
        n_pixels=N_PIXELS,
        x_m=first.x_m,
        config_json={},
        config_digest="status-test",
        clock=lambda: now[0],
        durable=False,
    ) as store:
        for index, moment in enumerate(times):
            now[0] = moment
            line = read_line_file(paths[index % N_LINES])
            fit = fit_line(line.freq_hz, line.counts, model)
            field = field_from_fit(fit, zfs_hz=2.87e9)
            store.write_line(line, fit, field)
    return output / f"{SCAN}.zarr"


def _process(tmp_path: Path, scan_files: Path, n: int) -> tuple[Config, LinePipeline]:
    folder = tmp_path / "incoming" / SCAN
    shutil.copytree(scan_files, folder)
    config = _config(tmp_path)
    pipeline = LinePipeline(config)
    for path in _lines(folder)[:n]:
        pipeline.process(path)
    return config, pipeline


# -- a store made by the pipeline --------------------------------------------------------


def test_status_of_a_pipeline_store_matches_its_ledger_and_maps(
    scan_files: Path, tmp_path: Path
) -> None:
    """Lines done, pixels, fit failures, rate and ETA read from a store the pipeline wrote
    agree with its ledger's commit times and the pipeline's own counts."""
    config, pipeline = _process(tmp_path, scan_files, 6)
    try:
        failed = pipeline.statistics().pixels_failed
    finally:
        pipeline.close()
    store = config.paths.output_root / f"{SCAN}.zarr"
    status = scan_status(store)
    assert status.scan_id == SCAN
    assert status.lines_done == {"forward": 6, "backward": 0}
    assert status.n_lines_planned == N_LINES
    assert status.pixels_done == 6 * N_PIXELS
    assert status.pixels_failed == failed
    records, _ = parse_records((store / LEDGER_FILE).read_bytes(), "ledger")
    times = sorted(parse_time(r["processed_time"]) for r in records if r["event"] == "commit")
    span_h = (times[-1] - times[0]).total_seconds() / 3600.0
    assert status.rate_lines_per_h == pytest.approx(5 / span_h)
    assert status.last_commit == times[-1]
    assert status.eta == times[-1] + timedelta(hours=2 / (5 / span_h))


def test_status_shows_the_scans_latest_alerts(scan_files: Path, tmp_path: Path) -> None:
    """The scan's latest alerts (here a quarantined file) are listed with its status,
    formatted as the alert log's readable lines, after the line files of its folder that
    are not in the store yet (held back, or never to open) and the quarantine's count."""
    config, pipeline = _process(tmp_path, scan_files, 3)
    bad = tmp_path / "incoming" / SCAN / "line_00005_fwd.h5"
    bad.write_bytes(b"garbage")
    try:
        pipeline.process(bad)
    finally:
        pipeline.close()
    (status,) = scan_statuses(config.paths.output_root, config.paths.alert_log)
    events = read_alert_log(config.paths.alert_log, scan_id=SCAN)
    assert status.last_alerts == tuple(format_alert(e) for e in events)[-3:]
    assert " status-scan line 5 bad_file: line file quarantined: " in status.last_alerts[-1]
    shown = format_scan_status(status).splitlines()
    assert shown[-1] == "  " + status.last_alerts[-1]
    # as JSON, the same alerts are the alert log's records, not text to parse again
    records = status.as_json_dict()["last_alerts"]
    assert [(r["rule"], r["line_index"]) for r in records][-1] == ("bad_file", 5)
    assert records == [json.loads(e.to_json()) for e in events][-3:]
    # Lines 3, 4, 6 and 7 were never processed here; line 5 went to the quarantine.
    assert status.held == tuple(f"line_0000{i}_fwd.h5" for i in (3, 4, 6, 7))
    assert status.quarantined == 1
    # a file of another layout set aside beside it counts too (one note per file)
    stray = tmp_path / "incoming" / SCAN / "line_00009_fwd.npz"
    stray.write_bytes(b"not an archive")
    quarantine_file(stray, field="file", expected="an .npz archive", found="garbage", message="")
    (again,) = scan_statuses(config.paths.output_root, config.paths.alert_log)
    assert again.quarantined == 2
    assert shown[1] == (
        "  4 line file(s) not in the store yet: line_00003_fwd.h5, line_00004_fwd.h5, "
        "line_00006_fwd.h5 …"
    )
    assert shown[2] == "  1 file(s) in quarantine"


# -- exact rate and ETA (fake clock) -----------------------------------------------------


def test_rate_and_eta_from_regular_commits(scan_files: Path, tmp_path: Path) -> None:
    """Commits every 30 s give 120 lines/h, and the 4 lines left of 8 end 2 min after the
    last commit."""
    times = [T0 + timedelta(seconds=30 * k) for k in range(4)]
    status = scan_status(_store_with_clock(tmp_path, scan_files, times))
    assert status.rate_lines_per_h == pytest.approx(120.0)
    assert status.eta == T0 + timedelta(seconds=90 + 120)
    assert status.last_commit == T0 + timedelta(seconds=90)
    assert format_scan_status(status, tz=UTC).startswith(
        f"{SCAN}: 4/8 lines, 120 lines/h, ETA 2026-03-01T22:03+00:00, "
    )


def test_rate_follows_the_recent_pace(scan_files: Path, tmp_path: Path, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """The rate counts only the latest 20 commits, so a slow start does not drag it down."""
    import strayline.status as status_module

    monkeypatch.setattr(status_module, "_RATE_WINDOW", 3)  # 8 planned lines: shrink window
    times = [T0, T0 + timedelta(hours=1)] + [
        T0 + timedelta(hours=1, seconds=60 * k) for k in range(1, 4)
    ]
    status = scan_status(_store_with_clock(tmp_path, scan_files, times))
    assert status.rate_lines_per_h == pytest.approx(60.0)


def test_a_single_commit_has_no_rate(scan_files: Path, tmp_path: Path) -> None:
    """With one commit there is no rate and no ETA, and the text says so."""
    status = scan_status(_store_with_clock(tmp_path, scan_files, [T0]))
    assert (status.rate_lines_per_h, status.eta) == (None, None)
    assert "rate n/a, ETA n/a" in format_scan_status(status)


def test_a_complete_scan_says_complete(scan_files: Path, tmp_path: Path) -> None:
    """A scan with every planned line committed is shown as complete, with its failures."""
    times = [T0 + timedelta(seconds=10 * k) for k in range(N_LINES)]
    status = scan_status(_store_with_clock(tmp_path, scan_files, times))
    text = format_scan_status(status)
    assert "8/8 lines, 360 lines/h, complete, " in text
    assert text.endswith(
        f"{status.pixels_failed} of {N_LINES * N_PIXELS} pixel fits failed "
        f"({status.pixels_failed / (N_LINES * N_PIXELS):.1%})"
    )


def test_failed_pixels_are_counted_from_the_status_map(scan_files: Path, tmp_path: Path) -> None:
    """pixels_failed counts written pixels whose status code is neither OK nor MERGED (a
    merged pixel is a measurement: its field is bounded)."""
    times = [T0 + timedelta(seconds=10 * k) for k in range(3)]
    store = _store_with_clock(tmp_path, scan_files, times)
    import zarr

    codes = np.asarray(zarr.open_group(store, mode="r")["forward/status"][:3])
    measured = (codes == FitStatus.OK) | (codes == FitStatus.MERGED)
    assert scan_status(store).pixels_failed == int(np.count_nonzero(~measured))


# -- many stores, odd folders, bad alert logs -------------------------------------------


def test_statuses_skip_folders_that_are_not_stores(scan_files: Path, tmp_path: Path) -> None:
    """A *.zarr folder that is not a scan store is skipped, not fatal."""
    _store_with_clock(tmp_path, scan_files, [T0, T0 + timedelta(seconds=5)])
    (tmp_path / "output" / "half-made.zarr").mkdir()
    statuses = scan_statuses(tmp_path / "output")
    assert [s.scan_id for s in statuses] == [SCAN]


def test_an_unreadable_alert_log_is_reported_in_place_of_alerts(
    scan_files: Path, tmp_path: Path
) -> None:
    """A corrupt alert log gives each scan one line naming the problem instead of alerts."""
    _store_with_clock(tmp_path, scan_files, [T0])
    log = tmp_path / "alerts.jsonl"
    log.write_text("this is not json\n{}\n", encoding="utf-8")
    (status,) = scan_statuses(tmp_path / "output", log)
    assert status.last_alerts == (
        f"(alert log {log} unreadable: alerts.jsonl: line 1 must be one alert event as JSON; "
        "found 'this is not json' (JSONDecodeError))",
    )


# -- the command -------------------------------------------------------------------------


def test_status_command_json_gives_one_object_per_scan(
    scan_files: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`strayline status --json` prints one JSON object per scan with progress fields."""
    config_path = _write_config(tmp_path)
    times = [T0 + timedelta(seconds=30 * k) for k in range(4)]
    _store_with_clock(tmp_path, scan_files, times)
    assert main(["status", "--config", str(config_path), "--json"]) == 0
    (line,) = capsys.readouterr().out.splitlines()
    data = json.loads(line)
    assert data["scan_id"] == SCAN
    assert data["lines_done"] == {"forward": 4, "backward": 0}
    assert data["rate_lines_per_h"] == pytest.approx(120.0)
    assert data["eta"] == "2026-03-01T22:03:30+00:00"
    assert data["store"] == str(tmp_path / "output" / f"{SCAN}.zarr")
    assert data["last_alerts"] == []


def test_status_command_readable(
    scan_files: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`strayline status` prints the readable lines of every scan."""
    config_path = _write_config(tmp_path)
    _store_with_clock(tmp_path, scan_files, [T0, T0 + timedelta(seconds=30)])
    assert main(["status", "--utc", "--config", str(config_path)]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"{SCAN}: 2/8 lines, 120 lines/h, ETA 2026-03-01T22:03+00:00, ")


def test_status_command_without_scans(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """`strayline status` with no stores says where it looked."""
    config_path = _write_config(tmp_path)
    assert main(["status", "--config", str(config_path)]) == 0
    assert capsys.readouterr().out == f"no scans in {tmp_path / 'output'}\n"


def test_a_group_commit_at_the_end_still_gives_a_rate(
    scan_files: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Lines committed together share one time; the rate window reaches back to the
    commit before them instead of finding no time span (3 lines over 30 s: 360 lines/h)."""
    import strayline.status as status_module

    monkeypatch.setattr(status_module, "_RATE_WINDOW", 3)
    group = T0 + timedelta(seconds=60)
    times = [T0, T0 + timedelta(seconds=30), group, group, group]
    status = scan_status(_store_with_clock(tmp_path, scan_files, times))
    assert status.rate_lines_per_h == pytest.approx(360.0)


def test_status_dates_the_last_line_and_says_when_the_eta_has_passed(
    scan_files: Path, tmp_path: Path
) -> None:
    """The status says how long ago the last line came, and, once the ETA has passed with
    lines still to come, that the scan stalled or stopped."""
    times = [T0 + timedelta(seconds=30 * k) for k in range(4)]  # ETA T0 + 3.5 min
    status = scan_status(_store_with_clock(tmp_path, scan_files, times))
    soon = format_scan_status(status, now=T0 + timedelta(seconds=150))
    assert ", last line 60 s ago" in soon.splitlines()[0]
    assert "ETA passed" not in soon
    late = format_scan_status(status, now=T0 + timedelta(hours=1))
    assert ", last line 58 min ago" in late.splitlines()[0]
    assert late.splitlines()[1] == (
        "  no line for 58 min (lines came every 30 s): the scan stalled or stopped"
    )
    paceless = replace(status, line_period_s=None)
    assert format_scan_status(paceless, now=T0 + timedelta(hours=1)).splitlines()[1] == (
        "  the ETA passed 56 min ago with 4 line(s) to go: the scan stalled or stopped"
    )


def test_a_stalled_scan_shows_within_two_of_its_line_periods(
    scan_files: Path, tmp_path: Path
) -> None:
    """Lines every 30 s: two periods after the last one nothing is said yet; a moment
    later the status says the scan stalled, long before its ETA (common practice: a
    line overdue by twice the scan's own pace is a stall)."""
    times = [T0 + timedelta(seconds=30 * k) for k in range(4)]
    status = scan_status(_store_with_clock(tmp_path, scan_files, times))
    assert status.line_period_s == pytest.approx(30.0)
    last = times[-1]
    assert "stalled" not in format_scan_status(status, now=last + timedelta(seconds=60))
    text = format_scan_status(status, now=last + timedelta(seconds=61))
    assert text.splitlines()[1] == (
        "  no line for 61 s (lines came every 30 s): the scan stalled or stopped"
    )
    assert status.eta is not None
    assert status.eta > last + timedelta(seconds=61)
