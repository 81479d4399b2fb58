"""Line detectors: one per rule kind, built once from its spec, evaluated on each line.

A detector turns a line's metrics and the scan's baseline into an :class:`Observation`
(raise condition, clear condition, what was seen, against what, where). Counting lines
for persistence and hysteresis is the engine's job, not the detector's. Detectors keep
any memory they need in the plain ``memo`` dict the engine stores (JSON-serialisable, so
it survives restarts).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from typing import Any, Protocol

from strayline._rules_spec import (
    ContrastCollapsedSpec,
    FitFailuresRisingSpec,
    FluorescenceLostSpec,
    ResonanceJumpSpec,
    RuleSpec,
    ThresholdSpec,
    ZfsDriftSpec,
)
from strayline.metrics import LineMetrics

__all__ = ["DZFS_DT_HZ_PER_K", "BaselineView", "Observation", "build_detector"]

#: dD/dT near room temperature, Hz/K: Acosta et al., PRL 104, 070801 (2010).
DZFS_DT_HZ_PER_K = -74.2e3


class BaselineView(Protocol):
    """What a detector may ask of the baseline."""

    def stats(self, name: str) -> tuple[float, float] | None: ...

    def anchor(self, name: str) -> float | None: ...

    def anchor_stats(self, name: str) -> tuple[float, float] | None: ...


@dataclass(frozen=True)
class Observation:
    """One detector's reading of one line.

    ``confidence_z`` is a robust z-score: (value − baseline median) / baseline spread.
    ``run_lines``: when set, the number of lines in a row (this one included) the raise
    condition is known to have held, replacing the engine's count: 1 when the lines
    counted so far were about something that did not hold, 2 when this line confirms
    what the previous one showed.
    """

    raise_cond: bool
    clear_cond: bool
    seen_value: float
    seen_unit: str
    message: str
    clear_now: bool = False
    baseline_value: float | None = None
    baseline_spread: float | None = None
    confidence_z: float | None = None
    pixel_range: tuple[int, int] | None = None
    clear_message: str = ""
    run_lines: int | None = None


Detector = Callable[[LineMetrics, BaselineView, dict[str, Any]], Observation | None]


def _z(value: float, median: float, spread: float, floor: float) -> float:
    return (value - median) / max(spread, floor, 1e-300)


def _where(first_pixel: int, rng: tuple[int, int] | None, n_pixels: int) -> str:
    if rng is None or rng[1] - rng[0] >= n_pixels:
        return "over the whole line"
    return f"from pixel {first_pixel} on (pixels {rng[0]}–{rng[1] - 1})"


def _fluorescence_lost(spec: FluorescenceLostSpec) -> Detector:
    below, clear_above = spec.pl_fraction_below, spec.pl_fraction_clear_above

    def detect(m: LineMetrics, base: BaselineView, memo: dict[str, Any]) -> Observation | None:
        st = base.stats("pl_median_per_s")
        if st is None or not math.isfinite(m.pl_median_per_s) or st[0] <= 0:
            return None
        med, spread = st
        level, rng, first = m.pl_median_per_s, None, -1
        if m.pl_step < 0 and m.pl_step_range is not None and m.pl_step_level_per_s < level:
            level, rng, first = m.pl_step_level_per_s, m.pl_step_range, m.pl_step_first_pixel
        ratio = level / med
        return Observation(
            raise_cond=ratio < below,
            clear_cond=m.pl_median_per_s / med > clear_above,
            seen_value=level,
            seen_unit="counts/s",
            baseline_value=med,
            baseline_spread=spread,
            confidence_z=_z(level, med, spread, 1e-3 * med),
            pixel_range=rng,
            message=(
                f"PL fell to {ratio:.0%} of the running median ({med:.3g} counts/s) "
                f"{_where(first, rng, m.n_pixels)}"
            ),
            clear_message=(
                f"PL is back to {m.pl_median_per_s / med:.0%} of the running median "
                f"({med:.3g} counts/s)"
            ),
        )

    return detect


def _contrast_collapsed(spec: ContrastCollapsedSpec) -> Detector:
    def detect(m: LineMetrics, base: BaselineView, memo: dict[str, Any]) -> Observation | None:
        c_st, pl_st = base.stats("contrast_median"), base.stats("pl_median_per_s")
        if c_st is None or pl_st is None or c_st[0] <= 0 or pl_st[0] <= 0:
            return None
        if not math.isfinite(m.contrast_median):
            return None
        c_ratio = m.contrast_median / c_st[0]
        pl_ratio = m.pl_median_per_s / pl_st[0]
        return Observation(
            raise_cond=c_ratio < spec.contrast_fraction_below
            and pl_ratio >= spec.pl_fraction_normal_above,
            clear_cond=c_ratio > spec.contrast_fraction_clear_above,
            seen_value=m.contrast_median,
            seen_unit="fraction",
            baseline_value=c_st[0],
            baseline_spread=c_st[1],
            confidence_z=_z(m.contrast_median, c_st[0], c_st[1], 1e-3 * c_st[0]),
            message=(
                f"ODMR contrast fell to {c_ratio:.0%} of the running median "
                f"({c_st[0]:.1%}) while PL stayed at {pl_ratio:.0%}"
            ),
            clear_message=f"ODMR contrast is back to {c_ratio:.0%} of the running median",
        )

    return detect


def _fit_failures_rising(spec: FitFailuresRisingSpec) -> Detector:
    def detect(m: LineMetrics, base: BaselineView, memo: dict[str, Any]) -> Observation | None:
        st = base.stats("fit_failure_fraction")
        if st is None or not math.isfinite(m.fit_failure_fraction):
            return None
        v, (med, spread) = m.fit_failure_fraction, st
        return Observation(
            raise_cond=v >= spec.failure_fraction_above and v - med >= spec.rise_fraction_above,
            clear_cond=v - med < spec.rise_fraction_clear_below,
            seen_value=v,
            seen_unit="fraction",
            baseline_value=med,
            baseline_spread=spread,
            confidence_z=_z(v, med, spread, 0.01),
            message=f"{v:.0%} of the line's fits failed (running median {med:.0%})",
            clear_message=f"fit failures are back to {v:.0%} (running median {med:.0%})",
        )

    return detect


def _zfs_drift(spec: ZfsDriftSpec) -> Detector:
    metric = "center_mean_p10_hz"
    factor = spec.anchor_spread_factor

    def detect(m: LineMetrics, base: BaselineView, memo: dict[str, Any]) -> Observation | None:
        anchor = base.anchor_stats(metric)
        v = m.center_mean_p10_hz
        if anchor is None or not math.isfinite(v):
            return None
        ref, anchor_spread = anchor
        delta = v - ref
        kelvin = delta / DZFS_DT_HZ_PER_K
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
            confidence_z=_z(v, ref, anchor_spread, 1e3),
            message=(
                f"the mean of the two resonances (10th percentile over the line) moved by "
                f"{delta / 1e6:+.2f} MHz since the scan's first lines (≈ {kelvin:+.1f} K if "
                "it is temperature, at −74.2 kHz/K; strain and the transverse field move it "
                "too)"
            ),
            clear_message=(
                f"the mean of the two resonances (10th percentile over the line) is back "
                f"within {abs(delta) / 1e6:.2f} MHz of the scan's first lines"
            ),
        )

    return detect


def _threshold(spec: ThresholdSpec) -> Detector:
    above = spec.above
    below = spec.below
    clear_above = spec.clear_above if spec.clear_above is not None else above
    clear_below = spec.clear_below if spec.clear_below is not None else below
    ref = spec.reference
    unit = spec.unit if ref in ("absolute", "baseline_delta") else ref.removeprefix("baseline_")

    def detect(m: LineMetrics, base: BaselineView, memo: dict[str, Any]) -> Observation | None:
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
            z = _z(v, med, spread, 1e-12 * abs(med))
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
        return Observation(
            raise_cond=hi or lo,
            clear_cond=ok_hi and ok_lo,
            seen_value=x,
            seen_unit=unit,
            baseline_value=med,
            baseline_spread=spread,
            confidence_z=z,
            message=f"{spec.metric} = {x:.4g} {unit}".rstrip()
            + (f" (above {above:g})" if hi else f" (below {below:g})" if lo else ""),
            clear_message=f"{spec.metric} = {x:.4g} {unit} is back within limits".replace(
                "  ", " "
            ),
        )

    return detect


_CHANNELS = (
    # (metric prefix, unit, what it is)
    ("pl", "fraction", "PL"),
    ("center_mean", "Hz", "mean of the two resonances"),
    ("field", "ln ratio", "field roughness"),
)


_THRESHOLD_FIELD = {
    "pl": "pl_step_fraction_above",
    "center_mean": "center_mean_step_hz_above",
    "field": "field_step_log_ratio_above",
}
# Channels a touched sample steps and then reverts: contact strain shifts D (common mode)
# and may dim the PL; a stand-off that springs back within one line is not modelled.
_TRANSIENT_CHANNELS = ("pl", "center_mean")
# Lines of the same direction looked back on for where a returning step departed.
_RECENT_LINES = 4


def _steps(
    spec: ResonanceJumpSpec, m: LineMetrics, base: BaselineView
) -> tuple[dict[str, Any], dict[str, Any], dict[str, Any]]:
    """(flagged, undoing, seen): channels that step and are credible; channels that step
    but only undo the previous line (about 0 against the reference of the last lines);
    every channel with a step value (for the next line's look back)."""
    flagged: dict[str, Any] = {}
    undoing: dict[str, Any] = {}
    seen: dict[str, Any] = {}
    for ch, _unit, _what in _CHANNELS:
        v = float(getattr(m, f"{ch}_step"))
        rng = getattr(m, f"{ch}_step_range")
        st = base.stats(f"{ch}_step")
        if not math.isfinite(v) or rng is None or st is None:
            continue
        thr = float(getattr(spec, _THRESHOLD_FIELD[ch]))
        z = _z(v, st[0], st[1], 0.1 * thr)
        score = steady = None
        if ch == "center_mean":
            score = float(m.center_mean_step_score)
            before = float(m.center_mean_step_before)
            steady = not _already_moving(before, v, spec.center_mean_before_fraction_below)
            steps = abs(v) >= thr and score >= spec.center_mean_step_t_above and steady
        else:
            steps = abs(v) >= thr and abs(z) >= spec.z_above
        entry = {
            "value": v,
            "range": [int(rng[0]), int(rng[1])],
            "first": int(getattr(m, f"{ch}_step_first_pixel")),
            "z": z,
            "ratio": abs(v) / thr,
            "median": st[0],
            "spread": st[1],
        }
        if score is not None:
            entry["score"], entry["steady"] = score, steady
        # Against the reference of the last few lines the range must show the step too
        # (same sign, comparable size), or the "step" only undoes an odd previous line.
        ref = float(getattr(m, f"{ch}_step_ref"))
        credible = _agrees(ref, v, spec.hold_fraction)
        entry["credible"] = credible
        seen[ch] = entry
        if steps and credible:
            flagged[ch] = entry
        elif steps:
            undoing[ch] = entry
    return flagged, undoing, seen


def _agrees(ref: float, step: float, fraction: float) -> bool:
    """Whether a step's value against the reference of the last lines (``ref``) shows
    the step too: same sign and at least ``fraction`` of it (True without a reference)."""
    return not math.isfinite(ref) or (ref * step > 0 and abs(ref) >= fraction * abs(step))


def _already_moving(before: float, step: float, fraction: float) -> bool:
    """Whether the common mode was already moving the step's way on the line before it.

    ``before`` is the previous line over the step's pixels against the lines before it
    (``center_mean_step_before``): of the step's sign and past ``fraction`` of it, a
    feature was coming into view there. Of the other sign the step returns from an
    excursion of the previous line, which the excursion check judges.
    """
    return math.isfinite(before) and before * step > 0 and abs(before) > fraction * abs(step)


def _excursion(
    spec: ResonanceJumpSpec, m: LineMetrics, undoing: Mapping[str, Any], last: Any
) -> dict[str, Any] | None:
    """A one-line excursion of the previous line, seen from its way back.

    The current line steps (past the thresholds) back to the reference of the last lines
    over pixels where the previous line of the same direction stepped the other way, by
    at least ``hold_fraction`` of this step and past the size threshold: the previous
    line departed and returned, as a touched sample does. Returns the pending record of
    that previous line (already reverted), or None.
    """
    if not undoing or not isinstance(last, Mapping):
        return None
    if last.get("direction") != m.direction or last.get("line") != m.line_index - 1:
        return None
    out: dict[str, Any] = {}
    for ch in _TRANSIENT_CHANNELS:
        now, before = undoing.get(ch), last["seen"].get(ch)
        if now is None or before is None:
            continue
        thr = float(getattr(spec, _THRESHOLD_FIELD[ch]))
        # The previous line's departure must have been one against its own reference
        # too: a line that only returned from an odd line before it made no excursion.
        if not (before.get("credible", True) and _opposes(now, before, spec.hold_fraction, thr)):
            continue
        # A common-mode excursion must pass as a pair too: a wall that steps and steps
        # back is as sharp on its way back as a touch.
        if ch == "center_mean" and _combined(spec, now, before) < spec.center_mean_pair_t_above:
            continue
        out[ch] = before
    if not out:
        return None
    primary = max(out, key=lambda c: out[c]["ratio"])
    pending: dict[str, Any] = {
        "line": m.line_index - 1,
        "direction": m.direction,
        "channels": out,
        "primary": primary,
        "reverted_at": m.line_index,
        "confirmed": True,
    }
    pending["verdict"] = _jump_verdict(spec, pending, m.line_index)
    return pending


def _opposes(
    now: Mapping[str, Any], then: Mapping[str, Any], fraction: float, floor: float
) -> bool:
    """Whether step ``then`` went the other way over overlapping pixels, by at least
    ``fraction`` of step ``now`` and at least ``floor``."""
    v, p = float(now["value"]), float(then["value"])
    return (
        v * p < 0
        and abs(p) >= max(fraction * abs(v), floor)
        and _overlap(now["range"], then["range"])
    )


def _overlap(a: list[int], b: list[int]) -> bool:
    return a[0] < b[1] and b[0] < a[1]


def _reverts(pending: Mapping[str, Any], m: LineMetrics) -> set[str]:
    """The channels that stepped before and now step back: opposite sign, at least half
    the size, over the same pixels (the way back needs no threshold of its own: it is
    looked for only where a step was seen)."""
    out = set()
    for ch, old in pending["channels"].items():
        v = float(getattr(m, f"{ch}_step"))
        rng = getattr(m, f"{ch}_step_range")
        if not math.isfinite(v) or rng is None:
            continue
        back = v * old["value"] < 0 and abs(v) >= 0.5 * abs(old["value"])
        if back and _overlap([int(rng[0]), int(rng[1])], old["range"]):
            out.add(ch)
    return out


def _hold(spec: ResonanceJumpSpec, pending: Mapping[str, Any], m: LineMetrics) -> str:
    """How the line after a step relates to it: "held", "reverted", "unconfirmed" or
    "unknown" (no measurement against the reference from before the step).

    Judged per stepped channel on ``{ch}_step_held`` (this line over the step's range
    against the reference from before the step): held when one channel keeps the sign
    and a size within [h, 1/h] of the step; reverted when every measured channel is
    back below (1 − h) of it (h = ``hold_fraction``) and one of them is a channel a
    touch reverts (PL, common mode: a roughness change that comes and goes within a line
    is no touch and is not confirmed). A line of the other direction, or not right after
    the step, has no such measurement ("unknown"; see :func:`_confirm`).
    """
    h = spec.hold_fraction
    same = m.direction == pending.get("direction", m.direction)
    seen: list[str] = []
    for ch, old in pending["channels"].items():
        held = float(getattr(m, f"{ch}_step_held"))
        if not same or m.line_index != pending["line"] + 1 or not math.isfinite(held):
            continue
        v = float(old["value"])
        ratio = held / v if v != 0 else math.nan
        if h <= ratio <= 1.0 / h:
            return "held"
        if abs(ratio) >= 1.0 - h:
            seen.append("unconfirmed")
        elif ch in _TRANSIENT_CHANNELS:
            seen.append("reverted")
        else:
            seen.append("gone")
    if not seen:
        return "unknown"
    if "unconfirmed" in seen or "reverted" not in seen:
        return "unconfirmed"
    return "reverted"


def _jump_verdict(
    spec: ResonanceJumpSpec, pending: Mapping[str, Any], reverted_at: int | None
) -> str:
    chans = pending["channels"]
    line = pending["line"]
    departed = pending.get("departed_at")
    if departed is not None:
        return (
            f"sample touched (transient): left its level at line {departed} (below the "
            f"thresholds there) and came back at line {line}"
        )
    if reverted_at is not None:
        return f"sample touched (transient): the step at line {line} reverted at line {reverted_at}"
    pl = chans.get("pl")
    if pl is not None and pl["value"] <= -spec.pl_drop_fraction_for_crash:
        return f"tip crash suspected: PL fell by {-pl['value']:.0%} with the step"
    if "center_mean" in chans:
        shift = chans["center_mean"]["value"]
        return (
            f"contact suspected: the mean of the two resonances shifted by "
            f"{shift / 1e6:+.2f} MHz (strain or heating)"
        )
    field = chans.get("field", {"value": 0.0})
    change = math.expm1(field["value"])
    return f"stand-off change suspected: field roughness changed by {change:+.0%}"


def _new_pending(
    spec: ResonanceJumpSpec,
    m: LineMetrics,
    flagged: dict[str, Any],
    memo: dict[str, Any],
    *,
    fresh: bool,
) -> Observation:
    primary = max(flagged, key=lambda c: flagged[c]["ratio"])
    pending: dict[str, Any] = {
        "line": m.line_index,
        "direction": m.direction,
        "channels": flagged,
        "primary": primary,
        "reverted_at": None,
    }
    verdict = _jump_verdict(spec, pending, None)
    pending["verdict"] = verdict
    memo["pending"] = pending
    obs = _jump_obs(pending, m, raise_cond=True, clear_cond=False, clear_now=False, text=verdict)
    return replace(obs, run_lines=1) if fresh else obs


def _departure(
    spec: ResonanceJumpSpec, pending: Mapping[str, Any], recent: list[Any]
) -> int | None:
    """The line where the level a held step returns to was left, or None.

    A step that holds may be the *end* of a touch whose start stayed below the
    thresholds: within the last few lines of the same direction before the step, a PL or
    common-mode change of the other sign over overlapping pixels, at least
    ``hold_fraction`` of the step. The latest such line is returned.
    """
    found = None
    for past in recent:
        if not isinstance(past, Mapping) or past.get("direction") != pending["direction"]:
            continue
        if not 0 < pending["line"] - int(past["line"]) <= _RECENT_LINES:
            continue
        for ch in _TRANSIENT_CHANNELS:
            now, then = pending["channels"].get(ch), past["seen"].get(ch)
            if now is None or then is None:
                continue
            if _opposes(now, then, spec.hold_fraction, 0.0):
                found = int(past["line"])
    return found


def _combined(spec: ResonanceJumpSpec, now: Mapping[str, Any], then: Mapping[str, Any]) -> float:
    """(t₁ + t₂)/√2 of two common-mode steps' search statistics, 0 if either is under
    half of ``center_mean_step_t_above`` (see :func:`_touch_pair`)."""
    s_now, s_then = float(now.get("score", 0.0)), float(then.get("score", 0.0))
    if min(s_now, s_then) < 0.5 * spec.center_mean_step_t_above:
        return 0.0
    return (s_now + s_then) / math.sqrt(2.0)


def _touch_pair(
    spec: ResonanceJumpSpec, m: LineMetrics, seen: Mapping[str, Any], recent: list[Any]
) -> dict[str, Any] | None:
    """A common-mode departure and its return, each too weak alone, that together are a
    touch: the pending record of the return (already reverted), or None.

    The current line's common-mode step goes back over pixels where one of the last few
    lines of the same direction stepped the other way (each by at least ``hold_fraction``
    of the other and past the size threshold); that departure was credible against its
    own reference and steady before it; each search statistic is at least half of
    ``center_mean_step_t_above``, and their sum over √2 (Stouffer's combination of two
    z scores, e.g. Whitlock, J. Evol. Biol. 18, 1368 (2005)) at least
    ``center_mean_pair_t_above``. The lines of a scan see different noise, so the two
    statistics are close to independent; taking the best segment of each line makes the
    combination a ranking rather than a calibrated z, which is why the threshold is a
    setting measured on clean scans (benchmarks/alert_eval.py).
    """
    now = seen.get("center_mean")
    if now is None:
        return None
    thr = spec.center_mean_step_hz_above
    best: tuple[float, Mapping[str, Any], int] | None = None
    for past in recent:
        if not isinstance(past, Mapping) or past.get("direction") != m.direction:
            continue
        if not 0 < m.line_index - int(past["line"]) <= _RECENT_LINES:
            continue
        then = past["seen"].get("center_mean")
        if then is None or not (then.get("credible", True) and then.get("steady", True)):
            continue
        h = spec.hold_fraction
        if not (_opposes(now, then, h, thr) and _opposes(then, now, h, thr)):
            continue
        combined = _combined(spec, now, then)
        if combined >= spec.center_mean_pair_t_above and (best is None or combined > best[0]):
            best = (combined, then, int(past["line"]))
    if best is None:
        return None
    pending: dict[str, Any] = {
        "line": m.line_index,
        "direction": m.direction,
        "channels": {"center_mean": now},
        "primary": "center_mean",
        "departed_at": best[2],
        "reverted_at": m.line_index,
        "confirmed": True,
    }
    pending["verdict"] = _jump_verdict(spec, pending, m.line_index)
    return pending


def _confirm(
    spec: ResonanceJumpSpec,
    pending: dict[str, Any],
    m: LineMetrics,
    flagged: dict[str, Any],
    memo: dict[str, Any],
) -> Observation:
    """The line after a flagged step: raise on (held or reverted), or drop the step."""
    hold = _hold(spec, pending, m)
    if hold == "unknown":
        # No measurement against the reference from before the step: after a
        # confirmation (persistence_lines > 2), or without a reference (a restart),
        # the step holds unless it reverts; a trace of the other direction confirms it
        # only by stepping the same way itself.
        again = pending.get("confirmed") or (
            m.direction == pending.get("direction", m.direction)
            or any(
                ch in flagged and flagged[ch]["value"] * old["value"] > 0
                for ch, old in pending["channels"].items()
            )
        )
        back = _reverts(pending, m)
        if back.intersection(_TRANSIENT_CHANNELS):
            hold = "reverted"
        else:  # a roughness change that came and went is no touch (see _hold)
            hold = "held" if again and not back else "unconfirmed"
    if hold == "unconfirmed":
        memo.pop("pending", None)
        if flagged:
            return _new_pending(spec, m, flagged, memo, fresh=True)
        return _jump_obs(
            pending,
            m,
            raise_cond=False,
            clear_cond=False,
            clear_now=False,
            text=f"the step at line {pending['line']} did not persist",
        )
    pending["confirmed"] = True
    reverted_at = m.line_index if hold == "reverted" else None
    departed = _departure(spec, pending, memo.get("recent", [])) if hold == "held" else None
    if departed is not None:  # the end of an excursion: back where it was
        pending["departed_at"] = departed
        reverted_at = pending["line"]
    pending["verdict"] = _jump_verdict(spec, pending, reverted_at)
    pending["reverted_at"] = reverted_at
    return _jump_obs(
        pending, m, raise_cond=True, clear_cond=False, clear_now=False, text=pending["verdict"]
    )


def _resonance_jump(spec: ResonanceJumpSpec) -> Detector:
    clear_when_quiet = spec.clear_when_quiet

    def detect(m: LineMetrics, base: BaselineView, memo: dict[str, Any]) -> Observation | None:
        flagged, undoing, seen = _steps(spec, m, base)
        last = memo.get("last")
        recent = [*memo.get("recent", ()), last] if isinstance(last, Mapping) else []
        memo["recent"] = recent[-2 * _RECENT_LINES :]  # both directions
        memo["last"] = {"line": m.line_index, "direction": m.direction, "seen": seen}
        pending = memo.get("pending")
        raised = memo.get("raised")
        if raised is not None:  # the engine has raised: look for recovery or more steps
            if _reverts(raised, m):
                msg = (
                    f"the step from line {raised['line']} reverted at line {m.line_index}: "
                    "transient, consistent with the sample being touched"
                )
                return _jump_obs(
                    raised,
                    m,
                    raise_cond=False,
                    clear_cond=True,
                    clear_now=True,
                    text=msg,
                    clear_message=msg,
                )
            if raised.get("reverted_at") is not None and not flagged:
                msg = f"no new step since line {raised['reverted_at']}"
                return _jump_obs(
                    raised,
                    m,
                    raise_cond=False,
                    clear_cond=True,
                    clear_now=True,
                    text=msg,
                    clear_message=msg,
                )
            quiet = not flagged
            msg = (
                f"no new step for the last lines; the shift from line {raised['line']} "
                "has persisted"
            )
            return _jump_obs(
                raised,
                m,
                raise_cond=False,
                clear_cond=quiet and clear_when_quiet,
                clear_now=False,
                text=msg,
                clear_message=msg,
            )
        # The previous line departed and this one returned (an excursion), or a weak
        # departure of the last lines and a weak return here together pass (a pair).
        touch = _excursion(spec, m, undoing, last)
        if touch is None and pending is None:
            touch = _touch_pair(spec, m, seen, recent)
        if touch is not None:
            memo["pending"] = touch
            obs = _jump_obs(
                touch, m, raise_cond=True, clear_cond=False, clear_now=False, text=touch["verdict"]
            )
            return replace(obs, run_lines=2)
        if pending is not None:
            return _confirm(spec, pending, m, flagged, memo)
        return _new_pending(spec, m, flagged, memo, fresh=False) if flagged else None

    return detect


def _jump_obs(
    event: Mapping[str, Any],
    m: LineMetrics,
    *,
    raise_cond: bool,
    clear_cond: bool,
    clear_now: bool,
    text: str,
    clear_message: str = "",
) -> Observation:
    prim = event["channels"][event["primary"]]
    unit = {c: u for c, u, _ in _CHANNELS}[event["primary"]]
    what = {c: w for c, _, w in _CHANNELS}[event["primary"]]
    rng = (int(prim["range"][0]), int(prim["range"][1]))
    message = (
        f"{text}; {what} stepped by {prim['value']:+.3g} {unit} at line {event['line']} "
        f"{_where(int(prim['first']), rng, m.n_pixels)}"
    )
    return Observation(
        raise_cond=raise_cond,
        clear_cond=clear_cond,
        clear_now=clear_now,
        seen_value=float(prim["value"]),
        seen_unit=unit,
        baseline_value=float(prim["median"]),
        baseline_spread=float(prim["spread"]),
        confidence_z=float(prim["z"]),
        pixel_range=rng,
        message=message,
        clear_message=clear_message,
    )


_BUILDERS: dict[str, Callable[[Any], Detector]] = {
    "fluorescence_lost": _fluorescence_lost,
    "contrast_collapsed": _contrast_collapsed,
    "fit_failures_rising": _fit_failures_rising,
    "zfs_drift": _zfs_drift,
    "threshold": _threshold,
    "resonance_jump": _resonance_jump,
}


def build_detector(spec: RuleSpec) -> Detector | None:
    """The line detector for ``spec`` (None for tick-only kinds such as stalls)."""
    builder = _BUILDERS.get(spec.kind)
    return None if builder is None else builder(spec)
