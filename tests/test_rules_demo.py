"""End-to-end rule tests: demo scans with one fault each, through the real pipeline.

Each test writes a small scan with the demo instrument (:mod:`demo_stream`) at pace 0 and
runs :func:`strayline.pipeline.process_folder` over it (validate, fit, field, store,
metrics, rules, alerts: the daemon's own per-line path), then reads the alert log. These
complement the unit tests of ``test_rules.py``, which feed synthetic records to the
engine. The faults' signatures are those of PHYSICS.md §7 (common practice).
"""

from __future__ import annotations

import dataclasses
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

import demo_stream as ds
from strayline.alerts import AlertEvent, AlertSink, read_alert_log
from strayline.config import Config, config_from_mapping
from strayline.lines import read_line_file, write_line_file
from strayline.pipeline import LinePipeline, process_folder

# Each test runs the daemon's pipeline over whole demo scans (seconds each).
pytestmark = pytest.mark.slow

SCAN = "rules-demo"
N_LINES = 20
N_PIXELS = 48


def _config(folder: Path) -> Config:
    return config_from_mapping(
        {
            "paths": {"watch_root": "incoming", "output_root": "output"},
            "alerts": {"console": False},
            "logging": {"console": "off"},
        },
        base_dir=folder,
    )


def _demo(
    *faults: str, scene: ds.Scene | None = None, pixel_m: float = 30e-9, seed: int = 5
) -> ds.DemoConfig:
    return ds.DemoConfig(
        scene=scene if scene is not None else ds.labyrinth(),
        n_lines=N_LINES,
        n_pixels=N_PIXELS,
        pixel_m=pixel_m,
        faults=tuple(ds.parse_fault(f) for f in faults),
        seed=seed,
        scan_id=SCAN,
    )


def _events(folder: Path, demo: ds.DemoConfig) -> list[AlertEvent]:
    """Write ``demo`` into ``folder/incoming``, process it once, return its alert events."""
    ds.run_scan(demo, folder / "incoming", folder / "truth", sleep=lambda _s: None)
    config = _config(folder)
    process_folder(config, folder / "incoming")
    return read_alert_log(config.paths.alert_log)


def _summary(events: list[AlertEvent]) -> list[tuple[str, str, int | None]]:
    return [(e.rule, e.state, e.line_index) for e in events]


def test_lost_fluorescence_raises_one_alert_on_its_line_and_nothing_else(
    tmp_path: Path,
) -> None:
    """PL falling to 5 % from pixel 20 of line 12 on (NV lost; PHYSICS.md §7, rule of thumb
    below 50–70 % of a running median) raises fluorescence_lost on line 12, once, and the
    fit failures and PL step it causes raise nothing more."""
    events = _events(tmp_path, _demo("fluorescence_lost@12:20"))
    assert _summary(events) == [("fluorescence_lost", "raised", 12)]
    assert events[0].message.startswith("PL fell to ")
    assert events[0].pixel_range is not None
    assert abs(events[0].pixel_range[0] - 20) <= 4


def test_collapsed_contrast_raises_within_two_lines_and_clears_once(tmp_path: Path) -> None:
    """Microwave off (no ODMR dips, PL normal; PHYSICS.md §7, common practice) from pixel 30
    of line 11 to the end of line 14, over a stripe with sharp edges, raises
    contrast_collapsed within two lines of its start and clears it once after it ends,
    with no other rule raised."""
    # Over the stripe's sharp edges: the labyrinth's common-mode false alarms are the
    # benchmark's business (benchmarks/alert_eval.py), not this test's.
    scene = ds.calibration_stripe(width_m=1e-6)
    events = _events(tmp_path, _demo("contrast_collapsed@11:30-14", scene=scene))
    rules = {e.rule for e in events}
    assert rules == {"contrast_collapsed"}, _summary(events)
    (raised,) = [e for e in events if e.state == "raised"]
    (cleared,) = [e for e in events if e.state == "cleared"]
    assert raised.line_index is not None
    assert 11 <= raised.line_index <= 13
    assert cleared.line_index is not None
    assert cleared.line_index > 14
    assert raised.message.startswith("contrast fell to ")
    assert "; PL at " in raised.message


def test_tip_crash_is_raised_as_a_tip_crash_within_two_lines_and_stays_raised(
    tmp_path: Path,
) -> None:
    """A tip crash (stand-off +20 nm and PL down to 70 % from pixel 10 of line 9 on;
    PHYSICS.md §7: a step along the slow axis that persists, common practice) raises
    resonance_jump once within two lines, calls it a tip crash, places it at pixel 10, and
    it is not cleared while the crash persists."""
    events = _events(tmp_path, _demo("tip_crash@9:10"))
    assert [(e.rule, e.state) for e in events] == [("resonance_jump", "raised")]
    (raised,) = events
    assert raised.line_index is not None
    assert 9 <= raised.line_index <= 11
    assert raised.message.startswith("tip crash suspected")
    assert raised.severity == "critical"  # it holds: worth stopping the scan for
    # The PL step search places the start within a few pixels (noise, 16-pixel minimum).
    assert raised.pixel_range is not None
    assert abs(raised.pixel_range[0] - 10) <= 4


def test_touched_sample_is_raised_within_two_lines_and_cleared_when_it_reverts(
    tmp_path: Path,
) -> None:
    """Contact strain shifting D by 6 MHz over pixels 20–31 of line 10 (Doherty et al.,
    PRL 112, 047601 (2014), via PHYSICS.md §7) raises resonance_jump within two lines and
    clears it once the shift is gone. (Narrower or weaker touches sit near the noise of a
    single line: see benchmarks/alert_eval.py.) Raised after it reverted, it is a warning
    (the rule's reverted_severity), not critical; a contact still there on the line after
    it is raised critical (it may be a lasting one)."""
    events = _events(tmp_path, _demo("sample_touched@10:20-10,width_pixels=12,zfs_shift_hz=6e6"))
    assert {e.rule for e in events} == {"resonance_jump"}, _summary(events)
    raised = [e for e in events if e.state == "raised"]
    cleared = [e for e in events if e.state == "cleared"]
    assert len(raised) == 1
    assert len(cleared) == 1
    # already reverted when raised: a note for the morning, no stop request
    assert raised[0].severity == "warning"
    assert raised[0].line_index is not None
    assert 10 <= raised[0].line_index <= 12
    assert raised[0].pixel_range is not None
    assert raised[0].pixel_range[0] <= 31
    assert raised[0].pixel_range[1] >= 20
    assert cleared[0].line_index is not None
    assert cleared[0].line_index >= 11
    lasting = _events(
        tmp_path / "two-lines", _demo("sample_touched@10:20-11,width_pixels=12,zfs_shift_hz=6e6")
    )
    assert [(e.rule, e.state, e.severity) for e in lasting] == [
        ("resonance_jump", "raised", "critical"),
        ("resonance_jump", "cleared", "critical"),
    ]


def test_long_fault_gives_one_raise_and_one_clear(tmp_path: Path) -> None:
    """Fluorescence lost for eleven lines (5–15) gives exactly one raised and one cleared
    event, the clear after the fault ends: no flood (DESIGN.md, rules and alerts)."""
    events = _events(tmp_path, _demo("fluorescence_lost@5-15"))
    assert [(e.rule, e.state) for e in events] == [
        ("fluorescence_lost", "raised"),
        ("fluorescence_lost", "cleared"),
    ]
    assert events[0].line_index == 5
    assert events[1].line_index is not None
    assert 16 <= events[1].line_index <= 18


def test_corrupt_file_is_reported_and_the_next_lines_raise_nothing(tmp_path: Path) -> None:
    """A truncated line file gives one bad_file alert; the line after the gap is compared
    with the last good line and raises nothing."""
    events = _events(tmp_path, _demo("corrupt_file@10"))
    assert [(e.rule, e.state) for e in events] == [("bad_file", "raised")]
    assert "line_00010_fwd.h5" in events[0].message


@pytest.mark.parametrize(
    ("scene", "pixel_m"),
    [
        (ds.labyrinth(), 30e-9),
        (ds.labyrinth(), 60e-9),
        (ds.calibration_stripe(width_m=1e-6), 30e-9),
        (ds.bubble_lattice(), 30e-9),
    ],
    ids=["labyrinth", "labyrinth-coarse", "stripe", "bubbles"],
)
def test_clean_scans_with_sharp_features_raise_nothing(
    tmp_path: Path, scene: ds.Scene, pixel_m: float
) -> None:
    """Clean scans of domain walls crossing between lines, sharp stripe edges and a bubble
    lattice raise no alert: a sample feature is continuous across lines (PHYSICS.md §7,
    common practice)."""
    assert _summary(_events(tmp_path, _demo(scene=scene, pixel_m=pixel_m))) == []


class _Clock:
    def __init__(self, t_s: float) -> None:
        self.t_s = t_s

    def __call__(self) -> float:
        return self.t_s


def test_stall_is_raised_on_a_fake_clock_and_cleared_by_the_late_line(tmp_path: Path) -> None:
    """With lines every 40 s and the instrument pausing 5 line times before line 10, ticks
    of the pipeline on a fake clock raise acquisition_stalled once, 2.5 line times after the
    last line arrived, and line 10 clears it; the clean lines raise nothing else."""
    demo = _demo()
    ds.run_scan(demo, tmp_path / "incoming", tmp_path / "truth", sleep=lambda _s: None)
    line_s, latency_s, t0 = 40.0, 3.0, datetime(2026, 3, 1, 9, 0, tzinfo=UTC)
    timed = tmp_path / "timed" / SCAN
    timed.mkdir(parents=True)
    arrivals, paths = [], []
    t_end = 0.0
    for k in range(N_LINES):
        if k == 10:
            t_end += 5 * line_s
        begin, t_end = t_end, t_end + line_s
        line = read_line_file(tmp_path / "incoming" / SCAN / f"line_{k:05d}_fwd.h5")
        stamped = dataclasses.replace(
            line,
            start_time=t0 + timedelta(seconds=begin),
            end_time=t0 + timedelta(seconds=t_end),
        )
        paths.append(write_line_file(stamped, timed / f"line_{k:05d}_fwd.h5"))
        arrivals.append(t0.timestamp() + t_end + latency_s)
    config = _config(tmp_path)
    clock = _Clock(t0.timestamp())
    pipeline = LinePipeline(config, sink=AlertSink(config.paths.alert_log), clock=clock)
    ticks: list[AlertEvent] = []
    try:
        for path, arrive in zip(paths, arrivals, strict=True):
            while clock.t_s + 1.0 < arrive:
                clock.t_s += 1.0
                ticks += pipeline.tick(clock.t_s)
            clock.t_s = arrive
            pipeline.process(path)
    finally:
        pipeline.close()
    assert [(e.rule, e.state, e.line_index) for e in ticks] == [
        ("acquisition_stalled", "raised", 9)
    ]
    waited_s = ticks[0].datetime.timestamp() - arrivals[9]
    assert 2.5 * line_s < waited_s <= 2.5 * line_s + 1.0
    events = read_alert_log(config.paths.alert_log)
    # The clear names the last line seen before it, and says which line arrived.
    assert _summary(events) == [
        ("acquisition_stalled", "raised", 9),
        ("acquisition_stalled", "cleared", 9),
    ]
    assert "line 10 arrived" in events[1].message


def test_a_crash_between_a_lines_commit_and_its_evaluation_loses_no_alert(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The daemon dies after committing the line that shows a tip crash but before the
    rules judged it (here: the metrics stage fails there and the pipeline is closed, as a
    kill leaves the rule state of the line before). When the same file comes again after
    the restart it is a duplicate for the store, yet it is evaluated, and the critical
    alert comes, once."""
    from strayline.rules import MetricsTracker

    reference = _events(tmp_path / "reference", _demo("tip_crash@9:10"))
    (raise_line,) = [e.line_index for e in reference if e.state == "raised"]
    folder = tmp_path / "crash"
    ds.run_scan(
        _demo("tip_crash@9:10"), folder / "incoming", folder / "truth", sleep=lambda _s: None
    )
    files = sorted((folder / "incoming" / SCAN).glob("line_*_fwd.h5"))
    config = _config(folder)
    first = LinePipeline(config)
    for path in files[:raise_line]:
        first.process(path)
    with monkeypatch.context() as patch:

        def killed(*_args: object) -> None:
            raise RuntimeError("killed between the commit and the rules")

        patch.setattr(MetricsTracker, "update", killed)
        with pytest.raises(RuntimeError, match="killed"):
            first.process(files[raise_line])
    first.close()
    assert read_alert_log(config.paths.alert_log) == []
    second = LinePipeline(config)
    try:
        again = second.process(files[raise_line])
        rest = [second.process(path) for path in files[raise_line + 1 :]]
    finally:
        second.close()
    assert again.kind == "duplicate"
    assert [(e.rule, e.state, e.line_index) for e in again.events] == [
        ("resonance_jump", "raised", raise_line)
    ]
    assert all(o.kind == "written" for o in rest)
    events = read_alert_log(config.paths.alert_log)
    assert [(e.rule, e.state) for e in events] == [("resonance_jump", "raised")]
    assert events[0].message == reference[0].message


def test_decision_records_say_why_a_rule_raised_and_why_it_missed(tmp_path: Path) -> None:
    """Every line leaves one decision record per line rule (strayline why). The record of
    the line a tip crash was raised on says "raised" with the step statistics that passed;
    on a touch too small for one line (D +1 MHz over 4 pixels, below the touches the
    benchmark counts) the records of its lines say the rule did not raise and show the
    common-mode step seen next to what it needed."""
    from strayline.rules import format_decision, read_decisions

    crash = tmp_path / "crash"
    events = _events(crash, _demo("tip_crash@9:10"))
    (raised,) = [e for e in events if e.state == "raised"]
    state_dir = _config(crash).paths.state_dir
    on_line = read_decisions(state_dir, SCAN, line_index=raised.line_index)
    by_rule = {d.rule: d for d in on_line}
    assert set(by_rule) == {
        "fluorescence_lost",
        "contrast_collapsed",
        "resonance_jump",
        "fit_failures_rising",
        "zfs_drift",
    }
    jump = by_rule["resonance_jump"]
    assert jump.verdict == "raised"
    assert jump.message == raised.message
    pl = jump.detail["PL"]
    assert abs(pl["step"]) >= pl["step_needed"]
    assert "raised on this line" in format_decision(jump)
    # every line of the scan was recorded, once per rule
    assert len(read_decisions(state_dir, SCAN)) == N_LINES * len(by_rule)

    touch = tmp_path / "touch"
    events = _events(touch, _demo("sample_touched@10:20-10,width_pixels=4,zfs_shift_hz=1e6"))
    assert not [e for e in events if e.rule == "resonance_jump"]
    (missed,) = read_decisions(
        _config(touch).paths.state_dir, SCAN, line_index=10, rule="resonance_jump"
    )
    assert missed.verdict in ("quiet", "not_judged")
    common = missed.detail["mean of the two resonances"]
    assert common["score"] < common["score_needed"] or abs(common["step"]) < common["step_needed"]
    assert "mean of the two resonances" in format_decision(missed)
