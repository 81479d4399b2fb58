"""Line detectors: one per rule kind, built once from its spec, evaluated on each line.

A detector turns a line's metrics and the scan's baseline into an :class:`Observation`
(raise condition, clear condition, what was seen, against what, where). Counting lines
for persistence and hysteresis is the engine's job, not the detector's. Detectors keep
what they remember in a memory of their own (:class:`DetectorMemory`) that the engine
saves with its state, so it survives restarts. The resonance-jump detector, the largest, is in
:mod:`strayline.rules._jump`.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

from strayline._numbers import HZ_PER_MHZ, MINUS, percent_text, plain_number, signed_text
from strayline.physics import DD_DT_HZ_PER_K
from strayline.rules._jump import resonance_jump_detector
from strayline.rules._observation import (
    BaselineView,
    Detector,
    Observation,
    robust_z,
)
from strayline.rules.metrics import LineMetrics
from strayline.rules.spec import (
    ContrastCollapsedSpec,
    FitFailuresRisingSpec,
    FluorescenceLostSpec,
    RuleSpec,
    ThresholdSpec,
    ZfsDriftSpec,
)

__all__ = ["BaselineView", "Observation", "build_detector"]

#: What a detector without memory computes from one line.
LineDetect = Callable[[LineMetrics, BaselineView, object], Observation | None]


def _fluorescence_lost(spec: FluorescenceLostSpec) -> LineDetect:
    below, clear_above = spec.pl_fraction_below, spec.pl_fraction_clear_above

    def detect(m: LineMetrics, base: BaselineView, _memory: object) -> Observation | None:
        st = base.stats("pl_median_per_s")
        if st is None or not math.isfinite(m.pl_median_per_s) or st[0] <= 0:
            return None
        med, spread = st
        level, rng = m.pl_median_per_s, None
        if m.pl_step < 0 and m.pl_step_range is not None and m.pl_step_level_per_s < level:
            level, rng = m.pl_step_level_per_s, m.pl_step_range
        ratio = level / med
        return Observation(
            raise_cond=ratio < below,
            clear_cond=m.pl_median_per_s / med > clear_above,
            seen_value=level,
            seen_unit="counts/s",
            baseline_value=med,
            baseline_spread=spread,
            confidence_z=robust_z(level, med, spread, 1e-3 * med),
            pixel_range=rng,
            # the range it fell over is the event's (none: the whole line)
            message=f"PL fell to {percent_text(ratio)} of the running median ({_kcps(med)})",
            clear_message=(
                f"PL is back to {percent_text(m.pl_median_per_s / med)} of the running median"
            ),
            detail={
                "pl_fraction": ratio,
                "raise_below": below,
                "line_pl_fraction": m.pl_median_per_s / med,
                "clear_above": clear_above,
            },
        )

    return detect


@dataclass
class RunMemory:
    """A detector's evidence over the current run of lines that look faulty: the count
    and the sum of their z scores, combined as Σz/√L (Stouffer's z of L independent
    lines; e.g. Whitlock, J. Evol. Biol. 18, 1368 (2005)). One line of a weak scan may
    not be enough to tell; two or three such lines are, each at the same false-alarm
    rate as one line of a strong scan."""

    lines: int = 0
    z_sum: float = 0.0

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> RunMemory:
        return cls(int(data.get("lines", 0)), float(data.get("z_sum", 0.0)))

    def to_json(self) -> dict[str, Any]:
        return {"lines": self.lines, "z_sum": self.z_sum}

    def add(self, z: float) -> float:
        """Count one more line of the run; returns the run's combined z."""
        self.lines += 1
        self.z_sum += z
        return self.z_sum / math.sqrt(self.lines)

    def reset(self) -> None:
        self.lines, self.z_sum = 0, 0.0

    def on_raised(self) -> None:
        self.reset()

    def on_quiet(self) -> None:
        pass  # the detector itself resets the run on a line that does not look faulty

    def detail(self) -> dict[str, Any]:
        return {"run_lines": self.lines}


def _contrast_collapsed(spec: ContrastCollapsedSpec) -> Detector:
    def detect(m: LineMetrics, base: BaselineView, memory: RunMemory) -> Observation | None:
        c_st, pl_st = base.stats("contrast_mean"), base.stats("pl_median_per_s")
        if c_st is None or pl_st is None or c_st[0] <= 0 or pl_st[0] <= 0:
            return None
        if not math.isfinite(m.contrast_mean):
            return None
        c_ratio = m.contrast_mean / c_st[0]
        pl_ratio = m.pl_median_per_s / pl_st[0]
        z_line = robust_z(m.contrast_mean, c_st[0], c_st[1], 1e-3 * c_st[0])
        low = c_ratio < spec.contrast_fraction_below and pl_ratio >= spec.pl_fraction_normal_above
        if low:
            z = memory.add(z_line)
        else:
            memory.reset()
            z = z_line
        return Observation(
            raise_cond=low and z < spec.contrast_z_below,
            clear_cond=c_ratio > spec.contrast_fraction_clear_above,
            seen_value=m.contrast_mean,
            seen_unit="fraction",
            baseline_value=c_st[0],
            baseline_spread=c_st[1],
            confidence_z=z,
            message=(
                f"contrast fell to {percent_text(c_ratio)} of the running median "
                f"({percent_text(c_st[0], digits=1)}); PL at {percent_text(pl_ratio)}"
            ),
            clear_message=f"contrast is back to {percent_text(c_ratio)} of the running median",
            run_lines=memory.lines if low else None,
            detail={
                "contrast_fraction": c_ratio,
                "raise_below": spec.contrast_fraction_below,
                "z": z_line,
                "run_z": z,
                "z_below": spec.contrast_z_below,
                "clear_above": spec.contrast_fraction_clear_above,
                "pl_fraction": pl_ratio,
                "pl_normal_above": spec.pl_fraction_normal_above,
            },
        )

    return Detector(detect, RunMemory.from_json)


def _fit_failures_rising(spec: FitFailuresRisingSpec) -> Detector:
    def detect(m: LineMetrics, base: BaselineView, memory: RunMemory) -> Observation | None:
        st = base.stats("fit_failure_fraction")
        if st is None or not math.isfinite(m.fit_failure_fraction):
            return None
        v, (med, spread) = m.fit_failure_fraction, st
        n = max(m.n_pixels, 2)  # a one-pixel line: p0 = 1/2, not 0 (no division by zero)
        p0 = min(max(med, 1.0 / n), 1.0 - 1.0 / n)
        z_binomial = (v - med) / math.sqrt(p0 * (1.0 - p0) / n)
        high = v >= spec.failure_fraction_above and v - med >= spec.rise_fraction_above
        if high:
            z_run = memory.add(z_binomial)
        else:
            memory.reset()
            z_run = z_binomial
        return Observation(
            raise_cond=high and z_run > spec.binomial_z_above,
            run_lines=memory.lines if high else None,
            clear_cond=v - med < spec.rise_fraction_clear_below,
            seen_value=v,
            seen_unit="fraction",
            baseline_value=med,
            baseline_spread=spread,
            confidence_z=robust_z(v, med, spread, 0.01),
            message=(
                f"{percent_text(v)} of the line's fits failed (running median {percent_text(med)})"
            ),
            clear_message=(
                f"fit failures are back to {percent_text(v)} (running median {percent_text(med)})"
            ),
            detail={
                "failure_fraction": v,
                "raise_above": spec.failure_fraction_above,
                "rise": v - med,
                "rise_above": spec.rise_fraction_above,
                "binomial_z": z_binomial,
                "run_binomial_z": z_run,
                "binomial_z_above": spec.binomial_z_above,
                "clear_rise_below": spec.rise_fraction_clear_below,
            },
        )

    return Detector(detect, RunMemory.from_json)


def _zfs_drift(spec: ZfsDriftSpec) -> LineDetect:
    metric = "center_mean_p10_hz"
    factor = spec.anchor_spread_factor

    def detect(m: LineMetrics, base: BaselineView, _memory: object) -> Observation | None:
        anchor = base.anchor_stats(metric)
        v = m.center_mean_p10_hz
        if anchor is None or not math.isfinite(v):
            return None
        ref, anchor_spread = anchor
        delta = v - ref
        kelvin = delta / DD_DT_HZ_PER_K
        # What the sample itself does to the statistic (scaled) sets a floor under both
        # thresholds, keeping their ratio.
        raise_hz = max(spec.drift_hz_above, factor * anchor_spread)
        clear_hz = raise_hz * spec.drift_hz_clear_below / spec.drift_hz_above
        return Observation(
            raise_cond=abs(delta) > raise_hz,
            clear_cond=abs(delta) < clear_hz,
            seen_value=delta,
            seen_unit="Hz",
            baseline_value=ref,
            baseline_spread=anchor_spread,
            confidence_z=robust_z(v, ref, anchor_spread, 1e3),
            message=(
                f"resonance mean {signed_text(delta / HZ_PER_MHZ, 2)} MHz since the first "
                f"lines (≈ {signed_text(kelvin, 1 if abs(kelvin) < 10 else 0)} K if thermal)"
            ),
            clear_message=(
                f"resonance mean is back within {abs(delta) / HZ_PER_MHZ:.2f} MHz of the "
                "first lines"
            ),
            detail={"drift_hz": delta, "raise_above_hz": raise_hz, "clear_below_hz": clear_hz},
        )

    return detect


def _threshold(spec: ThresholdSpec) -> LineDetect:
    above = spec.above
    below = spec.below
    clear_above = spec.clear_above if spec.clear_above is not None else above
    clear_below = spec.clear_below if spec.clear_below is not None else below
    ref = spec.reference
    unit = spec.unit if ref in ("absolute", "baseline_delta") else ref.removeprefix("baseline_")

    def detect(m: LineMetrics, base: BaselineView, _memory: object) -> Observation | None:
        try:
            v = m.value(spec.metric)
        except KeyError:
            return None
        if not math.isfinite(v):
            return None
        st = base.stats(spec.metric)
        med: float | None = None
        spread: float | None = None
        z: float | None = None
        x = v
        if st is not None:
            med, spread = st
            z = robust_z(v, med, spread, 1e-12 * abs(med))
        if ref != "absolute":
            if med is None or z is None:
                return None
            if ref == "baseline_ratio":
                if med == 0:
                    return None
                x = v / med
            elif ref == "baseline_delta":
                x = v - med
            else:
                x = z
        hi = above is not None and x > above
        lo = below is not None and x < below
        ok_hi = clear_above is None or x < clear_above
        ok_lo = clear_below is None or x > clear_below
        limit = f" (above {_number(above)})" if hi and above is not None else ""
        if lo and below is not None:
            limit = f" (below {_number(below)})"
        seen = _threshold_text(spec, x, v, med)
        return Observation(
            raise_cond=hi or lo,
            clear_cond=ok_hi and ok_lo,
            seen_value=x,
            seen_unit=unit,
            baseline_value=med,
            baseline_spread=spread,
            confidence_z=z,
            message=seen + ("" if ref == "baseline_z" else limit),
            clear_message=seen,  # "cleared" says it is back within limits
            detail={"value": x, "above": above, "below": below},
        )

    return detect


_BUILDERS: dict[str, Callable[[Any], Detector]] = {
    "fluorescence_lost": lambda spec: Detector(_fluorescence_lost(spec)),
    "contrast_collapsed": _contrast_collapsed,
    "fit_failures_rising": _fit_failures_rising,
    "zfs_drift": lambda spec: Detector(_zfs_drift(spec)),
    "threshold": lambda spec: Detector(_threshold(spec)),
    "resonance_jump": resonance_jump_detector,
}


def build_detector(spec: RuleSpec) -> Detector | None:
    """The line detector for ``spec`` (None for tick-only kinds such as stalls)."""
    builder = _BUILDERS.get(spec.kind)
    return None if builder is None else builder(spec)


def _kcps(rate_per_s: float) -> str:
    """A PL rate for people: ``201 kcounts/s``."""
    return f"{plain_number(rate_per_s / 1e3)} kcounts/s"


def _number(x: float, *, signed: bool = False) -> str:
    """A threshold rule's number: three figures, a typeset minus, never "-0"."""
    x = x + 0.0  # -0.0 → 0.0
    return (f"{x:+.3g}" if signed else f"{x:.3g}").replace("-", MINUS)


def _threshold_text(spec: ThresholdSpec, x: float, v: float, med: float | None) -> str:
    """What a threshold rule saw, in the one unit of its reference: ``… = 12.3 nm``,
    ``… = 0.42 × median``, ``… = median +3.1 nm``, or (``baseline_z``, whose z is the
    event's confidence) ``… = 35.1 nm, median 12.3``."""
    unit = f" {spec.unit}" if spec.unit else ""

    def amount(value: float, *, signed: bool = False) -> str:
        if spec.unit == "fraction":
            return percent_text(value, signed=signed)
        return f"{_number(value, signed=signed)}{unit}"

    ref = spec.reference
    if ref == "baseline_ratio":
        return f"{spec.metric} = {_number(x)} × median"
    if ref == "baseline_delta":
        return f"{spec.metric} = median {amount(x, signed=True)}"
    if ref == "baseline_z" and med is not None:
        return f"{spec.metric} = {amount(v)}, median {_number(med)}"
    return f"{spec.metric} = {amount(x)}"
