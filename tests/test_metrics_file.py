"""Tests of the metrics file (strayline.metrics_file): the Prometheus text exposition
format, read back with prometheus_client's parser, and the service writing it."""

from __future__ import annotations

import shutil
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from prometheus_client.parser import text_string_to_metric_families

import demo_stream as ds
from strayline import metrics_file
from strayline.alerts import AlertEvent
from strayline.config import load_config
from strayline.errors import ConfigError
from strayline.metrics_file import (
    MetricsSnapshot,
    ScanMetrics,
    ScanStatusCache,
    alerts_by_severity,
    escape_label_value,
    metrics_text,
    scan_metrics,
)
from strayline.service import Service
from strayline.status import scan_status
from tests._daemon import committed_keys, write_config

SEEN = datetime(2026, 3, 2, 3, 0, tzinfo=UTC)


def _families(text: str) -> dict[str, Any]:
    """The families of ``text`` as prometheus_client's parser reads them (the reference
    parser of the Prometheus text exposition format; it raises on any malformed line)."""
    return {family.name: family for family in text_string_to_metric_families(text)}


def _samples(family: Any) -> dict[tuple[tuple[str, str], ...], float]:
    return {tuple(sorted(s.labels.items())): s.value for s in family.samples}


def test_the_file_parses_strictly_with_every_family_typed_and_described() -> None:
    """Read by prometheus_client.parser.text_string_to_metric_families, the text gives
    each family its TYPE and HELP and each sample its labels and value back, scan ids
    with a quote, a backslash and a line feed included (escaped as the format says)."""
    odd = 'film "7"\\b\nc'
    snapshot = MetricsSnapshot(
        up=True,
        seen=SEEN,
        lines_written=1234,
        files_waiting=2,
        alerts_active={"critical": 1, "warning": 0, "info": 3},
        scans=(
            ScanMetrics("film-7", {"forward": 48, "backward": 12}, 256, 0.987, 12.5),
            ScanMetrics(odd, {"forward": 0}, 64, None, None),
        ),
    )
    families = _families(metrics_text(snapshot))
    expected_types = {
        "strayline_up": "gauge",
        "strayline_last_seen_timestamp_seconds": "gauge",
        "strayline_lines_written": "counter",
        "strayline_files_waiting": "gauge",
        "strayline_alerts_active": "gauge",
        "strayline_scan_lines_done": "gauge",
        "strayline_scan_lines_planned": "gauge",
        "strayline_scan_fit_yield_ratio": "gauge",
        "strayline_scan_last_line_age_seconds": "gauge",
    }
    assert {name: f.type for name, f in families.items()} == expected_types
    assert all(f.documentation for f in families.values())
    assert _samples(families["strayline_up"]) == {(): 1.0}
    assert _samples(families["strayline_last_seen_timestamp_seconds"]) == {(): SEEN.timestamp()}
    (total,) = families["strayline_lines_written"].samples
    assert (total.name, total.value) == ("strayline_lines_written_total", 1234.0)
    assert _samples(families["strayline_alerts_active"]) == {
        (("severity", "critical"),): 1.0,
        (("severity", "info"),): 3.0,
        (("severity", "warning"),): 0.0,
    }
    assert _samples(families["strayline_scan_lines_done"]) == {
        (("direction", "backward"), ("scan", "film-7")): 12.0,
        (("direction", "forward"), ("scan", "film-7")): 48.0,
        (("direction", "backward"), ("scan", odd)): 0.0,
        (("direction", "forward"), ("scan", odd)): 0.0,
    }
    assert _samples(families["strayline_scan_lines_planned"])[(("scan", odd),)] == 64.0
    # a scan without pixels or lines yet has no yield or age (no made-up zero)
    assert _samples(families["strayline_scan_fit_yield_ratio"]) == {(("scan", "film-7"),): 0.987}
    assert _samples(families["strayline_scan_last_line_age_seconds"]) == {
        (("scan", "film-7"),): 12.5
    }
    assert escape_label_value(odd) == 'film \\"7\\"\\\\b\\nc'


def test_a_stopped_daemon_without_scans_still_writes_a_valid_file() -> None:
    """Before any scan and after a clean stop: ``strayline_up 0``, every family still
    described and typed, the scan families empty."""
    text = metrics_text(MetricsSnapshot(up=False, seen=SEEN, lines_written=0, files_waiting=0))
    families = _families(text)
    assert _samples(families["strayline_up"]) == {(): 0.0}
    assert families["strayline_scan_lines_done"].samples == []
    assert "# TYPE strayline_scan_lines_done gauge\n" in text
    assert len(_samples(families["strayline_alerts_active"])) == 3  # every severity, zeros


def test_alerts_are_counted_by_severity() -> None:
    """Raise events are counted per severity; every severity is named, zeros included."""

    def event(severity: str, state: str = "raised") -> AlertEvent:
        return AlertEvent(
            time=SEEN.isoformat(),
            scan_id="s",
            rule="r",
            severity=severity,
            state=state,  # type: ignore[arg-type]
            message="m",
            advice="",
        )

    events = [event("critical"), event("warning"), event("warning"), event("info", "cleared")]
    assert alerts_by_severity(events) == {"info": 0, "warning": 2, "critical": 1}


@pytest.fixture(scope="module")
def two_scans(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Line files of two small demo scans (fixed seeds), 3 and 2 lines."""
    root = tmp_path_factory.mktemp("scans")
    for scan_id, n_lines in (("metrics-a", 3), ("metrics-b", 2)):
        config = ds.DemoConfig(n_lines=n_lines, n_pixels=16, seed=5, scan_id=scan_id)
        ds.run_scan(config, root / "incoming" / "stage", root / "truth", pace_s=0.0)
    return root / "incoming" / "stage"


@pytest.mark.slow
def test_the_service_writes_the_file_on_its_heartbeat_and_once_more_when_it_stops(
    two_scans: Path, tmp_path: Path
) -> None:
    """With ``service.metrics_file`` set, the service writes the file when it starts (up,
    no scan yet), and when it stops (``strayline_up 0``) with the lines of both scans,
    the one before a reload included, their fit yield from the stores and the age of
    their last line; the folder holds no temporary file afterwards."""
    folder = tmp_path / "textfile"
    folder.mkdir()
    path = folder / "strayline.prom"
    config = load_config(
        write_config(
            tmp_path,
            products={"enabled": False, "live_image": False},
            logging={"console": "off"},
            service={"metrics_file": str(path)},
        )
    )
    incoming = tmp_path / "incoming"
    output = tmp_path / "output"
    seen: dict[str, Any] = {"reloaded": False}
    started = time.monotonic()
    service: Service

    def move(scan_id: str) -> None:
        shutil.copytree(two_scans / scan_id, incoming / scan_id)

    def stop_when() -> bool:
        assert time.monotonic() - started < 60, "the service did not get there in 60 s"
        if "first" not in seen:
            seen["first"] = _families(path.read_text(encoding="utf-8"))
            move("metrics-a")
        if not seen["reloaded"] and len(committed_keys(output / "metrics-a.zarr")) == 3:
            service.request_reload()
            move("metrics-b")
            seen["reloaded"] = True
        return seen["reloaded"] and len(committed_keys(output / "metrics-b.zarr")) == 2

    service = Service(config, stop_when=stop_when)
    assert service.run() == 0
    first = seen["first"]
    assert _samples(first["strayline_up"]) == {(): 1.0}
    assert first["strayline_scan_lines_done"].samples == []
    last = _families(path.read_text(encoding="utf-8"))
    assert _samples(last["strayline_up"]) == {(): 0.0}
    done = _samples(last["strayline_scan_lines_done"])
    assert done[(("direction", "forward"), ("scan", "metrics-a"))] == 3.0
    assert done[(("direction", "forward"), ("scan", "metrics-b"))] == 2.0
    (total,) = last["strayline_lines_written"].samples
    assert total.value == 5.0
    status = scan_status(output / "metrics-a.zarr")
    yields = _samples(last["strayline_scan_fit_yield_ratio"])
    expected = 1.0 - status.pixels_failed / status.pixels_done
    assert yields[(("scan", "metrics-a"),)] == pytest.approx(expected)
    ages = _samples(last["strayline_scan_last_line_age_seconds"])
    assert 0.0 <= ages[(("scan", "metrics-b"),)] < 60.0
    assert sorted(p.name for p in folder.iterdir()) == ["strayline.prom"]


def test_a_scan_store_is_read_again_only_when_its_line_count_changed(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The cache reads a store when its (lines committed, planned) changed, and drops a
    scan whose store cannot be read; the age of the last line is taken at the moment."""
    calls: list[Path] = []

    def fake(path: Path) -> Any:
        calls.append(path)
        if "gone" in path.name:
            raise OSError("no such store")
        return type(
            "S",
            (),
            {
                "scan_id": path.stem,
                "lines_done": {"forward": 2, "backward": 0},
                "n_lines_planned": 9,
                "pixels_done": 4,
                "pixels_failed": 1,
                "last_commit": SEEN,
            },
        )()

    monkeypatch.setattr(metrics_file, "scan_status", fake)
    cache = ScanStatusCache(tmp_path)
    assert len(cache.statuses({"a": (2, 9), "gone": (1, 9)})) == 1
    assert len(cache.statuses({"a": (2, 9)})) == 1
    assert [p.name for p in calls] == ["a.zarr", "gone.zarr"]
    cache.statuses({"a": (3, 9)})
    assert [p.name for p in calls] == ["a.zarr", "gone.zarr", "a.zarr"]
    (status_a,) = cache.statuses({"a": (3, 9)})
    figures = scan_metrics(status_a, SEEN + timedelta(seconds=42))
    assert (figures.fit_yield, figures.last_line_age_s) == (0.75, 42.0)


def test_the_metrics_file_must_be_a_prom_file(tmp_path: Path) -> None:
    """``service.metrics_file`` is off by default, resolved against the config's folder,
    and refused with the reason when its name does not end in .prom."""
    assert load_config(write_config(tmp_path)).service.metrics_file is None
    ok = load_config(write_config(tmp_path, service={"metrics_file": "tf/strayline.prom"}))
    assert ok.service.metrics_file == tmp_path / "tf" / "strayline.prom"
    with pytest.raises(ConfigError, match=r"service\.metrics_file.*ending in \.prom.*'x\.txt'"):
        load_config(write_config(tmp_path, service={"metrics_file": "x.txt"}))
