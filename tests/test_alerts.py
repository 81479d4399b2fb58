"""Tests for strayline.alerts: alert log, hooks without a shell, stop-request file."""

from __future__ import annotations

import contextlib
import dataclasses
import io
import json
import os
import re
import sys
import threading
import time
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from structlog.testing import capture_logs

from strayline import alerts
from strayline.alerts import ALERT_LINE_MAX, AlertEvent, AlertSink, format_alert, read_alert_log
from strayline.errors import LineFileError
from strayline.lines import bad_file_event
from strayline.rules import (
    AcquisitionStalledSpec,
    ContrastCollapsedSpec,
    FitFailuresRisingSpec,
    FluorescenceLostSpec,
    LineMetrics,
    ResonanceJumpSpec,
    RuleEngine,
    RulesConfig,
    RuleSpec,
    ThresholdSpec,
    ZfsDriftSpec,
)
from strayline.rules._detectors import build_detector
from strayline.rules._jump import _after_raise, _basis, _jump_obs, _jump_verdict
from strayline.rules._observation import Observation
from strayline.service import _events

EVENT = AlertEvent(
    time="2026-03-01T23:14:05.120+00:00",
    scan_id="night-run",
    rule="fluorescence_lost",
    severity="critical",
    state="raised",
    line_index=42,
    direction="forward",
    pixel_range=(131, 256),
    seen_value=8.4e4,
    seen_unit="counts/s",
    baseline_value=2.0e5,
    baseline_spread=2.1e3,
    confidence_z=-55.2,
    message="PL fell to 42 % of the running median (200 kcounts/s)",
    advice="check the tip and the optics; consider stopping the scan",
)
PY = sys.executable


@contextlib.contextmanager
def _following(log: Path, poll_s: float) -> Iterator[io.StringIO]:
    """Follow ``log`` (new events only, as JSON lines) on a thread while the block runs."""
    out = io.StringIO()
    stop = threading.Event()
    options = {"follow": True, "last": 0, "as_json": True, "poll_s": poll_s, "out": out}
    worker = threading.Thread(
        target=alerts.follow_alerts, args=(log,), kwargs={**options, "stop": stop}
    )
    worker.start()
    try:
        time.sleep(0.1)
        yield out
    finally:
        stop.set()
        worker.join(5)


def _wait_for(predicate, timeout_s: float = 10.0) -> bool:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        if predicate():
            return True
        time.sleep(0.02)
    return False


def test_alert_log_is_one_json_object_per_line_and_reads_back(tmp_path: Path) -> None:
    """Each delivered event is one JSON line; read_alert_log returns them in order and
    filters by scan and by time."""
    log = tmp_path / "state" / "alerts.jsonl"
    sink = AlertSink(log)
    second = dataclasses.replace(
        EVENT, time="2026-03-02T01:00:00.000+00:00", scan_id="other", state="cleared"
    )
    sink.deliver(EVENT)
    sink.deliver(second)
    lines = log.read_text(encoding="utf-8").splitlines()
    assert len(lines) == 2
    assert [json.loads(t)["scan_id"] for t in lines] == ["night-run", "other"]
    assert read_alert_log(log) == [EVENT, second]
    assert read_alert_log(log, scan_id="other") == [second]
    assert read_alert_log(log, since=datetime.fromisoformat("2026-03-02T00:00:00+00:00")) == [
        second
    ]
    assert sink.statistics().delivered == 2


def test_reader_skips_a_partial_last_line_and_names_a_bad_one(tmp_path: Path) -> None:
    """A last line still being written is skipped; a bad line in the middle raises an
    error naming the file and the line number."""
    log = tmp_path / "alerts.jsonl"
    log.write_text(EVENT.to_json() + "\n" + EVENT.to_json()[:40], encoding="utf-8")
    assert read_alert_log(log) == [EVENT]
    log.write_text("not json\n" + EVENT.to_json() + "\n", encoding="utf-8")
    with pytest.raises(ValueError, match=r"alerts.jsonl: line 1 must be one alert event"):
        read_alert_log(log)
    bad: list[str] = []
    assert read_alert_log(log, bad_lines=bad) == [EVENT]
    assert bad == [
        "alerts.jsonl: line 1 must be one alert event as JSON; found 'not json' (JSONDecodeError)"
    ]
    assert read_alert_log(tmp_path / "missing.jsonl") == []


def test_alerts_skips_a_torn_line_with_a_warning_and_shows_the_rest(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A torn line in the middle of the log (a crash mid-write, then more events) costs
    that line only: `strayline alerts` prints the other events and a warning naming it."""
    import io

    log = tmp_path / "alerts.jsonl"
    torn = EVENT.to_json()[:50]
    log.write_text(
        EVENT.to_json()
        + "\n"
        + torn
        + "\n"
        + dataclasses.replace(EVENT, line_index=43).to_json()
        + "\n",
        encoding="utf-8",
    )
    out = io.StringIO()
    assert alerts.follow_alerts(log, out=out) == 0
    assert len(out.getvalue().splitlines()) == 2
    assert "strayline: skipped alerts.jsonl: line 2 must be one alert event" in (
        capsys.readouterr().err
    )


def test_following_a_rotated_log_starts_the_new_file_from_its_beginning(tmp_path: Path) -> None:
    """When the log is rotated (renamed, a new file at its path) following goes on with
    the new file from its first line, even when it grew past the old file's size before
    the next look (the file's identity, not its size, tells)."""

    log = tmp_path / "alerts.jsonl"
    log.write_text(EVENT.to_json() + "\n", encoding="utf-8")
    with _following(log, poll_s=0.3) as out:
        log.rename(tmp_path / "alerts.jsonl.1")
        log.write_text(
            "".join(dataclasses.replace(EVENT, line_index=i).to_json() + "\n" for i in (1, 2, 3)),
            encoding="utf-8",
        )
        assert _wait_for(lambda: out.getvalue().count("\n") == 3, 10)
    assert [json.loads(t)["line_index"] for t in out.getvalue().splitlines()] == [1, 2, 3]


def test_event_is_logged_through_structlog(tmp_path: Path) -> None:
    """Delivery logs 'alert_raised' at error level for a critical raise, with the fields."""
    with capture_logs() as logs:
        AlertSink(None).deliver(EVENT)
    assert logs[0]["event"] == "alert_raised"
    assert logs[0]["log_level"] == "error"
    assert logs[0]["rule"] == "fluorescence_lost"
    assert logs[0]["line_index"] == 42


def test_hook_runs_without_a_shell_with_placeholders(tmp_path: Path) -> None:
    """The hook's argument list gets its placeholders filled per argument and is run
    without a shell: shell syntax in the message stays literal."""
    out = tmp_path / "argv.json"
    script = "import json,sys; json.dump(sys.argv[1:], open(sys.argv[1], 'w'))"
    sink = AlertSink(
        None,
        hook={
            "critical": [
                PY,
                "-c",
                script,
                str(out),
                "{scan_id}",
                "{rule}",
                "{severity}",
                "{state}",
                "{line}",
                "{message}",
            ]
        },
        hook_timeout_s=20,
    )
    event = dataclasses.replace(EVENT, message="PL lost; $(touch pwned) && echo `id`")
    sink.deliver(event)
    assert sink.wait_hooks(30)
    sink.close(5)
    assert json.loads(out.read_text()) == [
        str(out),
        "night-run",
        "fluorescence_lost",
        "critical",
        "raised",
        "42",
        "PL lost; $(touch pwned) && echo `id`",
    ]
    assert not (tmp_path / "pwned").exists()
    assert not Path("pwned").exists()


def test_failing_hook_is_logged_and_not_fatal(tmp_path: Path) -> None:
    """A hook exiting with status 1 is logged as 'alert_hook_failed' and delivery goes on."""
    log = tmp_path / "alerts.jsonl"
    with capture_logs() as logs:
        sink = AlertSink(log, hook={"critical": [PY, "-c", "import sys; sys.exit(1)"]})
        sink.deliver(EVENT)
        assert sink.wait_hooks(30)
        sink.deliver(EVENT)
        assert sink.wait_hooks(30)
        sink.close(5)
    failures = [e for e in logs if e["event"] == "alert_hook_failed"]
    assert len(failures) == 2
    assert failures[0]["returncode"] == 1
    assert len(read_alert_log(log)) == 2
    assert sink.statistics().hooks_failed == 2


def test_hanging_hook_times_out_without_blocking_delivery(tmp_path: Path) -> None:
    """A hook that hangs is killed at its timeout and logged; deliver() returns at once."""
    with capture_logs() as logs:
        sink = AlertSink(
            None,
            hook={"critical": [PY, "-c", "import time; time.sleep(60)"]},
            hook_timeout_s=0.5,
        )
        start = time.monotonic()
        sink.deliver(EVENT)
        elapsed = time.monotonic() - start
        assert _wait_for(lambda: any(e["event"] == "alert_hook_timeout" for e in logs), 20)
        sink.close(5)
    assert elapsed < 0.25
    timeout = next(e for e in logs if e["event"] == "alert_hook_timeout")
    assert timeout["timeout_s"] == 0.5


def test_missing_hook_program_is_logged(tmp_path: Path) -> None:
    """A hook whose program does not exist is logged as failed, never raised."""
    with capture_logs() as logs:
        sink = AlertSink(None, hook={"critical": [str(tmp_path / "no-such-program")]})
        sink.deliver(EVENT)
        assert sink.wait_hooks(30)
        sink.close(5)
    assert [e["event"] for e in logs].count("alert_hook_failed") == 1


def test_full_hook_queue_drops_and_logs_instead_of_blocking(tmp_path: Path) -> None:
    """With the hook queue full, further hook runs are dropped and logged; deliver() never
    waits."""
    with capture_logs() as logs:
        sink = AlertSink(
            None,
            hook={"critical": [PY, "-c", "import time; time.sleep(60)"]},
            hook_timeout_s=0.3,
            hook_queue_size=1,
        )
        start = time.monotonic()
        for _ in range(5):
            sink.deliver(EVENT)
        elapsed = time.monotonic() - start
        sink.close(10)  # the running and the queued hook time out, then the thread ends
    assert elapsed < 0.5
    assert [e["event"] for e in logs].count("alert_hook_dropped") >= 3
    assert sink.statistics().hooks_dropped >= 3


def test_critical_raise_writes_the_stop_request_atomically(tmp_path: Path) -> None:
    """A critical raised event writes valid JSON with time, scan, rule, line, message and
    requested_by 'strayline', leaving no temporary file; warnings and clears write none."""
    stop = tmp_path / "ctl" / "STOP_REQUEST.json"
    sink = AlertSink(None, stop_request_file=stop)
    sink.deliver(dataclasses.replace(EVENT, severity="warning"))
    sink.deliver(dataclasses.replace(EVENT, state="cleared"))
    assert not stop.exists()
    sink.deliver(EVENT)
    assert json.loads(stop.read_text(encoding="utf-8")) == {
        "time": EVENT.time,
        "scan_id": "night-run",
        "rule": "fluorescence_lost",
        "line": 42,
        "message": EVENT.message,
        "requested_by": "strayline",
    }
    assert sorted(p.name for p in stop.parent.iterdir()) == ["STOP_REQUEST.json"]
    assert sink.statistics().stop_requests_written == 1


def test_failed_stop_request_leaves_the_old_file_and_no_temp(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """If the rename fails, the previous stop request is intact, no temporary file is
    left, and the failure is logged rather than raised."""
    stop = tmp_path / "STOP_REQUEST.json"
    stop.write_text('{"old": true}\n', encoding="utf-8")

    def broken_replace(src: str, dst: str) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", broken_replace)
    with capture_logs() as logs:
        AlertSink(None, stop_request_file=stop).deliver(EVENT)
    assert json.loads(stop.read_text(encoding="utf-8")) == {"old": True}
    assert sorted(os.listdir(tmp_path)) == ["STOP_REQUEST.json"]
    assert [e["event"] for e in logs if e["event"].startswith("stop_")] == ["stop_request_failed"]


def test_format_alert_is_one_short_line_stating_each_thing_once() -> None:
    """The readable line gives the time with its offset, the severity (and "cleared" for a
    clear), the scan, line and pixel range once, the rule, what was seen and the robust z;
    the advice is left to --json; the backward trace is marked "bwd"."""
    assert format_alert(EVENT, tz=UTC) == (
        "2026-03-01T23:14:05+00:00 CRIT night-run line 42 px 131–255 fluorescence_lost: "
        "PL fell to 42 % of the running median (200 kcounts/s) (z −55.2)"
    )
    cleared = dataclasses.replace(
        EVENT, state="cleared", pixel_range=None, direction="backward", confidence_z=None
    )
    assert format_alert(cleared, tz=UTC) == (
        "2026-03-01T23:14:05+00:00 CRIT cleared night-run line 42 bwd fluorescence_lost: "
        "PL fell to 42 % of the running median (200 kcounts/s)"
    )
    one = dataclasses.replace(EVENT, pixel_range=(7, 8), severity="info", confidence_z=312.4)
    assert " INFO night-run line 42 px 7 fluorescence_lost: " in format_alert(one)
    assert format_alert(one).endswith(" (z +312)")


def test_alert_times_are_local_with_their_offset_or_utc_on_request() -> None:
    """By default the time is this machine's local time in ISO 8601 with its offset;
    ``tz`` gives another zone (``alerts --utc`` passes UTC); the moment is the same."""
    local = EVENT.datetime.astimezone().isoformat(timespec="seconds")
    assert format_alert(EVENT).startswith(local + " CRIT ")
    east = timezone(timedelta(hours=5, minutes=30))
    assert format_alert(EVENT, tz=east).startswith("2026-03-02T04:44:05+05:30 CRIT ")
    shown = datetime.fromisoformat(format_alert(EVENT, tz=east).split(" ")[0])
    assert shown == EVENT.datetime.replace(microsecond=0)


def test_alerts_command_shows_local_times_or_utc(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``strayline alerts`` prints local times; with ``--utc`` the same line in UTC."""
    from strayline.cli import main

    config = tmp_path / "strayline.yaml"
    config.write_text("paths: {watch_root: incoming, output_root: output}\n", encoding="utf-8")
    (tmp_path / "output").mkdir()
    (tmp_path / "output" / "alerts.jsonl").write_text(EVENT.to_json() + "\n", encoding="utf-8")
    assert main(["alerts", "-c", str(config)]) == 0
    assert capsys.readouterr().out == format_alert(EVENT) + "\n"
    assert main(["alerts", "-c", str(config), "--utc"]) == 0
    assert capsys.readouterr().out.startswith("2026-03-01T23:14:05+00:00 CRIT night-run ")


def test_a_message_too_long_for_the_line_is_cut_and_the_json_keeps_it() -> None:
    """A message (or scan id) that would pass the line's limit is cut with "…"; the
    time, severity, where, rule and z stay whole, and ``--json`` still has every word."""
    long = dataclasses.replace(EVENT, scan_id="s" * 50, message="word " * 60)
    line = format_alert(long, tz=UTC)
    assert len(line) == ALERT_LINE_MAX
    assert " " + "s" * 31 + "… line 42 px 131–255 fluorescence_lost: word word" in line
    assert line.endswith(" wo… (z −55.2)")
    assert json.loads(long.to_json())["message"] == "word " * 60


# -- what the rules and the service say, on one terminal line ----------------------------


class _Baseline:
    """A fixed baseline: (median, spread) per metric, and the anchor's per metric."""

    def __init__(self, stats: dict[str, tuple[float, float]], anchor: dict | None = None):
        self._stats, self._anchor = stats, anchor or {}

    def stats(self, name: str) -> tuple[float, float] | None:
        return self._stats.get(name)

    def anchor_stats(self, name: str) -> tuple[float, float] | None:
        return self._anchor.get(name)


@dataclasses.dataclass(frozen=True)
class _Where:
    scan_id: str
    line_index: int
    direction: str
    n_pixels: int


def _line(where: _Where, **values: object) -> LineMetrics:
    """Line metrics of ``where`` with ordinary levels, and ``values`` on top."""
    base: dict[str, object] = {
        "scan_id": where.scan_id,
        "line_index": where.line_index,
        "direction": where.direction,
        "n_lines_planned": where.line_index + 100,
        "n_pixels": where.n_pixels,
        "end_time_s": 1.78e9,
        "pl_median_per_s": 2e5,
        "pl_p10_per_s": 1.9e5,
        "contrast_median": 0.15,
        "contrast_mean": 0.15,
        "fwhm_median_hz": 8e6,
        "fit_failure_fraction": 0.0,
        "field_median_t": 1e-3,
        "field_spread_t": 1e-4,
        "center_mean_median_hz": 2.87e9,
        "chi2_red_median": 1.0,
        "field_sigma_median_t": 5e-6,
    }
    return LineMetrics(**(base | values))  # type: ignore[arg-type]


def _event(spec: RuleSpec, obs: Observation, where: _Where, state: str) -> AlertEvent:
    """The event the engine makes of ``obs`` (its own builder)."""
    engine = RuleEngine(RulesConfig(rules=[]))
    text = obs.message if state == "raised" else (obs.clear_message or obs.message)
    return engine._event(
        where.scan_id,
        spec,
        state,  # type: ignore[arg-type]
        obs=obs,
        line_index=where.line_index,
        direction=where.direction,
        now_s=1.78e9,
        message=text,
    )


def _observe(spec: RuleSpec, m: LineMetrics, base: _Baseline) -> Observation:
    detector = build_detector(spec)
    assert detector is not None
    obs = detector.detect(m, base, detector.memory({}))
    assert obs is not None
    return obs


_RATIO = st.floats(0.0, 20.0)
_Z = st.floats(-1e4, 1e4)


def _fluorescence(data: st.DataObject, where: _Where) -> AlertEvent:
    med = data.draw(st.floats(1e2, 1e8), "PL median")
    ratio = data.draw(_RATIO, "PL ratio")
    start = data.draw(st.integers(0, where.n_pixels - 1), "first pixel")
    stepped = data.draw(st.booleans(), "a step within the line")
    values = {"pl_median_per_s": med * (1.0 if stepped else ratio)}
    if stepped:
        values |= {
            "pl_step": -0.5,
            "pl_step_range": (start, where.n_pixels),
            "pl_step_first_pixel": start,
            "pl_step_level_per_s": med * min(ratio, 0.99),
        }
    obs = _observe(
        FluorescenceLostSpec(), _line(where, **values), _Baseline({"pl_median_per_s": (med, 1e3)})
    )
    return _event(FluorescenceLostSpec(), obs, where, data.draw(_STATE, "state"))


def _contrast(data: st.DataObject, where: _Where) -> AlertEvent:
    c_med = data.draw(st.floats(1e-3, 0.5), "contrast median")
    m = _line(
        where,
        contrast_mean=c_med * data.draw(_RATIO, "contrast ratio"),
        pl_median_per_s=2e5 * data.draw(_RATIO, "PL ratio"),
    )
    base = _Baseline({"contrast_mean": (c_med, 1e-3), "pl_median_per_s": (2e5, 1e3)})
    obs = _observe(ContrastCollapsedSpec(), m, base)
    return _event(ContrastCollapsedSpec(), obs, where, data.draw(_STATE, "state"))


def _failures(data: st.DataObject, where: _Where) -> AlertEvent:
    m = _line(where, fit_failure_fraction=data.draw(st.floats(0, 1), "failed"))
    base = _Baseline({"fit_failure_fraction": (data.draw(st.floats(0, 1), "median"), 0.01)})
    obs = _observe(FitFailuresRisingSpec(), m, base)
    return _event(FitFailuresRisingSpec(), obs, where, data.draw(_STATE, "state"))


def _zfs(data: st.DataObject, where: _Where) -> AlertEvent:
    drift_hz = data.draw(st.floats(-20e6, 20e6), "drift")  # ±270 K: far past any scan's
    m = _line(where, center_mean_p10_hz=2.87e9 + drift_hz)
    base = _Baseline({}, anchor={"center_mean_p10_hz": (2.87e9, 1e4)})
    obs = _observe(ZfsDriftSpec(), m, base)
    return _event(ZfsDriftSpec(), obs, where, data.draw(_STATE, "state"))


def _threshold(data: st.DataObject, where: _Where) -> AlertEvent:
    reference = data.draw(
        st.sampled_from(["absolute", "baseline_ratio", "baseline_delta", "baseline_z"]), "ref"
    )
    unit = data.draw(st.sampled_from(["", "nm", "fraction", "counts/s"]), "unit")
    spec = ThresholdSpec(
        name="topography_spike",
        metric="aux.topography.max",
        reference=reference,
        above=data.draw(st.floats(-1e6, 1e6), "above"),
        unit=unit,
    )
    value = data.draw(st.floats(-1e9, 1e9), "value")
    m = _line(where, aux_stats={"topography": {"max": value}})
    base = _Baseline({"aux.topography.max": (data.draw(st.floats(1e-3, 1e6), "median"), 1.0)})
    return _event(spec, _observe(spec, m, base), where, data.draw(_STATE, "state"))


def _jump_channel(data: st.DataObject, channel: str, where: _Where) -> dict[str, object]:
    # PL −100 … +100 %, common mode ±50 MHz (a contact moves it by MHz), roughness
    # −86 … +639 % (a stand-off change of a few tens of nm)
    bounds = {"pl": (-1.0, 1.0), "center_mean": (-50e6, 50e6), "field": (-2.0, 2.0)}[channel]
    first = data.draw(st.integers(0, where.n_pixels - 1), f"{channel} first pixel")
    return {
        "value": data.draw(st.floats(*bounds), f"{channel} step"),
        "range": [first, where.n_pixels],
        "first": first,
        "z": data.draw(_Z, f"{channel} z"),
        "median": 0.0,
        "spread": 1.0,
        "ratio": data.draw(st.floats(1.0, 100.0), f"{channel} ratio"),
    }


def _jump(data: st.DataObject, where: _Where) -> AlertEvent:
    spec = ResonanceJumpSpec()
    channels = data.draw(
        st.lists(st.sampled_from(["pl", "center_mean", "field"]), min_size=1, unique=True), "ch"
    )
    chans = {ch: _jump_channel(data, ch, where) for ch in channels}
    step_line = max(where.line_index - data.draw(st.integers(0, 3), "lines back"), 0)
    pending: dict[str, object] = {
        "line": step_line,
        "direction": where.direction,
        "channels": chans,
        "primary": data.draw(st.sampled_from(channels), "primary"),
    }
    if data.draw(st.booleans(), "departed earlier"):
        pending["departed_at"] = max(step_line - data.draw(st.integers(1, 4), "by"), 0)
    reverted = data.draw(st.one_of(st.none(), st.just(where.line_index)), "reverted at")
    kind = data.draw(st.sampled_from(["verdict", "after raise"]), "message")
    m = _line(where)
    pending["basis"] = _basis(spec, pending, reverted)
    if kind == "verdict":
        text = _jump_verdict(spec, pending, reverted)
        obs = _jump_obs(pending, m, raise_cond=True, clear_cond=False, clear_now=False, text=text)
        return _event(spec, obs, where, "raised")
    pending["reverted_at"] = reverted
    if data.draw(st.booleans(), "reverts on this line"):
        ch = channels[0]
        value = -float(chans[ch]["value"]) or 1.0  # type: ignore[arg-type]
        m = _line(where, **{f"{ch}_step": value, f"{ch}_step_range": tuple(chans[ch]["range"])})  # type: ignore[arg-type]
    obs = _after_raise(pending, m, {}, data.draw(st.booleans(), "clear when quiet"))
    return _event(spec, obs, where, "cleared")


def _stall(data: st.DataObject, where: _Where) -> AlertEvent:
    interval_s = data.draw(st.floats(0.01, 1e4), "line period")
    clock = [1.78e9]
    engine = RuleEngine(RulesConfig(rules=[AcquisitionStalledSpec()]), clock=lambda: clock[0])
    for k in (0, 1, 2):
        clock[0] += interval_s
        line = _line(dataclasses.replace(where, line_index=k), time_since_previous_s=interval_s)
        engine.evaluate_line(where.scan_id, line)
    waited = data.draw(st.floats(2.6, 1e3), "overdue by") * max(interval_s, 60.0)
    (raised,) = engine.evaluate_tick(clock[0] + waited)
    if not data.draw(st.booleans(), "cleared"):
        return raised
    clock[0] += waited + 1
    if data.draw(st.booleans(), "by a new scan"):
        other = data.draw(_SCAN_IDS, "new scan")
        events = engine.evaluate_line(other, _line(dataclasses.replace(where, scan_id=other)))
    else:
        events = engine.evaluate_line(where.scan_id, _line(where))
    return next(e for e in events if e.rule == "acquisition_stalled")


def _service(data: st.DataObject, where: _Where) -> AlertEvent:
    root = Path(data.draw(st.sampled_from(["/data/out", "/srv/nv/output"]), "output root"))
    reason = data.draw(
        st.sampled_from(
            [
                f"output folder {root} vanished",
                f"output folder {root} is not a folder",
                f"scan store {root / where.scan_id}.zarr vanished",
                f"[Errno 28] No space left on device: '{root}/{where.scan_id}.zarr'",
            ]
        ),
        "reason",
    )
    free = data.draw(st.floats(0, 1e7), "free MiB")
    floor = data.draw(st.floats(1, 1e5), "floor MiB")
    alert = data.draw(
        st.sampled_from(
            [
                _events.output_unavailable_raised(root, reason),
                _events.output_unavailable_cleared(root, data.draw(st.floats(0, 1e6), "down")),
                _events.disk_low_raised(root, free, floor, 2 * floor),
                _events.disk_low_cleared(root, free, floor),
            ]
        ),
        "alert",
    )
    return _events.service_event(alert, scan_id=where.scan_id, time_text=EVENT.time)


def _bad_file(data: st.DataObject, where: _Where) -> AlertEvent:
    """Quarantine: free text from a file's problem, not a rule's sentence."""
    name = f"line_{where.line_index:05d}_fwd.h5"
    error = LineFileError(
        name,
        data.draw(st.text(min_size=1, max_size=40), "field"),
        data.draw(st.text(max_size=200), "expected"),
        data.draw(st.text(max_size=200), "found"),
    )
    moved = data.draw(st.text(max_size=200), "moved to")
    return bad_file_event(Path("/watch") / where.scan_id / name, error, moved, EVENT.datetime)


_STATE = st.sampled_from(["raised", "cleared"])
_SCAN_IDS = st.from_regex(r"[A-Za-z0-9][A-Za-z0-9._-]{0,60}", fullmatch=True)
_KINDS = {
    "fluorescence_lost": _fluorescence,
    "contrast_collapsed": _contrast,
    "fit_failures_rising": _failures,
    "zfs_drift": _zfs,
    "threshold": _threshold,
    "resonance_jump": _jump,
    "acquisition_stalled": _stall,
    "service": _service,
}


@settings(max_examples=300, deadline=None)
@given(
    kind=st.sampled_from([*_KINDS, "bad_file"]),
    scan_id=_SCAN_IDS,
    line_index=st.integers(0, 99_999),
    direction=st.sampled_from(["forward", "backward"]),
    n_pixels=st.integers(1, 8192),
    data=st.data(),
)
def test_every_kind_of_alert_fits_one_terminal_line(  # noqa: PLR0917 (hypothesis draws)
    kind: str, scan_id: str, line_index: int, direction: str, n_pixels: int, data: st.DataObject
) -> None:
    """Whatever the values, scan id (up to 61 characters), line and pixel range, every
    kind of event the rules, the service and the quarantine emit reads as one line of at
    most ALERT_LINE_MAX characters that begins with its time, severity and scan."""
    where = _Where(scan_id, line_index, direction, n_pixels)
    event = {**_KINDS, "bad_file": _bad_file}[kind](data, where)
    line = format_alert(event, tz=UTC)
    assert "\n" not in line
    assert len(line) <= ALERT_LINE_MAX
    assert line.startswith(f"{EVENT.datetime:%Y-%m-%d}T") or line[:4].isdigit()
    assert f" {event.scan_id[:31]}" in line


@settings(max_examples=100, deadline=None)
@given(kind=st.sampled_from(list(_KINDS)), data=st.data())
def test_the_rules_and_the_service_say_what_they_saw_in_full_on_one_line(
    kind: str, data: st.DataObject
) -> None:
    """For a scan id of up to 12 characters, lines and pixels below 1000 and values a
    scan can show, what each rule and the service say fits the line whole (nothing cut),
    each quantity in one unit: no fraction, no exponent, no ASCII minus before a number,
    no pixel range in the words (the line shows the event's once)."""
    where = _Where(
        data.draw(st.from_regex(r"[a-z0-9]{1,6}(-[a-z0-9]{1,5})?", fullmatch=True), "scan"),
        data.draw(st.integers(0, 999), "line"),
        data.draw(st.sampled_from(["forward", "backward"]), "direction"),
        data.draw(st.integers(1, 1000), "pixels"),
    )
    event = _KINDS[kind](data, where)
    line = format_alert(event, tz=UTC)
    assert len(line) <= ALERT_LINE_MAX
    assert "…" not in line, line
    assert line.count(event.message) == 1
    words = event.message.replace(event.scan_id, "")  # a path may hold the scan id
    if kind != "threshold":  # a rule of the user's own states the user's unit
        assert "fraction" not in words
        assert not re.search(r"\d[eE][+-]?\d", words), words
    assert not re.search(r"(?<![\w/])-\d", words), words
    assert "pixel" not in words


def test_a_tip_crash_line_states_the_decision_line_and_the_step_line_once_each() -> None:
    """A crash decided on line 33 whose step began at line 32 reads "line 33 … since line
    32": each line number once; the PL step that makes it a crash as a percentage, with
    its pixels and its z (not those of the larger common-mode step beside it, whose MHz
    would be a second quantity in a second unit)."""
    pending: dict[str, object] = {
        "line": 32,
        "direction": "forward",
        "channels": {
            "pl": {"value": -0.3, "range": [40, 46], "z": -12.4, "median": 0.0, "spread": 0.02},
            "center_mean": {
                "value": 4.25e6,
                "range": [38, 50],
                "z": 8.0,
                "median": 0.0,
                "spread": 1e5,
            },
        },
        "primary": "center_mean",
    }
    spec = ResonanceJumpSpec()
    pending["verdict"] = _jump_verdict(spec, pending, None)
    pending["basis"] = _basis(spec, pending, None)
    assert pending["verdict"] == "tip crash suspected: PL −30 % since line 32"
    where = _Where("film-7", 33, "forward", 64)
    text = str(pending["verdict"])
    obs = _jump_obs(
        pending, _line(where), raise_cond=True, clear_cond=False, clear_now=False, text=text
    )
    event = _event(spec, obs, where, "raised")
    assert format_alert(event, tz=UTC) == (
        "2026-05-28T20:26:40+00:00 CRIT film-7 line 33 px 40–45 resonance_jump: "
        "tip crash suspected: PL −30 % since line 32 (z −12.4)"
    )
    assert (event.seen_value, event.seen_unit) == (-0.3, "fraction")
    contact = dict(pending, channels={"center_mean": pending["channels"]["center_mean"]})  # type: ignore[call-overload]
    assert _jump_verdict(spec, contact, None) == (
        "contact suspected: resonance mean +4.25 MHz since line 32"
    )


def test_a_stall_gives_the_pace_of_lines_that_came_every_half_second() -> None:
    """Lines every 0.5 s, then none for 75 s: "lines usually every 0.5 s", not "0 s"."""
    clock = [1.78e9]
    engine = RuleEngine(RulesConfig(rules=[AcquisitionStalledSpec()]), clock=lambda: clock[0])
    where = _Where("demo", 0, "forward", 64)
    for k in range(4):
        clock[0] += 0.5
        line = _line(dataclasses.replace(where, line_index=k), time_since_previous_s=0.5)
        engine.evaluate_line("demo", line)
    (stall,) = engine.evaluate_tick(clock[0] + 75)
    assert stall.message == "no new line for 75 s (lines usually every 0.5 s)"
    assert " demo line 3 acquisition_stalled: no new line for 75 s" in format_alert(stall)


def test_pl_lost_from_a_pixel_states_the_range_once_and_the_level_in_percent() -> None:
    """PL down to 40 % from pixel 40 of 46: "px 40–45" once (the event's range), the
    level as a percentage of the running median, the median in kcounts/s."""
    where = _Where("film-7", 12, "forward", 46)
    m = _line(
        where,
        pl_step=-0.6,
        pl_step_range=(40, 46),
        pl_step_first_pixel=40,
        pl_step_level_per_s=8e4,
    )
    obs = _observe(FluorescenceLostSpec(), m, _Baseline({"pl_median_per_s": (2e5, 1e3)}))
    line = format_alert(_event(FluorescenceLostSpec(), obs, where, "raised"), tz=UTC)
    assert line.endswith(
        " film-7 line 12 px 40–45 fluorescence_lost: PL fell to 40 % of the running median "
        "(200 kcounts/s) (z −120)"
    )
    assert line.count("40–45") == 1
    assert "pixel" not in line


def test_sink_from_daemon_config(tmp_path: Path) -> None:
    """AlertSink.from_config takes the alert log from paths and the rest from alerts."""
    from types import SimpleNamespace

    config = SimpleNamespace(
        paths=SimpleNamespace(alert_log=tmp_path / "alerts.jsonl"),
        alerts=SimpleNamespace(
            console=False, hook={}, hook_timeout_s=5.0, stop_request_file=tmp_path / "STOP"
        ),
    )
    sink = AlertSink.from_config(config)
    sink.deliver(EVENT)
    assert read_alert_log(tmp_path / "alerts.jsonl") == [EVENT]
    assert (tmp_path / "STOP").exists()


def test_follow_alerts_prints_the_tail_then_new_events(tmp_path: Path) -> None:
    """follow_alerts prints the last N events, then events appended while following, and
    refuses a malformed --since with exit code 2."""
    import io

    log = tmp_path / "alerts.jsonl"
    sink = AlertSink(log)
    for i in range(3):
        sink.deliver(dataclasses.replace(EVENT, line_index=i))
    out = io.StringIO()
    assert alerts.follow_alerts(log, last=2, out=out) == 0
    assert [line.split(" line ")[1].split()[0] for line in out.getvalue().splitlines()] == [
        "1",
        "2",
    ]
    assert alerts.follow_alerts(log, since="yesterday", out=io.StringIO()) == 2

    with _following(log, poll_s=0.02) as out:
        sink.deliver(dataclasses.replace(EVENT, line_index=7))
        assert _wait_for(lambda: '"line_index":7' in out.getvalue(), 10)
    assert [json.loads(t)["line_index"] for t in out.getvalue().splitlines()] == [7]


@pytest.mark.parametrize(
    ("logging_console", "expected"),
    [("plain", True), ("json", False), ("journald", False), ("off", False)],
)
def test_readable_alert_lines_only_on_a_plain_console(
    tmp_path: Path, logging_console: str, expected: bool
) -> None:
    """The sink prints its readable alert line only when the console log is plain text, so
    journald and JSON consoles keep one record per line (sd-daemon(3) priority prefixes)."""
    from strayline.config import config_from_mapping

    config = config_from_mapping(
        {
            "paths": {"watch_root": "in", "output_root": "out"},
            "logging": {"console": logging_console},
            "alerts": {"console": True},
        },
        base_dir=tmp_path,
    )
    sink = AlertSink.from_config(config)
    try:
        assert sink._console is expected
    finally:
        sink.close()


# -- the registry of alerts raised outside the rule engine ---------------------------------


def test_active_alerts_pair_a_clear_with_its_raise_and_survive_a_restart(tmp_path: Path) -> None:
    """A raise is remembered per (scan, rule) and saved; its clear (same scan and rule)
    forgets it; a registry loaded from the saved file knows what is still raised."""
    from strayline.alerts import ActiveAlerts

    path = tmp_path / "state" / "delivered_alerts.json"
    registry = ActiveAlerts(path)
    other_scan = dataclasses.replace(EVENT, scan_id="day-run")
    registry.note(EVENT)
    registry.note(other_scan)
    registry.save()
    assert ActiveAlerts(path).active() == (EVENT, other_scan)
    assert registry.raised("fluorescence_lost") == other_scan  # the latest noted
    registry.note(dataclasses.replace(EVENT, state="cleared"))
    registry.save()
    assert ActiveAlerts(path).active() == (other_scan,)
    assert len(registry) == 1


def test_active_alerts_save_only_what_changed_and_say_why_a_save_failed(
    tmp_path: Path,
) -> None:
    """Noting the same raise twice writes nothing new; a clear with no raise changes
    nothing; a registry that cannot be written raises StoreError naming the file."""
    from strayline.alerts import ActiveAlerts
    from strayline.errors import StoreError

    path = tmp_path / "delivered_alerts.json"
    registry = ActiveAlerts(path)
    registry.note(dataclasses.replace(EVENT, state="cleared"))
    registry.save()
    assert not path.exists()
    registry.note(EVENT)
    registry.save()
    stamp = path.stat().st_mtime_ns
    registry.note(EVENT)
    registry.save()
    assert path.stat().st_mtime_ns == stamp
    blocked = ActiveAlerts(tmp_path / "in_the_way")
    (tmp_path / "in_the_way").mkdir()
    blocked.note(EVENT)
    with pytest.raises(StoreError, match=r"in_the_way: delivered alerts could not be saved"):
        blocked.save()
    assert blocked.active() == (EVENT,)  # still noted in memory


def test_an_unreadable_registry_is_logged_and_taken_as_empty(tmp_path: Path) -> None:
    """A registry file that is not JSON starts an empty registry, with a warning."""
    from strayline.alerts import ActiveAlerts

    path = tmp_path / "delivered_alerts.json"
    path.write_text("{not json", encoding="utf-8")
    with capture_logs() as logs:
        assert ActiveAlerts(path).active() == ()
    assert [r["event"] for r in logs] == ["delivered_alerts_unreadable"]


# -- untrusted values, and an alert log on a failing disk ----------------------------------


def test_placeholders_are_filled_once_and_values_stay_single_arguments() -> None:
    """A scan id that itself holds a placeholder is not expanded again, a value starting
    with '-' or holding spaces stays one argument, and text around a placeholder is kept."""
    from strayline.alerts import fill_hook_arguments

    event = dataclasses.replace(EVENT, scan_id="-rf {message}", message="lost {scan_id}")
    argv = fill_hook_arguments(["page", "--scan={scan_id}", "--", "{message}", "{line}"], event)
    assert argv == ["page", "--scan=-rf {message}", "--", "lost {scan_id}", "42"]


def test_terminal_lines_show_control_characters_as_escapes() -> None:
    """An escape sequence in a folder-derived scan id is printed as text (\\x1b[…),
    never sent raw to the terminal; ordinary text with µ, θ and dashes is unchanged."""
    event = dataclasses.replace(EVENT, scan_id="run\x1b[2J\x9b1m", message="B = 3 µT, θ – ok")
    line = format_alert(event)
    assert "run\\x1b[2J\\x9b1m" in line
    assert "\x1b" not in line
    assert "\x9b" not in line
    assert "B = 3 µT, θ – ok" in line


def test_an_alert_reaches_the_hook_and_the_stop_file_when_its_log_cannot_be_written(
    tmp_path: Path,
) -> None:
    """With the alert log's folder gone bad (a file in its place) a critical raise still
    writes the stop request and runs the hook, then raises AlertNotLogged; delivered again
    with notify=False once the disk is back, it is logged without a second hook run."""
    from strayline.alerts import AlertNotLogged

    (tmp_path / "output").write_text("a file where the output folder was\n")
    log = tmp_path / "output" / "alerts.jsonl"
    stop = tmp_path / "STOP_REQUEST.json"
    calls = tmp_path / "hook.txt"
    script = "import sys; open(sys.argv[1], 'a').write(sys.argv[2] + '\\n')"
    hook = {"critical": [PY, "-c", script, str(calls), "{rule}:{state}"]}
    sink = AlertSink(log, hook=hook, hook_timeout_s=20, stop_request_file=stop)
    with pytest.raises(AlertNotLogged, match=r"alerts\.jsonl: the alert could not be logged"):
        sink.deliver(EVENT)
    assert sink.wait_hooks(30)
    assert json.loads(stop.read_text())["rule"] == "fluorescence_lost"
    assert calls.read_text() == "fluorescence_lost:raised\n"
    (tmp_path / "output").unlink()  # the disk is back
    sink.deliver(EVENT, notify=False)
    assert sink.wait_hooks(30)
    sink.close(5)
    assert read_alert_log(log) == [EVENT]
    assert calls.read_text() == "fluorescence_lost:raised\n"


@given(
    days=st.integers(0, 30),
    hours=st.integers(0, 48),
    minutes=st.integers(0, 600),
    seconds=st.integers(0, 7200),
)
def test_since_spans_go_back_from_now_by_their_sum(
    days: int, hours: int, minutes: int, seconds: int
) -> None:
    """A --since span (any mix of d, h, m, s, in this order, each optional) names the
    moment that long before now; an ISO 8601 time names itself (UTC when it has no zone;
    datetime.fromisoformat, the standard library's ISO parser, is the reference)."""
    from datetime import UTC, timedelta

    parts = [(days, "d"), (hours, "h"), (minutes, "m"), (seconds, "s")]
    text = "".join(f"{n}{unit}" for n, unit in parts if n) or "0s"
    now = datetime(2026, 12, 5, 3, 0, tzinfo=UTC)
    back = timedelta(days=days, hours=hours, minutes=minutes, seconds=seconds)
    assert alerts.parse_since(text, now) == now - back
    moment = now - back
    assert alerts.parse_since(moment.isoformat(), now) == moment
    assert alerts.parse_since(moment.replace(tzinfo=None).isoformat(), now) == moment


@pytest.mark.parametrize("text", ["yesterday", "1w", "h", "-1h", "1h bananas", ""])
def test_a_bad_since_names_what_it_takes_and_what_it_found(text: str) -> None:
    """A --since that is neither an ISO time nor a span says what it accepts and shows
    what it was given."""
    from datetime import UTC

    with pytest.raises(ValueError, match=r"ISO 8601 time .* 30m, 1h, 2d or 1h30m; found"):
        alerts.parse_since(text, datetime(2026, 12, 5, tzinfo=UTC))


def test_alerts_filter_by_severity_and_say_when_a_scan_has_none(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--severity warning keeps warnings and criticals (info < warning < critical, the
    order of the rule schema); a --scan the log holds no alert of is said, with the scans
    it does hold, and exits 1 instead of printing nothing."""
    log = tmp_path / "alerts.jsonl"
    sink = AlertSink(log)
    for i, level in enumerate(("info", "warning", "critical")):
        sink.deliver(dataclasses.replace(EVENT, line_index=i, severity=level))
    out = io.StringIO()
    assert alerts.follow_alerts(log, severity="warning", as_json=True, out=out) == 0
    kept = [json.loads(t)["severity"] for t in out.getvalue().splitlines()]
    assert kept == ["warning", "critical"]
    assert alerts.follow_alerts(log, severity="urgent", out=io.StringIO()) == 2
    capsys.readouterr()
    assert alerts.follow_alerts(log, scan_id="nosuch", out=io.StringIO()) == 1
    err = capsys.readouterr().err
    assert "no alerts for scan 'nosuch'" in err
    assert "scans with alerts: night-run" in err


def test_active_alerts_are_the_raises_not_cleared_since(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--active keeps, per scan and rule, a raise with no clear after it: a raised then
    cleared alert is gone, one raised again after its clear is back, another scan's raise
    stays; with none raised it says so."""
    log = tmp_path / "alerts.jsonl"
    sink = AlertSink(log)
    t = datetime.fromisoformat(EVENT.time)
    steps = [
        ("night-run", "fluorescence_lost", "raised"),
        ("night-run", "fluorescence_lost", "cleared"),
        ("night-run", "resonance_jump", "raised"),
        ("day-run", "fluorescence_lost", "raised"),
        ("night-run", "fluorescence_lost", "raised"),
    ]
    for k, (scan, rule, state) in enumerate(steps):
        when = (t + timedelta(minutes=k)).isoformat()
        sink.deliver(dataclasses.replace(EVENT, time=when, scan_id=scan, rule=rule, state=state))
    out = io.StringIO()
    assert alerts.follow_alerts(log, active=True, as_json=True, out=out) == 0
    shown = [(r["scan_id"], r["rule"]) for r in map(json.loads, out.getvalue().splitlines())]
    assert shown == [
        ("night-run", "resonance_jump"),
        ("day-run", "fluorescence_lost"),
        ("night-run", "fluorescence_lost"),
    ]
    quiet = tmp_path / "quiet.jsonl"
    AlertSink(quiet).deliver(dataclasses.replace(EVENT, state="cleared"))
    capsys.readouterr()
    assert alerts.follow_alerts(quiet, active=True, out=io.StringIO()) == 0
    assert "no alert is raised now" in capsys.readouterr().err
