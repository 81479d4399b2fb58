"""Tests for strayline.rules: built-in detectors, persistence, hysteresis, restarts, stalls.

Synthetic scans are built from per-pixel rows: a film with parallel stripe domains whose
walls cross each line obliquely, so every wall moves along the fast axis from one line to
the next (the sharp features a clean scan is full of). The field of a wall is twice the
field of a film edge (PHYSICS.md §5): for a +z film in x < 0, a line current I_s along +y,
Bx = (μ0 I_s / 2π) d / (x² + d²), Bz = −(μ0 I_s / 2π) x / (x² + d²) (Hingant et al., Phys.
Rev. Applied 4, 014003 (2015); wall = two edges, Tetienne et al., Nat. Commun. 6, 6733
(2015)). The NV axis is the (100)-tip orientation θ = 54.7356° (PHYSICS.md §6).
(f₋ + f₊)/2 = D + 3(γB⊥)²/(2D) to lowest order (PHYSICS.md §2, [num]).
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from scipy.constants import mu_0, physical_constants

from strayline.alerts import AlertEvent
from strayline.errors import ConfigError
from strayline.field import LineField
from strayline.fit import FitStatus, LineFit
from strayline.lines import ScanLine
from strayline.rules import (
    AcquisitionStalledSpec,
    ContrastCollapsedSpec,
    FitFailuresRisingSpec,
    FluorescenceLostSpec,
    LineMetrics,
    MetricsTracker,
    ResonanceJumpSpec,
    RollingBaseline,
    RuleEngine,
    RulesConfig,
    ThresholdSpec,
    ZfsDriftSpec,
    apply_overrides,
    default_rules,
    load_rules,
    rules_from_data,
)

REPO = Path(__file__).resolve().parents[1]
# γ_NV = g μB / h with g = 2.0028 (Loubser & van Wyk 1978, from memory; PHYSICS.md §1)
GAMMA_HZ_PER_T = 2.0028 / 2 * physical_constants["Bohr magneton in Hz/T"][0] * 2
D_HZ = 2.870e9  # room-temperature zero-field splitting, PHYSICS.md §1 [mem]
THETA_RAD = np.arccos(1 / np.sqrt(3))  # (100) tip, PHYSICS.md §6
LINE_PERIOD_S = 60.0
T0 = datetime(2026, 3, 1, 22, 0, tzinfo=UTC)

Fault = Callable[[int, dict[str, np.ndarray]], None]


@dataclass
class Scene:
    """A night scan of stripe domains; faults edit the per-pixel truth of a line."""

    n_lines: int = 24
    n_pixels: int = 256
    pixel_m: float = 20e-9
    standoff_m: float = 50e-9
    sheet_moment_a: float = 0.5e-3
    wall_speed_px: float = 1.0
    bias_t: float = 3e-3
    pl_per_s: float = 2e5
    dwell_s: float = 1e-3
    seed: int = 7
    direction: str = "forward"
    faults: list[Fault] = field(default_factory=list)


def _wall_field_t(
    x_m: np.ndarray, walls_m: np.ndarray, standoff_m: np.ndarray, moment_a: float
) -> tuple[np.ndarray, np.ndarray]:
    bx = np.zeros_like(x_m)
    bz = np.zeros_like(x_m)
    for i, xw in enumerate(walls_m):
        k = (1.0 if i % 2 == 0 else -1.0) * 2 * mu_0 * moment_a / (2 * np.pi)
        u = x_m - xw
        bx += k * standoff_m / (u**2 + standoff_m**2)
        bz -= k * u / (u**2 + standoff_m**2)
    return bx, bz


def scan_lines(scene: Scene) -> list[tuple[ScanLine, LineFit, LineField]]:
    """Render the scene's lines as the records the pipeline passes to the rules."""
    rng = np.random.default_rng(scene.seed)
    n = scene.n_pixels
    x = np.arange(n) * scene.pixel_m
    walls0 = (np.cumsum(rng.uniform(4, 12, 400)) - 600) * scene.pixel_m
    out = []
    for k in range(scene.n_lines):
        truth = {
            "standoff_m": np.full(n, scene.standoff_m),
            "pl_per_s": np.full(n, scene.pl_per_s),
            "contrast": np.full(n, 0.15),
            "center_shift_hz": np.zeros(n),
            "status": np.zeros(n, np.uint8),
        }
        for fault in scene.faults:
            fault(k, truth)
        walls = walls0 + scene.wall_speed_px * k * scene.pixel_m
        bx, bz = _wall_field_t(x, walls, truth["standoff_m"], scene.sheet_moment_a)
        b_nv = np.sin(THETA_RAD) * bx + np.cos(THETA_RAD) * bz + scene.bias_t
        b_perp = np.abs(np.cos(THETA_RAD) * bx - np.sin(THETA_RAD) * bz)
        cm = D_HZ + 3 * (GAMMA_HZ_PER_T * b_perp) ** 2 / (2 * D_HZ) + truth["center_shift_hz"]
        b_meas = b_nv + rng.normal(0, 5e-6, n)
        cm_meas = cm + rng.normal(0, 20e3, n)
        pl = truth["pl_per_s"] * (1 + rng.normal(0, 0.01, n))
        end = T0 + timedelta(seconds=LINE_PERIOD_S * (k + 1))
        line = ScanLine(
            source=Path(f"/data/night/line_{k:05d}.h5"),
            scan_id="night-run",
            line_index=k,
            n_lines_planned=scene.n_lines,
            direction=scene.direction,  # type: ignore[arg-type]
            start_time=end - timedelta(seconds=0.9 * LINE_PERIOD_S),
            end_time=end,
            dwell_s=scene.dwell_s,
            nv_theta_rad=float(THETA_RAD),
            nv_phi_rad=0.0,
            freq_hz=np.linspace(2.75e9, 2.99e9, 3),
            counts=np.zeros((n, 3)),
            x_m=x,
            y_m=k * scene.pixel_m,
        )

        def two(a: np.ndarray) -> np.ndarray:
            return np.stack([a, a], axis=1)

        status = truth["status"]
        fit = LineFit(
            center_hz=np.stack(
                [cm_meas - GAMMA_HZ_PER_T * b_meas, cm_meas + GAMMA_HZ_PER_T * b_meas], 1
            ),
            center_sigma_hz=two(np.full(n, 20e3)),
            contrast=two(truth["contrast"]),
            contrast_sigma=two(np.full(n, 0.005)),
            fwhm_hz=two(np.full(n, 8e6)),
            fwhm_sigma_hz=two(np.full(n, 0.2e6)),
            baseline=pl * scene.dwell_s,
            baseline_sigma=np.sqrt(pl * scene.dwell_s),
            slope=np.zeros(n),
            chi2_red=np.ones(n),
            status=status,
            n_iter=np.full(n, 5, np.int32),
        )
        fld = LineField(
            field_nv_t=b_meas,
            field_nv_sigma_t=np.full(n, 5e-6),
            field_nv_bound_t=np.full(n, np.nan),
            field_abs_t=np.abs(b_meas),
            field_abs_sigma_t=np.full(n, 5e-6),
            angle_rad=np.zeros(n),
            angle_sigma_rad=np.zeros(n),
            center_mean_hz=cm_meas,
            center_mean_sigma_hz=np.full(n, 20e3),
            status=status,
        )
        out.append((line, fit, fld))
    return out


class FakeClock:
    """A clock the test moves by hand."""

    def __init__(self, t_s: float = T0.timestamp()) -> None:
        self.t_s = t_s

    def __call__(self) -> float:
        return self.t_s


def run(scene: Scene, rules: RulesConfig | None = None) -> list[AlertEvent]:
    """Feed a scene line by line, one line period apart, and collect the events."""
    clock = FakeClock()
    engine = RuleEngine(rules or default_rules(), clock=clock)
    tracker = MetricsTracker()
    events = []
    for records in scan_lines(scene):
        clock.t_s += LINE_PERIOD_S
        events += engine.evaluate_line("night-run", tracker.update(*records))
    return events


def tip_crash(line: int, pixel: int, *, extra_standoff_m: float, pl_factor: float = 1.0) -> Fault:
    def apply(k: int, t: dict[str, np.ndarray]) -> None:
        if k == line:
            t["standoff_m"][pixel:] += extra_standoff_m
            t["pl_per_s"][pixel:] *= pl_factor
        elif k > line:
            t["standoff_m"][:] += extra_standoff_m
            t["pl_per_s"][:] *= pl_factor

    return apply


def _only(events: list[AlertEvent], rule: str) -> list[AlertEvent]:
    return [e for e in events if e.rule == rule]


# -- resonance jump vs sharp features ----------------------------------------------------


@pytest.mark.parametrize("speed_px", [0.5, 1.0, 1.5])
def test_moving_walls_raise_nothing(speed_px: float) -> None:
    """A clean scan full of domain walls moving up to 1.5 pixels per line raises no alert
    (sample features are continuous across lines: common practice, PHYSICS.md §7)."""
    assert run(Scene(wall_speed_px=speed_px)) == []


@pytest.mark.parametrize("speed_px", [0.5, 1.0, 1.5])
def test_standoff_step_from_pixel_128_fires_within_two_lines(speed_px: float) -> None:
    """With the roughness threshold at 0.3 (a rule set for lines crossing many walls), a
    10 nm stand-off increase from pixel 128 of line 12 onward, persisting, raises
    resonance_jump by line 13, located at pixel 128 and called a stand-off change (the field
    decays as exp(−k d): Beardsley, IEEE Trans. Magn. 25, 671 (1989); PHYSICS.md §4), as a
    warning (roughness_only_severity)."""
    scene = Scene(wall_speed_px=speed_px, faults=[tip_crash(12, 128, extra_standoff_m=10e-9)])
    # The built-in 1.0 is set for short lines over few walls, whose roughness varies
    # that much from line to line on its own (benchmarks/alert_eval.py).
    rules = RulesConfig(rules=[ResonanceJumpSpec(field_step_log_ratio_above=0.3)])
    jumps = _only(run(scene, rules), "resonance_jump")
    assert [e.state for e in jumps] == ["raised"]
    ev = jumps[0]
    assert ev.line_index is not None
    assert 12 <= ev.line_index <= 13
    assert ev.pixel_range is not None
    assert abs(ev.pixel_range[0] - 128) <= 4
    assert ev.pixel_range[1] >= 240  # the roughness range ends at the last wall crossed
    # roughness alone (no PL drop, no common-mode shift) is weak evidence: a warning
    assert ev.severity == "warning"
    assert "stand-off change suspected: field roughness −" in ev.message
    assert ev.message.endswith(" since line 12")


def test_tip_crash_with_pl_drop_is_called_a_tip_crash() -> None:
    """A stand-off step with a 30 % PL drop from pixel 128 on is reported as a suspected
    tip crash with the pixel range 128–255 (fault signature: PHYSICS.md §7, common
    practice)."""
    scene = Scene(faults=[tip_crash(12, 128, extra_standoff_m=10e-9, pl_factor=0.7)])
    events = run(scene)
    jumps = _only(events, "resonance_jump")
    assert len(jumps) == 1
    assert jumps[0].line_index == 13
    assert jumps[0].pixel_range == (128, 256)
    # decided on line 13, the line after the step: the message names the step's line as
    # where it began (the pixels are the event's, not repeated in the text)
    assert jumps[0].message == "tip crash suspected: PL −30 % since line 12"
    assert not _only(events, "fluorescence_lost")  # 70 % of the median is above 60 %


def test_touched_sample_is_raised_then_cleared_when_it_reverts() -> None:
    """A 3 MHz common-mode shift over pixels 60–119 for lines 12–15 is raised as a contact
    within two lines and cleared, once, when it reverts (strain shifts D: Doherty et al.,
    PRL 112, 047601 (2014), PHYSICS.md §7)."""

    def touch(k: int, t: dict[str, np.ndarray]) -> None:
        if 12 <= k < 16:
            t["center_shift_hz"][60:120] += 3e6

    jumps = _only(run(Scene(faults=[touch])), "resonance_jump")
    assert [(e.state, e.line_index) for e in jumps] == [("raised", 13), ("cleared", 16)]
    assert jumps[0].message.startswith("contact suspected")
    assert jumps[0].pixel_range is not None
    assert abs(jumps[0].pixel_range[0] - 60) <= 2
    assert "reverted at line 16" in jumps[1].message


# -- the other built-in rules ------------------------------------------------------------


def test_fluorescence_lost_mid_line_fires_on_that_line_with_the_pixel() -> None:
    """PL falling to 5 % from pixel 131 of line 10 raises fluorescence_lost on line 10
    naming pixel 131 (rule of thumb: below 50–70 % of a running median, PHYSICS.md §7)."""

    def lost(k: int, t: dict[str, np.ndarray]) -> None:
        if k == 10:
            t["pl_per_s"][131:] *= 0.05
        elif k > 10:
            t["pl_per_s"][:] *= 0.05

    scene = Scene(n_lines=14, faults=[lost])
    raised = [e for e in run(scene) if e.rule == "fluorescence_lost"]
    assert len(raised) == 1
    assert raised[0].line_index == 10
    assert raised[0].state == "raised"
    assert raised[0].severity == "critical"
    assert raised[0].message == "PL fell to 5 % of the running median (200 kcounts/s)"
    assert raised[0].pixel_range == (131, 256)


def test_contrast_collapse_with_normal_pl_fires_on_the_first_line() -> None:
    """Contrast at 1 % with no dips found and PL normal (microwave off) raises
    contrast_collapsed on the first such line (persistence 1), and the fit failures it
    causes raise nothing more (PHYSICS.md §7, common practice)."""

    def microwave_off(k: int, t: dict[str, np.ndarray]) -> None:
        if k >= 10:
            t["contrast"][:] = 0.01
            t["status"][:] = FitStatus.NO_RESONANCE

    events = run(Scene(n_lines=14, faults=[microwave_off]))
    collapsed = _only(events, "contrast_collapsed")
    assert [(e.state, e.line_index) for e in collapsed] == [("raised", 10)]
    assert (
        collapsed[0].message == "contrast fell to 0 % of the running median (15.0 %); PL at 100 %"
    )
    assert not _only(events, "fluorescence_lost")
    assert not _only(events, "fit_failures_rising")


def test_zfs_drift_reports_the_temperature_equivalent() -> None:
    """A common-mode drift of 50 kHz per line raises zfs_drift once past 0.37 MHz and
    converts it with dD/dT = −74.2 kHz/K (Acosta et al., PRL 104, 070801 (2010))."""

    def warm_up(k: int, t: dict[str, np.ndarray]) -> None:
        if k >= 12:
            t["center_shift_hz"][:] -= 50e3 * (k - 11)

    drift = _only(run(Scene(n_lines=30, faults=[warm_up])), "zfs_drift")
    assert [e.state for e in drift] == ["raised"]
    ev = drift[0]
    assert ev.seen_value is not None
    assert ev.seen_value < -0.37e6
    kelvin = ev.seen_value / -74.2e3
    assert f"≈ {kelvin:+.1f} K if thermal" in ev.message.replace("−", "-")
    # line 19 is the first beyond 0.37 MHz (−0.40 MHz); 6 lines of persistence: 19 to 24
    assert ev.line_index == 24


# -- engine mechanics on metric sequences ------------------------------------------------


def _metrics(i: int, **values: float) -> LineMetrics:
    base = {
        "scan_id": "s1",
        "line_index": i,
        "direction": "forward",
        "n_lines_planned": 1000,
        "n_pixels": 64,
        "end_time_s": T0.timestamp() + LINE_PERIOD_S * i,
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
        "time_since_previous_s": LINE_PERIOD_S,
    }
    base.update(values)
    return LineMetrics(**base)  # type: ignore[arg-type]


def _pl_sequence(values: list[float], rules: RulesConfig, clock: FakeClock | None = None):
    clock = clock or FakeClock()
    engine = RuleEngine(rules, clock=clock)
    events = []
    for i, v in enumerate(values):
        clock.t_s += LINE_PERIOD_S
        rng = np.random.default_rng(i)  # small scatter, fixed seed
        events += engine.evaluate_line(
            "s1", _metrics(i, pl_median_per_s=v * (1 + 0.01 * rng.normal()))
        )
    return engine, events


def _pl_rules(**kw: int) -> RulesConfig:
    return RulesConfig(rules=[FluorescenceLostSpec(**kw)])


def test_a_fault_lasting_100_lines_gives_one_raise_and_one_clear() -> None:
    """PL at 30 % for 100 lines then back gives exactly one raised and one cleared event
    (no flood)."""
    pl = [2e5] * 10 + [0.6e5] * 100 + [2e5] * 10
    _, events = _pl_sequence(pl, _pl_rules(clear_lines=2))
    assert [(e.state, e.line_index) for e in events] == [("raised", 10), ("cleared", 111)]


def test_persistence_needs_consecutive_lines() -> None:
    """With persistence 3, two low lines then a normal one raise nothing; three in a row
    raise on the third."""
    pl = [2e5] * 10 + [0.5e5, 0.5e5, 2e5] + [0.5e5] * 3 + [2e5] * 4
    _, events = _pl_sequence(pl, _pl_rules(persistence_lines=3, clear_lines=1))
    assert [(e.state, e.line_index) for e in events] == [("raised", 15), ("cleared", 16)]


def test_hysteresis_keeps_the_alert_between_the_two_thresholds() -> None:
    """PL back at 70 % (above the 60 % raise level, below the 80 % clear level) keeps the
    alert; only PL above 80 % for clear_lines lines clears it."""
    pl = [2e5] * 10 + [0.5e5] * 2 + [1.4e5] * 10 + [1.9e5] * 3
    _, events = _pl_sequence(pl, _pl_rules(clear_lines=3))
    assert [(e.state, e.line_index) for e in events] == [("raised", 10), ("cleared", 24)]


def test_restart_mid_alert_neither_reraises_nor_forgets() -> None:
    """An engine rebuilt from a JSON round trip of its state in the middle of a fault
    lists the alert as active, raises nothing more and clears it once."""
    clock = FakeClock()
    engine, events = _pl_sequence([2e5] * 10 + [0.5e5] * 5, _pl_rules(clear_lines=2), clock)
    assert [e.state for e in events] == ["raised"]
    state = json.loads(json.dumps(engine.state_dict()))
    restored = RuleEngine.from_state(_pl_rules(clear_lines=2), state, clock=clock)
    assert [e.rule for e in restored.active()] == ["fluorescence_lost"]
    assert restored.active()[0] == events[0]
    later = []
    for i, v in enumerate([0.5e5] * 20 + [2e5] * 3, start=15):
        clock.t_s += LINE_PERIOD_S
        later += restored.evaluate_line("s1", _metrics(i, pl_median_per_s=v))
    assert [(e.state, e.line_index) for e in later] == [("cleared", 36)]
    assert restored.active() == []


def test_baseline_learns_only_from_good_lines() -> None:
    """Lines during an active alert do not enter the rolling baseline."""
    engine, _ = _pl_sequence([2e5] * 10 + [0.5e5] * 20, _pl_rules())
    state = json.loads(json.dumps(engine.state_dict()))
    baseline = RollingBaseline.from_state(state["scans"]["s1"]["baseline"])
    assert baseline.count == 10
    stats = baseline.stats("pl_median_per_s")
    assert stats is not None
    assert stats[0] == pytest.approx(2e5, rel=0.02)


def test_rolling_baseline_median_and_mad_match_scipy() -> None:
    """The baseline spread is the normal-consistent MAD of the window, as computed by
    scipy.stats.median_abs_deviation(scale='normal')."""
    from scipy.stats import median_abs_deviation

    rng = np.random.default_rng(3)
    values = rng.normal(10.0, 2.0, 50)
    b = RollingBaseline(window_lines=30, min_lines=5, anchor_lines=10)
    for v in values:
        b.add({"x": float(v)})
    med, spread = b.stats("x")  # type: ignore[misc]
    assert med == pytest.approx(np.median(values[-30:]))
    assert spread == pytest.approx(median_abs_deviation(values[-30:], scale="normal"))
    anchor = b.anchor_stats("x")
    assert anchor is not None
    assert anchor[0] == pytest.approx(np.median(values[:10]))
    again = RollingBaseline.from_state(json.loads(json.dumps(b.state_dict())))
    assert again.stats("x") == b.stats("x")
    assert again.anchor_stats("x") == anchor


def test_user_threshold_rule_on_an_aux_channel() -> None:
    """A threshold rule on aux.topography.max with a robust-z reference raises and clears
    once around a spike."""
    rules = rules_from_data(
        [
            {
                "name": "topography_spike",
                "kind": "threshold",
                "metric": "aux.topography.max",
                "reference": "baseline_z",
                "above": 8.0,
                "clear_above": 4.0,
                "clear_lines": 1,
            }
        ]
    )
    engine = RuleEngine(rules, clock=FakeClock())
    rng = np.random.default_rng(11)
    events = []
    for i in range(30):
        top = 20e-9 + 1e-9 * rng.normal() + (200e-9 if i in (20, 21) else 0.0)
        stats = {
            "topography": {
                "median": 0.0,
                "p10": 0.0,
                "p90": 0.0,
                "min": 0.0,
                "max": top,
                "spread": 0.0,
            }
        }
        events += engine.evaluate_line("s1", _metrics(i, aux_stats=stats))  # type: ignore[arg-type]
    assert [(e.state, e.line_index) for e in events] == [("raised", 20), ("cleared", 22)]
    assert events[0].seen_unit == "z"
    assert events[0].seen_value is not None
    assert events[0].seen_value > 8


# -- stalls ------------------------------------------------------------------------------


def test_stall_is_raised_on_a_tick_and_cleared_by_the_next_line() -> None:
    """With lines every 60 s, a tick 140 s after the last line is quiet, one at 400 s
    (beyond 2.5 × 60 s) raises one stall, a later tick adds nothing, the next line clears."""
    clock = FakeClock()
    engine = RuleEngine(RulesConfig(rules=[AcquisitionStalledSpec()]), clock=clock)
    for i in range(5):
        clock.t_s += LINE_PERIOD_S
        assert engine.evaluate_line("s1", _metrics(i)) == []
    last = clock.t_s
    assert engine.evaluate_tick(last + 140) == []
    stall = engine.evaluate_tick(last + 400)
    assert [(e.rule, e.state, e.line_index) for e in stall] == [
        ("acquisition_stalled", "raised", 4)
    ]
    assert stall[0].message == "no new line for 7 min (lines usually every 60 s)"
    assert engine.evaluate_tick(last + 900) == []
    clock.t_s = last + 1000
    cleared = engine.evaluate_line("s1", _metrics(5))
    assert [(e.rule, e.state) for e in cleared] == [("acquisition_stalled", "cleared")]
    assert "line 5 arrived" in cleared[0].message


def test_no_stall_after_the_last_planned_line_and_new_scan_supersedes() -> None:
    """A finished scan never stalls; a stalled scan is cleared when a new scan starts."""
    clock = FakeClock()
    engine = RuleEngine(RulesConfig(rules=[AcquisitionStalledSpec()]), clock=clock)
    for i in range(3):
        clock.t_s += LINE_PERIOD_S
        engine.evaluate_line("done", _metrics(i, n_lines_planned=3))
    assert engine.evaluate_tick(clock.t_s + 1e5) == []
    for i in range(3):
        clock.t_s += LINE_PERIOD_S
        engine.evaluate_line("next", _metrics(i))
    assert [e.scan_id for e in engine.evaluate_tick(clock.t_s + 1000)] == ["next"]
    clock.t_s += 2000
    events = engine.evaluate_line("third", _metrics(0))
    assert [(e.scan_id, e.state) for e in events] == [("next", "cleared")]
    assert "a new scan 'third' started" in events[0].message


# -- configuration and events ------------------------------------------------------------


def test_config_file_matches_the_built_in_rules() -> None:
    """config/rules.yaml holds the built-in rule set (plus a disabled example)."""
    loaded = load_rules(REPO / "config" / "rules.yaml")
    builtin = default_rules()
    assert loaded.baseline == builtin.baseline
    assert loaded.rules[: len(builtin.rules)] == builtin.rules
    assert [r.enabled for r in loaded.rules[len(builtin.rules) :]] == [False]


def test_unknown_key_is_a_config_error_with_its_key_path(tmp_path: Path) -> None:
    """A misspelt threshold is rejected with the file, the key path, 'unknown key', the
    nearest key and the keys the rule takes."""
    path = tmp_path / "rules.yaml"
    path.write_text("rules:\n  - kind: fluorescence_lost\n    pl_fraction_belo: 0.5\n")
    with pytest.raises(ConfigError) as info:
        load_rules(path)
    keys = ", ".join(FluorescenceLostSpec.model_fields)
    assert str(info.value) == (
        f"{path}: rules[0].pl_fraction_belo: unknown key (did you mean 'pl_fraction_below'?); "
        f"the keys of this rule are {keys}"
    )


def test_an_unknown_key_in_rule_overrides_suggests_and_lists_the_keys() -> None:
    """A misspelt key of a rule override names the override's key path, suggests the
    nearest key and lists the rule's keys; the other problems are named after it."""
    with pytest.raises(ConfigError) as info:
        apply_overrides(default_rules(), {"resonance_jump": {"field_step_log_ratio_abve": 3.0}})
    assert str(info.value).startswith(
        "rule_overrides.resonance_jump.field_step_log_ratio_abve: unknown key (did you mean "
        "'field_step_log_ratio_above'?); the keys of this rule are name, kind, "
    )
    with pytest.raises(ConfigError) as info:
        apply_overrides(default_rules(), {"resonance_jump": {"typo_key": 1, "z_above": -1}})
    paths = {"rule_overrides.resonance_jump.typo_key", "rule_overrides.resonance_jump.z_above"}
    text = str(info.value)
    first = text.split(":", maxsplit=1)[0]
    assert first in paths
    assert text.endswith(f"(and 1 more problem(s): {(paths - {first}).pop()})")


def test_unknown_metric_suggests_the_nearest_name() -> None:
    """A threshold rule on a misspelt metric names it and suggests the nearest metric."""
    with pytest.raises(ConfigError) as info:
        rules_from_data(
            [{"name": "x", "kind": "threshold", "metric": "pl_median_per_sec", "below": 1}]
        )
    text = str(info.value)
    assert text.startswith(
        "rules[0].metric: unknown metric 'pl_median_per_sec' (did you mean "
        "'pl_median_per_s'?); the metrics are line_index, "
    )
    assert text.endswith(
        "and aux.<channel>.<stat> with stat one of median, p10, p90, min, max, spread"
    )


def test_unknown_kind_and_bad_hysteresis_are_rejected() -> None:
    """An unknown kind lists the kinds; a clear level below the raise level is refused."""
    with pytest.raises(ConfigError, match=r"rules\[0\]: kind must be one of fluorescence_lost"):
        rules_from_data([{"name": "x", "kind": "tip_lost"}])
    with pytest.raises(ConfigError, match="pl_fraction_clear_above must be greater"):
        rules_from_data([{"kind": "fluorescence_lost", "pl_fraction_clear_above": 0.5}])


def test_alert_event_json_is_one_line_and_round_trips() -> None:
    """to_json gives one line of JSON that from_json turns back into the same event."""
    ev = AlertEvent(
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
        message="PL fell to 42% of the running median\nfrom pixel 131 on",
        advice="check the tip",
    )
    text = ev.to_json()
    assert "\n" not in text
    assert AlertEvent.from_json(text) == ev
    nan_event = dataclasses.replace(ev, confidence_z=float("nan"))
    assert json.loads(nan_event.to_json())["confidence_z"] is None


def test_threshold_spec_needs_a_limit() -> None:
    """A threshold rule without 'above' or 'below' is refused with that message."""
    with pytest.raises(ValueError, match="needs 'above' or 'below'"):
        ThresholdSpec(name="x", metric="pl_median_per_s")


def test_save_and_restore_through_a_file(tmp_path: Path) -> None:
    """save() writes the state atomically (no temporary file left) and restore() continues
    from it; a missing file gives a fresh engine."""
    clock = FakeClock()
    engine, events = _pl_sequence([2e5] * 10 + [0.5e5] * 3, _pl_rules(), clock)
    path = tmp_path / "state" / "rules_state.json"
    engine.save(path)
    assert sorted(p.name for p in path.parent.iterdir()) == ["rules_state.json"]
    restored = RuleEngine.restore(_pl_rules(), path, clock=clock)
    assert restored.active() == events
    assert RuleEngine.restore(_pl_rules(), tmp_path / "none.json", clock=clock).active() == []


def test_unreadable_state_is_moved_aside_and_logged(tmp_path: Path) -> None:
    """A corrupt state file is kept as '<name>.unreadable', logged, and a fresh engine
    starts."""
    from structlog.testing import capture_logs

    path = tmp_path / "rules_state.json"
    path.write_text('{"version": 1, "scans": {', encoding="utf-8")
    with capture_logs() as logs:
        engine = RuleEngine.restore(default_rules(), path)
    assert engine.active() == []
    assert not path.exists()
    assert (tmp_path / "rules_state.json.unreadable").exists()
    assert [e["event"] for e in logs] == ["rule_state_unreadable"]


def test_rules_from_a_daemon_config_object() -> None:
    """load_rules accepts an object with a 'rules' list (the daemon config): empty means
    the built-in set; errors name its source file and the key path."""

    @dataclass
    class Cfg:
        rules: list[dict[str, object]]
        source: Path | None = None

    assert load_rules(Cfg(rules=[])) == default_rules()
    custom = load_rules(Cfg(rules=[{"kind": "zfs_drift", "drift_hz_above": 1e6}]))
    assert [r.name for r in custom.rules] == ["zfs_drift"]
    with pytest.raises(ConfigError) as info:
        load_rules(Cfg(rules=[{"kind": "zfs_drift", "drift_hz": 1e6}], source=Path("d.yaml")))
    assert str(info.value).startswith(
        "d.yaml: rules[0].drift_hz: unknown key (did you mean 'drift_hz_above'?)"
    )


# -- tuned behaviour: suppression, latched tip events, drift floor ------------------------


def test_persistent_tip_crash_stays_raised_unless_clear_when_quiet() -> None:
    """A tip crash that does not revert stays raised to the end of a 60-line scan (a
    crashed tip does not mend itself: common practice); with clear_when_quiet it clears
    after clear_lines quiet lines instead."""
    scene = Scene(n_lines=60, faults=[tip_crash(12, 128, extra_standoff_m=10e-9, pl_factor=0.7)])
    latched = _only(run(scene), "resonance_jump")
    assert [e.state for e in latched] == ["raised"]
    quiet = RulesConfig(rules=[ResonanceJumpSpec(clear_when_quiet=True, clear_lines=20)])
    cleared = _only(run(scene, quiet), "resonance_jump")
    assert [(e.state, e.line_index) for e in cleared] == [("raised", 13), ("cleared", 33)]


def test_suppressed_by_must_name_rules_of_the_set_when_given() -> None:
    """A hand-written suppressed_by naming an unknown rule, or the rule itself, is refused
    with the key path and the name found; the built-in defaults may name absent rules."""
    with pytest.raises(ConfigError) as info:
        rules_from_data([{"kind": "zfs_drift", "suppressed_by": ["resonance_jmup"]}])
    assert str(info.value) == (
        "<root>: rule 'zfs_drift': suppressed_by must name rules of this set; "
        "found 'resonance_jmup'"
    )
    with pytest.raises(ConfigError, match="found itself"):
        rules_from_data([{"kind": "zfs_drift", "suppressed_by": ["zfs_drift"]}])
    alone = rules_from_data([{"kind": "zfs_drift"}])
    assert alone.rules[0].suppressed_by == (
        "resonance_jump",
        "fluorescence_lost",
        "contrast_collapsed",
    )


def test_a_rule_explained_by_another_is_not_raised() -> None:
    """While fluorescence_lost holds, the fit failures it causes raise nothing; without the
    suppression they would (one fault, one alert: DESIGN.md, rules and alerts)."""

    def lost(k: int, t: dict[str, np.ndarray]) -> None:
        if k >= 10:
            t["pl_per_s"][:] *= 0.05
            t["status"][:] = FitStatus.NO_RESONANCE

    scene = Scene(n_lines=16, faults=[lost])
    both = RulesConfig(rules=[FluorescenceLostSpec(), FitFailuresRisingSpec()])
    assert [e.rule for e in run(scene, both)] == ["fluorescence_lost"]
    loose = RulesConfig(rules=[FluorescenceLostSpec(), FitFailuresRisingSpec(suppressed_by=())])
    assert sorted({e.rule for e in run(scene, loose)}) == [
        "fit_failures_rising",
        "fluorescence_lost",
    ]


def test_zfs_drift_threshold_rises_with_what_the_sample_does_to_it() -> None:
    """A 0.5 MHz common-mode drift raises zfs_drift on a calm scan, but not when the
    statistic already scatters by 0.2 MHz over the anchor lines (5 × 0.2 MHz > 0.5 MHz)."""

    def drift(k: int, t: dict[str, np.ndarray]) -> None:
        if k >= 14:
            t["center_shift_hz"][:] += 0.5e6

    def scatter(k: int, t: dict[str, np.ndarray]) -> None:
        t["center_shift_hz"][:] += 0.2e6 * (1 if k % 2 else -1) if k < 12 else 0.0

    rules = RulesConfig(rules=[ZfsDriftSpec()])
    assert [e.state for e in run(Scene(n_lines=20, faults=[drift]), rules)] == ["raised"]
    assert run(Scene(n_lines=20, faults=[scatter, drift]), rules) == []


# -- confirmation of a step against the reference from before it ---------------------------


def _jump_metrics(k: int, **steps: object) -> LineMetrics:
    """Line k of a forward scan: clean levels, small centre-mean steps unless given."""
    rng = np.random.default_rng(500 + k)
    values: dict[str, object] = {
        "center_mean_step": float(rng.normal(0, 30e3)),
        "center_mean_step_score": 2.0,
        "center_mean_step_range": (0, 128),
        "center_mean_step_first_pixel": 0,
        "center_mean_step_ref": float(rng.normal(0, 30e3)),
        "center_mean_step_held": float(rng.normal(0, 30e3)),
        "field_step": float(rng.normal(0, 0.1)),
        "field_step_range": (0, 128),
        "field_step_first_pixel": 0,
        "field_step_ref": float(rng.normal(0, 0.1)),
        "field_step_held": float(rng.normal(0, 0.1)),
    }
    values.update(steps)
    return LineMetrics(
        scan_id="night-run",
        line_index=k,
        direction="forward",
        n_lines_planned=24,
        n_pixels=256,
        end_time_s=T0.timestamp() + LINE_PERIOD_S * (k + 1),
        pl_median_per_s=2e5,
        pl_p10_per_s=1.9e5,
        contrast_median=0.15,
        contrast_mean=0.15,
        fwhm_median_hz=8e6,
        fit_failure_fraction=0.0,
        field_median_t=3e-3,
        field_spread_t=1e-4,
        center_mean_median_hz=D_HZ,
        chi2_red_median=1.0,
        field_sigma_median_t=5e-6,
        **values,  # type: ignore[arg-type]
    )


_STEP_AT_12 = {
    "center_mean_step": 3e6,
    "center_mean_step_score": 20.0,
    "center_mean_step_range": (60, 120),
    "center_mean_step_first_pixel": 60,
    "center_mean_step_ref": 3e6,
}


def _jump_events(line_13: dict[str, object], line_12: dict[str, object] | None = None) -> list:
    """Resonance-jump events of 20 lines: a step on line 12, line 13 as given."""
    engine = RuleEngine(RulesConfig(rules=[ResonanceJumpSpec()]), clock=FakeClock())
    events = []
    for k in range(20):
        extra = {12: line_12 or _STEP_AT_12, 13: line_13}.get(k, {})
        events += engine.evaluate_line("night-run", _jump_metrics(k, **extra))
    return events


def test_a_step_that_persists_against_the_pre_step_reference_is_raised() -> None:
    """A 3 MHz common-mode step on line 12 that line 13 still shows over the same pixels
    against the lines before the step (+2.8 MHz) is raised on line 13 as a contact
    (strain shifts D: Doherty et al., PRL 112, 047601 (2014), PHYSICS.md §7)."""
    events = _jump_events({"center_mean_step_held": 2.8e6})
    assert [(e.state, e.line_index) for e in events] == [("raised", 13)]
    assert events[0].message.startswith("contact suspected")
    assert events[0].pixel_range == (60, 120)


@pytest.mark.parametrize("held_hz", [9e6, -3e6])
def test_a_step_that_does_not_persist_is_not_raised(held_hz: float) -> None:
    """A step on line 12 that line 13 shows neither kept (same sign, half to twice the
    size) nor reverted (grown threefold, or changed sign: a feature moving on) raises
    nothing (common practice: a tip event persists, PHYSICS.md §7)."""
    assert _jump_events({"center_mean_step_held": held_hz}) == []


def test_a_step_that_reverts_is_raised_as_a_touch_and_cleared() -> None:
    """A step on line 12 that is gone on line 13 (the way back seen against line 12, and
    about 0 against the lines before the step) is raised as a transient touch and cleared
    on the next quiet line (common practice, PHYSICS.md §7)."""
    back = {
        "center_mean_step": -3e6,
        "center_mean_step_score": 20.0,
        "center_mean_step_range": (60, 120),
        "center_mean_step_first_pixel": 60,
        "center_mean_step_ref": 0.0,
        "center_mean_step_held": 0.1e6,
    }
    events = _jump_events(back)
    assert [(e.state, e.line_index) for e in events] == [("raised", 13), ("cleared", 14)]
    assert events[0].message == "sample touched: resonance mean +3.00 MHz on line 12 only"


def test_a_step_that_only_undoes_an_odd_previous_line_is_not_a_step() -> None:
    """A 3 MHz step against line 11 that is about 0 against the median of the last three
    lines (line 11 was the odd one) is not taken as a step, even when line 13 keeps it
    (common practice: a median ignores one outlier)."""
    events = _jump_events(
        {"center_mean_step_held": 3e6}, line_12={**_STEP_AT_12, "center_mean_step_ref": 0.2e6}
    )
    assert events == []


@pytest.mark.parametrize(("before_hz", "raised"), [(2.0e6, False), (0.5e6, True), (-2.0e6, True)])
def test_a_step_where_the_common_mode_was_already_moving_its_way_is_not_a_step(
    before_hz: float, raised: bool
) -> None:
    """A 3 MHz common-mode step on line 12 that line 13 keeps is not raised when line 11
    had already moved +2 MHz over the same pixels against the lines before it (past 0.4 of
    the step: a feature coming into view), but is with +0.5 MHz or a move the other way
    (common practice: a touch shifts D at once, PHYSICS.md §7)."""
    line_12 = {**_STEP_AT_12, "center_mean_step_before": before_hz}
    events = _jump_events({"center_mean_step_held": 2.8e6}, line_12=line_12)
    assert [(e.state, e.line_index) for e in events] == ([("raised", 13)] if raised else [])


@pytest.mark.parametrize(("t_departure", "t_back"), [(2.5, 20.0), (4.0, 6.5)])
def test_a_one_line_excursion_must_pass_as_a_pair(t_departure: float, t_back: float) -> None:
    """The same one-line excursion as below raises nothing when its departure is under
    half the single-line statistic (2.5 < 3) or the two together stay under the pair
    threshold ((4.0 + 6.5)/√2 = 7.4 < 8): a wall that steps and steps back is as sharp on
    its way back as a touch (common practice; Stouffer's combination: Whitlock, J. Evol.
    Biol. 18, 1368 (2005))."""
    weak = {**_STEP_AT_12, "center_mean_step_score": t_departure}
    back = {
        "center_mean_step": -3e6,
        "center_mean_step_score": t_back,
        "center_mean_step_range": (62, 118),
        "center_mean_step_first_pixel": 62,
        "center_mean_step_ref": 0.05e6,
        "center_mean_step_before": 3e6,
    }
    assert _jump_events(back, line_12=weak) == []


def test_a_one_line_excursion_is_raised_from_its_way_back() -> None:
    """A 3 MHz common-mode excursion of line 12 alone, too weak on its own (t = 5 < 6),
    is raised as a transient touch on line 13, whose step back (t = 20) is about 0
    against the lines before it, and cleared on line 14 (strain shifts D: Doherty et al.,
    PRL 112, 047601 (2014), PHYSICS.md §7)."""
    weak = {**_STEP_AT_12, "center_mean_step_score": 5.0}
    back = {
        "center_mean_step": -3e6,
        "center_mean_step_score": 20.0,
        "center_mean_step_range": (62, 118),
        "center_mean_step_first_pixel": 62,
        "center_mean_step_ref": 0.05e6,
        "center_mean_step_before": 3e6,  # line 12's excursion: the other way, not a ramp
    }
    events = _jump_events(back, line_12=weak)
    assert [(e.state, e.line_index) for e in events] == [("raised", 13), ("cleared", 14)]
    assert events[0].message == "sample touched: resonance mean +3.00 MHz on line 12 only"
    assert events[0].pixel_range == (60, 120)


def test_a_held_step_back_to_where_a_weak_departure_left_is_called_a_touch() -> None:
    """A +3 MHz common-mode departure on line 10 too weak to step (t = 2.5, too weak to
    pair), a −3 MHz step on line 12 that line 13 keeps: the step returns to the level
    line 10 left, so it is
    raised as a transient touch naming both lines, and cleared on the next quiet line,
    not held as a new contact (strain shifts D while the tip presses: Doherty et al.,
    PRL 112, 047601 (2014), PHYSICS.md §7)."""
    lines = {
        10: {**_STEP_AT_12, "center_mean_step_score": 2.5},
        12: {
            **_STEP_AT_12,
            "center_mean_step": -3e6,
            "center_mean_step_ref": -3e6,
            "center_mean_step_range": (62, 118),
        },
        13: {"center_mean_step_held": -2.8e6},
    }
    engine = RuleEngine(RulesConfig(rules=[ResonanceJumpSpec()]), clock=FakeClock())
    events = []
    for k in range(20):
        events += engine.evaluate_line("night-run", _jump_metrics(k, **lines.get(k, {})))
    assert [(e.state, e.line_index) for e in events] == [("raised", 13), ("cleared", 14)]
    # lines 10 and 11 left the level that line 12 came back to
    assert events[0].message == "sample touched: resonance mean +3.00 MHz on lines 10–11 only"


def _pair_events(departure: dict[str, object], back_score: float) -> list:
    """Resonance-jump events of 20 lines: a +3 MHz departure on line 10 of statistic 5.5
    (or as given), a −3 MHz return on line 12 of statistic ``back_score``."""
    back = {
        **_STEP_AT_12,
        "center_mean_step": -3e6,
        "center_mean_step_score": back_score,
        "center_mean_step_ref": -3e6,
        "center_mean_step_range": (62, 118),
    }
    lines = {10: {**_STEP_AT_12, "center_mean_step_score": 5.5, **departure}, 12: back}
    engine = RuleEngine(RulesConfig(rules=[ResonanceJumpSpec()]), clock=FakeClock())
    events = []
    for k in range(20):
        events += engine.evaluate_line("night-run", _jump_metrics(k, **lines.get(k, {})))
    return events


@pytest.mark.parametrize(
    ("t_departure", "t_back", "raised"),
    [(5.5, 5.9, True), (5.0, 5.5, False), (2.9, 5.9, False), (5.9, 2.9, False)],
)
def test_a_weak_departure_and_a_weak_return_together_are_a_touch(
    t_departure: float, t_back: float, raised: bool
) -> None:
    """A +3 MHz departure on line 10 and the −3 MHz return on line 12, each below the
    single-line statistic of 6, are raised together on line 12 when (t₁ + t₂)/√2 (Stouffer's
    combination of two z scores, Whitlock, J. Evol. Biol. 18, 1368 (2005)) reaches 8 and
    each is at least 3; (5.5 + 5.9)/√2 = 8.06 is, (5.0 + 5.5)/√2 = 7.4 is not, nor a pair
    with one side under 3 (strain shifts D while the tip presses: Doherty et al., PRL 112,
    047601 (2014), PHYSICS.md §7). Cleared on the next quiet line."""
    events = _pair_events({"center_mean_step_score": t_departure}, t_back)
    if not raised:
        assert events == []
        return
    assert [(e.state, e.line_index) for e in events] == [("raised", 12), ("cleared", 13)]
    # lines 10 and 11 left the level that line 12 came back to
    assert events[0].message == "sample touched: resonance mean +3.00 MHz on lines 10–11 only"
    assert events[0].pixel_range == (62, 118)


@pytest.mark.parametrize(
    "departure",
    [
        {"center_mean_step_ref": 0.2e6},  # only undid an odd line before it
        {"center_mean_step_before": 2.5e6},  # a feature already coming into view
        {"center_mean_step_range": (150, 200)},  # elsewhere on the line
        {"center_mean_step": 1.2e6},  # less than half of the return
    ],
)
def test_a_pair_needs_a_departure_that_was_one(departure: dict[str, object]) -> None:
    """No pair is raised when the departure only undid an odd line (not credible against
    its own reference), followed a ramp already under way, lay over other pixels, or was
    less than half the size of the return (common practice: the return of a touch goes
    back to where the departure left)."""
    assert _pair_events(departure, 5.9) == []


def test_a_roughness_step_that_comes_and_goes_is_not_raised() -> None:
    """Field roughness that falls to a twelfth (ln ratio −2.5, past the built-in 2.1) from
    pixel 128 on line 12 and is back on line 13 (held about 0) raises nothing: a
    stand-off change does not spring back within a line, and a touch shows in the common
    mode (PHYSICS.md §7; common practice). Held on line 13, it is raised."""
    step = {
        "field_step": -2.5,
        "field_step_range": (128, 256),
        "field_step_first_pixel": 128,
        "field_step_ref": -2.4,
    }
    assert _jump_events({"field_step_held": 0.1}, line_12=step) == []
    # Without a measurement against the lines before the step (a gap in the history),
    # a roughness step back on line 13 does not make it a touch either.
    back = {"field_step_held": float("nan"), **step, "field_step": 2.2, "field_step_ref": 0.1}
    assert _jump_events(back, line_12=step) == []
    held = _jump_events({"field_step_held": -2.2}, line_12=step)
    assert [(e.state, e.line_index) for e in held] == [("raised", 13)]
    assert held[0].message.startswith("stand-off change suspected")


# -- rule sets per sample type ----------------------------------------------------------


@dataclass
class _Cfg:
    rules: list[dict[str, object]]
    rule_overrides: dict[str, dict[str, object]]
    source: Path | None = None


def test_rule_overrides_change_one_setting_and_keep_the_rest() -> None:
    """rule_overrides changes the named settings of the named rules only; every other
    rule and setting is the built-in one."""
    got = load_rules(
        _Cfg(rules=[], rule_overrides={"resonance_jump": {"center_mean_step_hz_above": 2e6}})
    )
    base = {r.name: r for r in default_rules().rules}
    jump = {r.name: r for r in got.rules}["resonance_jump"]
    assert jump.center_mean_step_hz_above == 2e6
    assert jump.model_copy(update={"center_mean_step_hz_above": 1e6}) == base["resonance_jump"]
    assert [r for r in got.rules if r.name != "resonance_jump"] == [
        r for r in default_rules().rules if r.name != "resonance_jump"
    ]


@pytest.mark.parametrize(
    ("overrides", "key", "words"),
    [
        ({"resonance_jmp": {"z_above": 4}}, "rule_overrides.resonance_jmp", "'resonance_jump'"),
        ({"resonance_jump": {"z_abov": 4}}, "rule_overrides.resonance_jump.z_abov", "unknown key"),
        ({"zfs_drift": {"drift_hz_above": -1}}, "rule_overrides.zfs_drift.drift_hz_above", "-1"),
        ({"zfs_drift": {"kind": "threshold"}}, "rule_overrides.zfs_drift.kind", "cannot change"),
        ({"zfs_drift": 3}, "rule_overrides.zfs_drift", "expected a mapping"),
    ],
)
def test_rule_override_errors_name_the_file_and_key_path(
    overrides: dict[str, object], key: str, words: str
) -> None:
    """A bad override stops with the file, the key path, and what was found or meant."""
    with pytest.raises(ConfigError) as info:
        load_rules(_Cfg(rules=[], rule_overrides=overrides, source=Path("p.yaml")))  # type: ignore[arg-type]
    assert info.value.key_path == key
    assert str(info.value).startswith(f"p.yaml: {key}: ")
    assert words in str(info.value)


def test_each_scan_is_judged_by_its_own_rule_set_also_after_a_restart() -> None:
    """Two scans in one engine: the one given a rule set without fluorescence_lost raises
    nothing on the same PL collapse that the other raises; a JSON round trip of the
    state keeps each scan's set."""
    quiet = load_rules(_Cfg(rules=[], rule_overrides={"fluorescence_lost": {"enabled": False}}))
    engine = RuleEngine(default_rules(), clock=FakeClock())
    engine.use_rules("afm", quiet)
    pl = [2e5] * 10 + [0.4e5] * 3
    raised: dict[str, list[str]] = {"plain": [], "afm": []}
    for scan in raised:
        for i, v in enumerate(pl):
            m = dataclasses.replace(_metrics(i, pl_median_per_s=v), scan_id=scan)
            raised[scan] += [e.rule for e in engine.evaluate_line(scan, m) if e.state == "raised"]
    assert raised == {"plain": ["fluorescence_lost"], "afm": []}
    state = json.loads(json.dumps(engine.state_dict()))
    again = RuleEngine.from_state(default_rules(), state, clock=FakeClock())
    assert [e.rule for e in again.active()] == ["fluorescence_lost"]
    later = [
        e.rule
        for i in range(len(pl), len(pl) + 3)
        for e in again.evaluate_line(
            "afm", dataclasses.replace(_metrics(i, pl_median_per_s=0.4e5), scan_id="afm")
        )
    ]
    assert later == []  # still judged without fluorescence_lost


def test_the_last_evaluated_line_and_its_checksum_survive_a_restart() -> None:
    """The engine remembers which line of a scan it judged last, with the checksum of its
    file, in its saved state; a state from before that record loads as not knowing it."""
    engine = RuleEngine(_pl_rules(), clock=FakeClock())
    assert engine.last_evaluated("s1") == (None, None, None)
    engine.evaluate_line("s1", _metrics(3, pl_median_per_s=2e5), source_sha256="ab12")
    state = json.loads(json.dumps(engine.state_dict()))
    again = RuleEngine.from_state(_pl_rules(), state, clock=FakeClock())
    assert again.last_evaluated("s1") == (3, "forward", "ab12")
    del state["scans"]["s1"]["last_sha256"]
    older = RuleEngine.from_state(_pl_rules(), state, clock=FakeClock())
    assert older.last_evaluated("s1") == (3, "forward", None)


def _sequence(rows: list[dict[str, float]], rules: RulesConfig) -> list[AlertEvent]:
    clock = FakeClock()
    engine = RuleEngine(rules, clock=clock)
    events = []
    for i, values in enumerate(rows):
        clock.t_s += LINE_PERIOD_S
        events += engine.evaluate_line("s1", _metrics(i, **values))
    return events


def test_weak_scan_failure_scatter_is_not_a_rise_but_a_real_rise_is() -> None:
    """On a weak scan where about half of 64 fits fail anyway, the binomial scatter of one
    line (±6 %, here +19 %: z ≈ 3, binomial normal approximation) raises nothing, nor do
    two such lines apart; failures rising to 95 % (z ≈ 7) raise fit_failures_rising after
    its two lines. (The threshold, 4, is given here: this tests the statistic, not the
    shipped value, which is set from a false-alarm rate.)"""
    rng = np.random.default_rng(3)
    rules = RulesConfig(rules=[FitFailuresRisingSpec(binomial_z_above=4.0)])
    noisy = [{"fit_failure_fraction": rng.binomial(64, 0.5) / 64} for _ in range(30)]
    high, normal = {"fit_failure_fraction": 0.69}, {"fit_failure_fraction": 0.5}
    assert _sequence([*noisy, high, normal, high, normal], rules) == []
    rising = noisy[:30] + [{"fit_failure_fraction": 0.95}] * 3
    assert [(e.state, e.line_index) for e in _sequence(rising, rules)] == [("raised", 31)]


def test_mean_contrast_scatter_of_a_weak_scan_is_not_a_collapse() -> None:
    """When few dips are detected the line mean contrast scatters by 30 %: one line at
    45 % of the running median (z ≈ −2) raises nothing, nor does one at 5 % (z ≈ −3.5);
    two lines at 5 % in a row (the microwave is off: Σz/√2 ≈ −5) raise contrast_collapsed
    on the second. On a strong scan (2 % scatter) one line at 5 % is enough. (The
    threshold, -4, is given here: this tests the statistic, not the shipped value, which
    is set from a false-alarm rate.)"""
    rng = np.random.default_rng(4)
    rules = RulesConfig(rules=[ContrastCollapsedSpec(contrast_z_below=-4.0)])
    rows = [{"contrast_mean": 0.02 * (1 + 0.3 * rng.normal())} for _ in range(30)]
    assert _sequence([*rows, {"contrast_mean": 0.009}], rules) == []
    assert _sequence([*rows, {"contrast_mean": 0.001}], rules) == []
    events = _sequence([*rows, *[{"contrast_mean": 0.001}] * 2], rules)
    assert [(e.rule, e.state, e.line_index) for e in events] == [
        ("contrast_collapsed", "raised", 31)
    ]
    strong = [{"contrast_mean": 0.02 * (1 + 0.02 * rng.normal())} for _ in range(30)]
    events = _sequence([*strong, {"contrast_mean": 0.001}], rules)
    assert [(e.rule, e.state, e.line_index) for e in events] == [
        ("contrast_collapsed", "raised", 30)
    ]
