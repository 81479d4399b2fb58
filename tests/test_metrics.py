"""Tests for strayline.rules.metrics: per-line levels, line-to-line changes and step location."""

from __future__ import annotations

import dataclasses
import math
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import median_abs_deviation

from strayline._numbers import median
from strayline.field import LineField
from strayline.fit import FitStatus, LineFit
from strayline.lines import ScanLine
from strayline.physics import D_ROOM_HZ, GAMMA_NV_HZ_PER_T
from strayline.rules._step_features import pixel_median
from strayline.rules._steps import best_level_segment, robust_scatter
from strayline.rules.metrics import (
    ROW_KEYS,
    LineMetrics,
    MetricsOptions,
    MetricsTracker,
    common_mode_sigma,
    comparison_rows,
    line_metrics,
    unexplained_failures,
)

T0 = datetime(2026, 3, 2, 1, 0, tzinfo=UTC)
N = 256


def records(
    *,
    index: int = 0,
    direction: str = "forward",
    pl_per_s: np.ndarray | None = None,
    field_t: np.ndarray | None = None,
    center_mean_hz: np.ndarray | None = None,
    status: np.ndarray | None = None,
    contrast: np.ndarray | None = None,
    x_m: np.ndarray | None = None,
    aux: dict[str, np.ndarray] | None = None,
    dwell_s: float = 2e-3,
    seed: int = 0,
) -> tuple[ScanLine, LineFit, LineField]:
    """Records of one line from per-pixel truth (small noise from a fixed seed)."""
    rng = np.random.default_rng(seed)
    pl = np.full(N, 1.5e5) if pl_per_s is None else pl_per_s
    b = np.full(N, 2e-3) + rng.normal(0, 2e-6, N) if field_t is None else field_t
    cm = np.full(N, 2.8702e9) + rng.normal(0, 10e3, N) if center_mean_hz is None else center_mean_hz
    stat = np.zeros(N, np.uint8) if status is None else status
    c = np.full(N, 0.12) if contrast is None else contrast
    x = np.arange(N) * 25e-9 if x_m is None else x_m
    end = T0 + timedelta(seconds=30.0 * (index + 1))
    line = ScanLine(
        source=Path(f"/data/bench/line_{index:05d}.h5"),
        scan_id="bench",
        line_index=index,
        n_lines_planned=64,
        direction=direction,  # type: ignore[arg-type]
        start_time=end - timedelta(seconds=25),
        end_time=end,
        dwell_s=dwell_s,
        nv_theta_rad=0.9553,
        nv_phi_rad=0.7854,
        freq_hz=np.linspace(2.8e9, 2.95e9, 5),
        counts=np.zeros((N, 5)),
        x_m=x,
        y_m=index * 25e-9,
        aux=aux or {},
        aux_units=dict.fromkeys(aux or {}, "m"),
    )

    def two(a: np.ndarray) -> np.ndarray:
        return np.stack([a, a], axis=1)

    fit = LineFit(
        center_hz=np.stack([cm - 56e6, cm + 56e6], 1),
        center_sigma_hz=two(np.full(N, 10e3)),
        contrast=two(c),
        contrast_sigma=two(np.full(N, 0.004)),
        fwhm_hz=np.stack([np.full(N, 7e6), np.full(N, 9e6)], 1),
        fwhm_sigma_hz=two(np.full(N, 0.1e6)),
        baseline=pl * dwell_s,
        baseline_sigma=np.sqrt(pl * dwell_s),
        slope=np.zeros(N),
        chi2_red=np.full(N, 1.1),
        status=stat,
        n_iter=np.full(N, 6, np.int32),
    )
    field = LineField(
        field_nv_t=b,
        field_nv_sigma_t=np.full(N, 2e-6),
        field_nv_bound_t=np.full(N, np.nan),
        field_abs_t=np.abs(b),
        field_abs_sigma_t=np.full(N, 2e-6),
        angle_rad=np.zeros(N),
        angle_sigma_rad=np.zeros(N),
        center_mean_hz=cm,
        center_mean_sigma_hz=np.full(N, 10e3),
        status=stat,
    )
    return line, fit, field


def test_levels_are_medians_over_the_line() -> None:
    """PL rate is baseline/dwell; levels are medians; FWHM averages the two dips."""
    pl = np.linspace(1e5, 2e5, N)
    m = line_metrics(*records(pl_per_s=pl))
    assert m.pl_median_per_s == pytest.approx(np.median(pl))
    assert m.pl_p10_per_s == pytest.approx(np.percentile(pl, 10))
    assert m.contrast_median == pytest.approx(0.12)
    assert m.fwhm_median_hz == pytest.approx(8e6)
    assert m.chi2_red_median == pytest.approx(1.1)
    assert m.fit_failure_fraction == 0.0
    assert math.isnan(m.time_since_previous_s)
    assert math.isnan(m.pl_step)


def test_failed_fits_are_counted_and_left_out_of_field_levels() -> None:
    """No dip and no convergence are failures; failed pixels leave the field median and
    spread, and a fit that found no dip counts as contrast 0."""
    status = np.zeros(N, np.uint8)
    status[:64] = FitStatus.NO_RESONANCE
    status[64:96] = FitStatus.NOT_CONVERGED
    field = np.full(N, 1e-3)
    field[:96] = 9.0  # garbage where the fits failed
    field[96:] += np.random.default_rng(5).normal(0, 1e-5, N - 96)
    m = line_metrics(*records(field_t=field, status=status))
    assert m.fit_failure_fraction == pytest.approx(96 / N)
    assert m.field_median_t == pytest.approx(np.median(field[96:]))
    # spread = normal-consistent MAD, as scipy.stats.median_abs_deviation(scale="normal")
    assert m.field_spread_t == pytest.approx(median_abs_deviation(field[96:], scale="normal"))
    assert m.contrast_median == pytest.approx(0.12)  # 160 of 256 pixels at 0.12, 64 at 0


def test_fits_the_sample_explains_are_not_failures() -> None:
    """Merged dips (small field), ambiguous hyperfine components and one resonance whose
    partner's mirror image about D lies outside the sweep are not counted as failures;
    one resonance whose partner should be inside the sweep, and no dip, are."""
    status = np.zeros(N, np.uint8)
    status[:20] = FitStatus.MERGED
    status[20:30] = FitStatus.AMBIGUOUS
    status[30:40] = FitStatus.ONE_RESONANCE  # partner beyond the sweep
    status[40:45] = FitStatus.ONE_RESONANCE  # partner inside the sweep: a missed dip
    status[45:50] = FitStatus.NO_RESONANCE
    line, fit, field = records(status=status)
    centres = fit.center_hz.copy()
    # sweep 2.80-2.95 GHz, D ≈ 2.8702 GHz: a dip at 2.945 GHz has its mirror at 2.795 GHz
    centres[30:40, 0] = 2.945e9
    fit = dataclasses.replace(fit, center_hz=centres)
    failed = unexplained_failures(fit, line.freq_hz, field.center_mean_hz)
    assert np.flatnonzero(failed).tolist() == list(range(40, 50))
    assert line_metrics(line, fit, field).fit_failure_fraction == pytest.approx(10 / N)


def test_pl_drop_from_pixel_128_is_located() -> None:
    """A 30 % PL drop from pixel 128 to the end of a forward line is found at 128 with
    value −0.30 and marked as running to the end of the acquisition."""
    before = records(seed=1)
    pl = np.full(N, 1.5e5) * (1 + np.random.default_rng(2).normal(0, 0.01, N))
    pl[128:] *= 0.7
    m = line_metrics(*records(pl_per_s=pl, seed=2), previous_rows=comparison_rows(*before))
    assert m.pl_step_range == (128, N)
    assert m.pl_step_first_pixel == 128
    assert m.pl_step == pytest.approx(-0.30, abs=0.01)
    assert m.pl_step_to_end == 1.0
    assert m.pl_step_level_per_s == pytest.approx(0.7 * 1.5e5, rel=0.01)
    assert m.pl_change_median == pytest.approx(-0.15, abs=0.16)  # half the pixels changed


def test_backward_line_steps_run_toward_lower_x() -> None:
    """On a backward trace stored with increasing x, a change from pixel 100 on in
    acquisition order covers storage pixels 0–100 and starts at pixel 100."""
    before = records(direction="backward", seed=1)
    pl = np.full(N, 1.5e5)
    pl[:101] *= 0.5
    m = line_metrics(
        *records(direction="backward", pl_per_s=pl, seed=2), previous_rows=comparison_rows(*before)
    )
    assert m.pl_step_range == (0, 101)
    assert m.pl_step_first_pixel == 100
    assert m.pl_step_to_end == 1.0


def test_bounded_common_mode_shift_is_found_inside_the_line() -> None:
    """A +3 MHz shift of (f₋+f₊)/2 over pixels 60–119 only is found there, not to the end."""
    before = records(seed=1)
    cm = np.full(N, 2.8702e9) + np.random.default_rng(3).normal(0, 10e3, N)
    cm[60:120] += 3e6
    m = line_metrics(*records(center_mean_hz=cm, seed=3), previous_rows=comparison_rows(*before))
    assert m.center_mean_step_range == (60, 120)
    assert m.center_mean_step == pytest.approx(3e6, rel=0.01)
    assert m.center_mean_step_to_end == 0.0


def test_field_roughness_falls_as_exp_minus_2k_delta_with_standoff() -> None:
    """For a sinusoidal field pattern the stray field at stand-off d scales as exp(−k d)
    (Beardsley, IEEE Trans. Magn. 25, 671 (1989); PHYSICS.md §4), so raising d by δ from
    pixel 128 on scales the roughness there by r = exp(−2kδ); the step value equals
    ln((r·E + ε)/(E + ε)), ε being the search's regulariser (min_step_pixels × mean
    previous roughness per pixel)."""
    pixel_m, period_m, d_m, delta_m = 25e-9, 400e-9, 50e-9, 10e-9
    k = 2 * np.pi / period_m
    x = np.arange(N) * pixel_m
    amp = np.full(N, 1e-3 * np.exp(-k * d_m))
    prev_b = 2e-3 + amp * np.sin(k * x)
    amp[128:] *= np.exp(-k * delta_m)
    now_b = 2e-3 + amp * np.sin(k * x)
    opts = MetricsOptions(min_step_pixels=16)
    m = line_metrics(
        *records(field_t=now_b, x_m=x),
        previous_rows=comparison_rows(*records(field_t=prev_b, x_m=x)),
        options=opts,
    )
    g_prev = np.diff(prev_b) ** 2 - 2 * (2e-6) ** 2
    e_prev_post = g_prev[127:].sum()
    eps = opts.min_step_pixels * g_prev.mean()
    r = np.exp(-2 * k * delta_m)
    assert m.field_step_range is not None
    assert abs(m.field_step_range[0] - 128) <= 1
    assert m.field_step == pytest.approx(
        np.log((r * e_prev_post + eps) / (e_prev_post + eps)), rel=0.03
    )
    assert m.field_step < 0


def test_change_fraction_uses_the_difference_sigma() -> None:
    """A pixel counts as changed when |ΔB| exceeds change_sigma × √(σ_now² + σ_prev²)."""
    prev = records(field_t=np.full(N, 1e-3))
    now_b = np.full(N, 1e-3)
    now_b[:32] += 5.5 * np.sqrt(2) * 2e-6  # just above 5 σ of the difference
    now_b[32:64] += 4.5 * np.sqrt(2) * 2e-6  # just below
    m = line_metrics(*records(field_t=now_b), previous_rows=comparison_rows(*prev))
    assert m.field_change_fraction == pytest.approx(32 / N)


def test_rows_with_another_pixel_count_are_ignored() -> None:
    """Rows of a line with a different number of pixels give no line-to-line numbers."""
    rows = {k: v[:100] for k, v in comparison_rows(*records()).items()}
    m = line_metrics(*records(), previous_rows=rows)
    assert math.isnan(m.field_change_median_t)
    assert m.pl_step_range is None


def test_tracker_compares_each_direction_with_its_own_last_line() -> None:
    """A backward trace is compared with the previous backward trace: a constant
    forward/backward PL offset gives no step, and the interval is between consecutive
    lines."""
    tracker = MetricsTracker()
    steps = []
    for i in range(6):
        direction = "forward" if i % 2 == 0 else "backward"
        pl = np.full(N, 1.5e5 if direction == "forward" else 0.9e5)
        pl = pl * (1 + np.random.default_rng(i).normal(0, 0.01, N))
        m = tracker.update(*records(index=i, direction=direction, pl_per_s=pl, seed=i))
        steps.append(m.pl_step)
        if i > 0:
            assert m.time_since_previous_s == pytest.approx(30.0)
    assert math.isnan(steps[0])
    assert math.isnan(steps[1])
    # noise only (1 % per pixel): far below the 40 % forward/backward offset
    assert max(abs(s) for s in steps[2:]) < 0.03


def test_tracker_seed_restores_rows_and_checks_keys() -> None:
    """Seeding rows (as rebuilt from a store) makes the next line compare against them;
    rows lacking a key are refused with the key named."""
    tracker = MetricsTracker()
    tracker.seed("forward", comparison_rows(*records(seed=1)))
    pl = np.full(N, 1.5e5)
    pl[200:] *= 0.5
    assert tracker.update(*records(pl_per_s=pl)).pl_step_range == (200, N)
    with pytest.raises(ValueError, match="lack keys \\['x_m'\\]"):
        tracker.seed("forward", {k: np.zeros(3) for k in ROW_KEYS if k != "x_m"})


def test_aux_statistics_and_value_lookup() -> None:
    """Auxiliary channels get median/p10/p90/min/max/spread, reachable by name."""
    top = np.linspace(0.0, 100e-9, N)
    m = line_metrics(*records(aux={"topography": top}))
    assert m.value("aux.topography.median") == pytest.approx(50e-9)
    assert m.value("aux.topography.p90") == pytest.approx(np.percentile(top, 90))
    assert m.value("aux.topography.max") == pytest.approx(100e-9)
    assert m.aux_units["topography"] == "m"
    assert m.value("pl_median_per_s") == m.pl_median_per_s
    assert "aux.topography.spread" in m.numeric()
    with pytest.raises(KeyError):
        m.value("scan_id")


@settings(max_examples=40, deadline=None, derandomize=True)
@given(
    start=st.integers(min_value=16, max_value=N - 16),
    size=st.floats(min_value=0.05, max_value=0.8),
    sign=st.sampled_from([-1.0, 1.0]),
)
def test_step_start_is_recovered_for_any_position(start: int, size: float, sign: float) -> None:
    """A level step ≥ 5 σ of the pixel noise starting anywhere is located to ±1 pixel with
    its size within 3 σ/√n."""
    rng = np.random.default_rng(start)
    c = rng.normal(0, 0.01, N)
    c[start:] += sign * size
    seg = best_level_segment(c, 16)
    assert seg is not None
    assert abs(seg.start - start) <= 1
    assert seg.stop == N
    assert seg.value == pytest.approx(sign * size, abs=3 * 0.01 / np.sqrt(16) + 0.01)


@pytest.mark.parametrize("n", [300, 1024, 2000])
def test_long_lines_are_searched_coarse_then_fine_without_losing_the_pixel(n: int) -> None:
    """On lines longer than the exhaustive grid, a PL drop from a pixel between grid
    boundaries and a bounded shift are still located to the pixel."""
    rng = np.random.default_rng(n)
    c = rng.normal(0, 0.01, n)
    start = n // 2 + 3
    c[start:] -= 0.3
    seg = best_level_segment(c, 16)
    assert seg is not None
    assert (seg.start, seg.stop) == (start, n)
    d = rng.normal(0, 0.01, n)
    d[101:177] += 0.2
    seg = best_level_segment(d, 16)
    assert seg is not None
    assert (seg.start, seg.stop) == (101, 177)


def test_rows_where_both_dips_are_nan_give_no_warning_and_count_as_no_contrast() -> None:
    """A line whose failed fits have NaN in both dip columns is summarised without numpy's
    "Mean of empty slice" warning (warnings are errors here), and a pixel whose fit found
    no dip counts as contrast 0, as before."""
    status = np.zeros(N, np.uint8)
    status[:100] = FitStatus.NO_RESONANCE
    line, fit, field = records(status=status)
    contrast = np.array(fit.contrast, dtype=float)
    fwhm = np.array(fit.fwhm_hz, dtype=float)
    contrast[:100] = np.nan
    fwhm[:100] = np.nan
    fit = dataclasses.replace(fit, contrast=contrast, fwhm_hz=fwhm)
    m = line_metrics(line, fit, field)
    assert m.contrast_median == pytest.approx(np.median(np.r_[np.zeros(100), np.full(156, 0.12)]))
    assert m.fwhm_median_hz == pytest.approx(8e6)


def test_rows_kept_for_the_next_line_drop_failed_fits() -> None:
    """Field and centre rows kept for the next line are NaN where the fit failed, so one
    failed pixel's garbage cannot fake a roughness change on the next line."""
    status = np.zeros(N, np.uint8)
    status[40] = FitStatus.NOT_CONVERGED
    field = np.full(N, 2e-3)
    field[40] = 0.5
    rows = comparison_rows(*records(field_t=field, status=status))
    assert np.isnan(rows["field_nv_t"][40])
    assert np.isnan(rows["center_mean_hz"][40])
    assert np.isfinite(rows["pl_per_s"][40])
    assert np.all(np.isfinite(np.delete(rows["field_nv_t"], 40)))


def test_center_p10_follows_the_lowest_resonance_means() -> None:
    """The centre-mean 10th percentile ignores pixels raised by a transverse field, which
    only raises (f₋ + f₊)/2 by about 3(γB⊥)²/(2D) (PHYSICS.md §2, [num])."""
    cm = np.full(N, 2.8702e9)
    cm[::3] += 2e6  # a third of the pixels under a strong transverse field
    m = line_metrics(*records(center_mean_hz=cm))
    assert m.center_mean_p10_hz == pytest.approx(2.8702e9)
    assert m.center_mean_median_hz == pytest.approx(2.8702e9)
    cm[::2] += 2e6  # now most pixels: the median moves, the 10th percentile does not
    m = line_metrics(*records(center_mean_hz=cm))
    assert m.center_mean_median_hz > 2.8712e9
    assert m.center_mean_p10_hz == pytest.approx(2.8702e9)


def test_narrow_common_mode_shift_is_found_where_the_field_stayed_put() -> None:
    """A 3 MHz shift of (f₋+f₊)/2 over 6 pixels with B∥ unchanged (contact strain moves D:
    Doherty et al., PRL 112, 047601 (2014), PHYSICS.md §7) is found and placed by the
    narrow common-mode search."""
    prev = records(index=0, seed=1)
    cm = np.full(N, 2.8702e9) + np.random.default_rng(2).normal(0, 10e3, N)
    cm[100:106] += 3e6
    now = records(index=1, center_mean_hz=cm, seed=2)
    m = line_metrics(*now, previous_rows=comparison_rows(*prev))
    assert m.center_mean_step == pytest.approx(3e6, rel=0.05)
    assert m.center_mean_step_range == (100, 106)


# -- references for confirming a step -------------------------------------------------


def _cm_lines(shifts: list[tuple[float, int, int]]) -> list[LineMetrics]:
    """Metrics of consecutive forward lines, line k shifted by shifts[k] over [a, b)."""
    tracker = MetricsTracker()
    out = []
    for k, (shift_hz, a, b) in enumerate(shifts):
        rng = np.random.default_rng(100 + k)
        cm = np.full(N, 2.8702e9) + rng.normal(0, 10e3, N)
        cm[a:b] += shift_hz
        out.append(tracker.update(*records(index=k, center_mean_hz=cm, seed=100 + k)))
    return out


def test_step_held_is_measured_over_the_previous_range_from_before_the_step() -> None:
    """A 3 MHz common-mode shift over pixels 60–119 from line 4 on is still +3 MHz on line
    5 against the median of lines 1–3 (held), and 0 when line 5 is back (common practice:
    a tip event persists, a touch reverts, PHYSICS.md §7)."""
    clean = [(0.0, 0, 0)] * 4
    kept = _cm_lines([*clean, (3e6, 60, 120), (3e6, 60, 120)])
    back = _cm_lines([*clean, (3e6, 60, 120), (0.0, 0, 0)])
    assert kept[4].center_mean_step_range == (60, 120)
    # 60 pixels of 10 kHz noise: the medians are good to a few kHz.
    assert abs(kept[4].center_mean_step_ref - 3e6) < 20e3
    assert abs(kept[5].center_mean_step_held - 3e6) < 20e3
    assert abs(back[5].center_mean_step_held) < 20e3
    assert math.isnan(kept[0].center_mean_step_held)


def test_step_before_shows_whether_the_common_mode_was_already_moving_there() -> None:
    """Over a 3 MHz step's pixels 60–119 on line 5, the previous line against the median of
    lines 1–3 is +1.5 MHz when line 4 had already risen halfway there, and about 0 when
    lines 0–4 were steady (common practice: a feature coming into view shifts the common
    mode over several lines, a touch at once)."""
    clean = [(0.0, 0, 0)] * 4
    ramp = _cm_lines([*clean, (1.5e6, 60, 120), (4.5e6, 60, 120)])
    steady = _cm_lines([*clean, (0.0, 0, 0), (3e6, 60, 120)])
    assert ramp[5].center_mean_step_range == (60, 120)
    assert steady[5].center_mean_step_range == (60, 120)
    # 60 pixels of 10 kHz noise: the medians are good to a few kHz.
    assert abs(ramp[5].center_mean_step_before - 1.5e6) < 20e3
    assert abs(steady[5].center_mean_step_before) < 20e3
    assert math.isnan(steady[1].center_mean_step_before)


def test_step_ref_is_near_zero_when_a_step_only_undoes_an_odd_previous_line() -> None:
    """A line that is normal after one odd line steps by +3 MHz against that line but by
    about 0 against the per-pixel median of the last three lines (common practice: a
    median ignores one outlier)."""
    lines = _cm_lines([(0.0, 0, 0)] * 3 + [(-3e6, 60, 120), (0.0, 0, 0)])
    m = lines[4]
    assert m.center_mean_step_range == (60, 120)
    assert abs(m.center_mean_step - 3e6) < 20e3
    assert abs(m.center_mean_step_ref) < 20e3


def test_roughness_held_compares_with_the_reference_lines() -> None:
    """Field roughness that falls from pixel 128 on and stays low gives a held log ratio
    close to the step's own (the stray field decays as exp(−k d) with stand-off: Beardsley,
    IEEE Trans. Magn. 25, 671 (1989); PHYSICS.md §4)."""
    tracker = MetricsTracker()
    x = np.arange(N)
    ms = []
    for k in range(6):
        rng = np.random.default_rng(300 + k)
        amp = np.full(N, 200e-6)
        if k == 4:
            amp[128:] = 50e-6
        if k >= 5:
            amp[:] = 50e-6
        b = 2e-3 + amp * np.sin(2 * np.pi * (x + 0.7 * k) / 9.0) + rng.normal(0, 2e-6, N)
        ms.append(tracker.update(*records(index=k, field_t=b, seed=300 + k)))
    step = ms[4]
    assert step.field_step_range is not None
    assert abs(step.field_step_range[0] - 128) <= 2
    # Amplitude ×1/4 → energy ×1/16: ln ratio ≈ −2.8 (the regulariser pulls it toward 0).
    assert step.field_step < -1.5
    assert 0.5 <= ms[5].field_step_held / step.field_step <= 2.0


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.lists(
            st.one_of(st.floats(-1e9, 1e9, allow_nan=False), st.just(float("nan"))),
            min_size=5,
            max_size=5,
        ),
        min_size=1,
        max_size=4,
    )
)
def test_pixel_median_matches_numpy_nanmedian(rows: list[list[float]]) -> None:
    """The per-pixel median of a few rows equals numpy's nanmedian wherever a pixel has a
    finite value, and is NaN where it has none (reference: numpy.nanmedian)."""
    a = np.array(rows, dtype=float)
    got = pixel_median(list(a))
    has = np.isfinite(a).any(axis=0)
    assert np.all(np.isnan(got[~has]))
    if has.any():
        want = np.nanmedian(a[:, has], axis=0)
        np.testing.assert_allclose(got[has], want, rtol=1e-12, atol=1e-6)


def test_seeding_the_last_lines_restores_the_references_exactly() -> None:
    """A tracker seeded with the rows of the last four lines, oldest first, gives the next
    line the same metrics, references and held values included, as a tracker that saw
    every line (restart memory; common practice)."""
    shifts = [(0.0, 0, 0)] * 4 + [(3e6, 60, 120), (3e6, 60, 120)]
    continuous = _cm_lines(shifts)
    seeded = MetricsTracker()
    all_records = []
    for k, (shift_hz, a, b) in enumerate(shifts):
        rng = np.random.default_rng(100 + k)
        cm = np.full(N, 2.8702e9) + rng.normal(0, 10e3, N)
        cm[a:b] += shift_hz
        all_records.append(records(index=k, center_mean_hz=cm, seed=100 + k))
    for rec in all_records[1:5]:
        seeded.seed("forward", comparison_rows(*rec))
    got = seeded.update(*all_records[5]).numeric()
    want = continuous[5].numeric()
    for name in ("center_mean_step_ref", "center_mean_step_held", "field_step_held"):
        assert got[name] == pytest.approx(want[name], nan_ok=True), name
    assert abs(got["center_mean_step_held"] - 3e6) < 20e3


# -- the weighted common-mode search ---------------------------------------------------


def test_weighted_step_score_is_the_z_of_inverse_variance_weighted_means() -> None:
    """With per-pixel σ the score of the reported range is the two-sample z of
    inverse-variance weighted means, (m_in − m_out)/√(1/W_in + 1/W_out) with W = Σ 1/σ²
    (Bevington & Robinson, Data Reduction and Error Analysis, 3rd ed., §4.1), the means
    taken here with numpy's np.average, over the robust pixel-to-pixel scatter of
    change/σ when that exceeds 1, each change clipped to ±6σ in the statistic (Huber,
    Ann. Math. Statist. 35, 73 (1964)) but not in the reported mean; the 5-pixel plateau
    is placed exactly."""
    rng = np.random.default_rng(11)
    n = 64
    sigma = rng.uniform(0.5e6, 2.0e6, n)
    change = rng.normal(0.0, sigma)
    change[30:35] += 6e6
    seg = best_level_segment(change, 4, sigma)
    assert seg is not None
    assert (seg.start, seg.stop) == (30, 35)
    w = 1.0 / sigma**2
    inside = np.zeros(n, bool)
    inside[30:35] = True
    # The noise scale: the pixel-to-pixel scatter of change/σ when that exceeds 1 (scipy's
    # normal-scaled MAD of the neighbour differences about 0, over √2).
    diffs = np.diff(change / sigma)
    scatter = median_abs_deviation(diffs, center=lambda a, axis: 0.0, scale="normal")
    scale = max(1.0, scatter / np.sqrt(2))
    m_in = np.average(change[inside], weights=w[inside])
    clipped = np.clip(change, -6 * scale * sigma, 6 * scale * sigma)
    c_in = np.average(clipped[inside], weights=w[inside])
    c_out = np.average(clipped[~inside], weights=w[~inside])
    z = (c_in - c_out) / np.sqrt(1 / w[inside].sum() + 1 / w[~inside].sum())
    assert seg.value == pytest.approx(m_in, rel=1e-9)
    assert seg.score == pytest.approx(abs(z) / scale, rel=1e-9)


def test_a_pixel_with_a_large_sigma_cannot_make_a_step() -> None:
    """A 20 MHz jump in two pixels whose own σ is 20 MHz (a fit that barely held, or a
    wall that moved) stays insignificant; the same jump with the line's 0.5 MHz σ is a
    step, scoring the most four pixels clipped at 6σ can: 6·√4 = 12, less the rest of
    the line's share."""
    rng = np.random.default_rng(3)
    n = 64
    sigma = np.full(n, 0.5e6)
    change = rng.normal(0.0, sigma)
    change[20:24] += 20e6
    loud = sigma.copy()
    loud[20:24] = 20e6
    quiet = best_level_segment(change, 4, loud)
    assert quiet is None or quiet.score < 4.0
    found = best_level_segment(change, 4, sigma)
    assert found is not None
    assert 10.0 < found.score <= 12.0
    assert (found.start, found.stop) == (20, 24)
    assert found.value == pytest.approx(20e6, abs=1e6)


def test_one_misfitted_pixel_cannot_make_a_range_alone() -> None:
    """One pixel whose centre moved by 100σ (a dip taken for the wrong one) in a line of
    noise scores at most 6σ/√4 = 3 over the smallest range of 4 pixels, well below the
    threshold of 6, while a real 4-pixel shift of 8σ each is still found with a score near
    8·√4 = 16 less the clip (Huber-type clipping, Huber, Ann. Math. Statist. 35, 73
    (1964); common practice for a robust search)."""
    rng = np.random.default_rng(5)
    n = 64
    sigma = np.full(n, 1e6)
    noise = rng.normal(0.0, sigma)
    outlier = noise.copy()
    outlier[40] += 100e6
    seg = best_level_segment(outlier, 4, sigma)
    assert seg is None or seg.score < 4.5
    shifted = noise.copy()
    shifted[20:24] += 8e6
    found = best_level_segment(shifted, 4, sigma)
    assert found is not None
    assert (found.start, found.stop) == (20, 24)
    assert 10.0 < found.score <= 12.5
    assert found.value == pytest.approx(8e6 + noise[20:24].mean(), abs=0.3e6)


def _nv_pair_hz(b_par_t: float, b_perp_t: float) -> tuple[float, float]:
    """f₋, f₊ of the NV ground-state spin-1 Hamiltonian H/h = D S_z² + γ(B∥ S_z + B⊥ S_x),
    from numpy's eigensolver."""
    s = 1 / np.sqrt(2)
    sx = np.array([[0, s, 0], [s, 0, s], [0, s, 0]])
    sz = np.diag([1.0, 0.0, -1.0])
    h = D_ROOM_HZ * sz @ sz + GAMMA_NV_HZ_PER_T * (b_par_t * sz + b_perp_t * sx)
    e = np.linalg.eigvalsh(h)
    return e[1] - e[0], e[2] - e[0]


def test_common_mode_noise_uses_the_eigensolver_slope_of_the_line_mean() -> None:
    """The sample term of common_mode_sigma is |d[(f₋+f₊)/2]/dB⊥| · |ΔB⊥| with the slope
    3γ²B⊥/D (PHYSICS.md §2): checked against a central difference of the exact
    eigenfrequencies from numpy's eigensolver at B∥ = 1 mT, B⊥ = 2 mT (within 2 %)."""
    b_par, b_perp, h = 1e-3, 2e-3, 1e-7
    hi, lo = _nv_pair_hz(b_par, b_perp + h), _nv_pair_hz(b_par, b_perp - h)
    slope = (sum(hi) / 2 - sum(lo) / 2) / (2 * h)
    assert 3 * GAMMA_NV_HZ_PER_T**2 * b_perp / D_ROOM_HZ == pytest.approx(slope, rel=0.02)
    n = 4
    prev = {
        "field_nv_t": np.full(n, b_par),
        "field_perp_t": np.full(n, b_perp),
        "center_mean_sigma_hz": np.zeros(n),
    }
    now = {**prev, "field_nv_t": prev["field_nv_t"] + np.array([0.0, 1e-5, -1e-4, np.nan])}
    got = common_mode_sigma(now, prev, transverse_ratio=1.0)
    want = np.abs(slope) * np.array([0.0, 1e-5, 1e-4, 0.0])
    assert got == pytest.approx(want, rel=0.02, abs=1.0)


@given(
    values=st.lists(st.floats(-5.0, 5.0), min_size=8, max_size=40),
    min_pixels=st.integers(2, 6),
)
@settings(max_examples=150, deadline=None)
def test_compiled_segment_search_finds_the_exhaustive_best(
    values: list[float], min_pixels: int
) -> None:
    """The compiled search returns the segment a plain exhaustive loop over every [a, b)
    finds: the largest |mean in − mean out| / (s √(1/n_in + 1/n_out)) among segments of at
    least min_pixels that leave at least min_pixels (s the robust pixel-to-pixel scatter),
    edges or segments that changed more than their surroundings (reference: brute force in
    plain Python, the statistic of Bevington & Robinson §4.1 with unit weights)."""
    c = np.asarray(values)
    n = c.size
    seg = best_level_segment(c, min_pixels)
    s = max(float(np.nan_to_num(robust_scatter(c))), 1e-300)
    best = -1.0
    for a in range(n):
        for b in range(a + min_pixels, n + 1):
            if b - a == n or n - (b - a) < min_pixels:
                continue
            inside, outside = c[a:b], np.r_[c[:a], c[b:]]
            if not (a == 0 or b == n or abs(inside.mean()) >= abs(outside.mean())):
                continue
            t = abs(inside.mean() - outside.mean()) / (
                s * np.sqrt(1 / inside.size + 1 / outside.size)
            )
            best = max(best, t)
    if seg is None or (seg.start, seg.stop) == (0, n):
        assert best < 6.0 + 1e-9 or not np.isfinite(robust_scatter(c))
    else:
        assert seg.score == pytest.approx(best, rel=1e-9, abs=1e-12)


@settings(max_examples=300, deadline=None)
@given(
    st.lists(
        st.one_of(
            st.floats(allow_nan=False, allow_infinity=True, width=64),
            st.integers(-5, 5).map(float),  # ties
            st.just(float("nan")),
        ),
        max_size=80,
    )
)
def test_fast_median_is_numpy_median(values: list[float]) -> None:
    """The rules' median is ``np.median``'s number exactly (reference: numpy), NaN for an
    empty array or one holding a NaN, for any values, ties and infinities included."""
    import warnings

    a = np.asarray(values, dtype=np.float64)
    with warnings.catch_warnings():  # an empty array, inf − inf, two halves overflowing
        warnings.simplefilter("ignore", RuntimeWarning)
        expected = float(np.median(a)) if a.size else float("nan")
        got = median(a)
    assert got == expected or (np.isnan(got) and np.isnan(expected))
