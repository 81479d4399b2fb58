"""The resonance-jump detector: steps of PL, common mode or field roughness against the
previous line, confirmed, and told apart as a tip crash, a contact, a touched sample or
a stand-off change (see :class:`strayline.rules.spec.ResonanceJumpSpec`).

The detector's memory (:class:`JumpMemory`: the pending step, the raised one, the last
lines' steps) is saved with the engine's state, so it survives restarts.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

from strayline._numbers import HZ_PER_MHZ, percent_text, signed_text
from strayline.rules._observation import (
    BaselineView,
    Detector,
    Observation,
    robust_z,
)
from strayline.rules.metrics import LineMetrics
from strayline.rules.spec import ResonanceJumpSpec, Severity

__all__ = ["JumpMemory", "resonance_jump_detector"]


_CHANNELS = (
    # (metric prefix, unit, what it is)
    ("pl", "fraction", "PL"),
    ("center_mean", "Hz", "mean of the two resonances"),
    ("field", "ln ratio", "field roughness"),
)
_UNITS = {c: u for c, u, _ in _CHANNELS}


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


@dataclass
class JumpMemory:
    """What the resonance-jump detector remembers of a scan.

    Attributes
    ----------
    recent : list of dict
        The steps seen on the lines before the last one (both directions, oldest first).
    last : dict or None
        The last line's steps (``line``, ``direction``, ``seen``).
    pending : dict or None
        A flagged step waiting for the next line to confirm it.
    raised : dict or None
        The step the engine raised the rule on, until the rule clears.
    """

    recent: list[dict[str, Any]] = field(default_factory=list)
    last: dict[str, Any] | None = None
    pending: dict[str, Any] | None = None
    raised: dict[str, Any] | None = None

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> JumpMemory:
        """The memory saved by :meth:`to_json` (``{}``: a fresh one)."""
        last = data.get("last")
        return cls(
            recent=list(data.get("recent", ())),
            last=dict(last) if isinstance(last, Mapping) else None,
            pending=data.get("pending"),
            raised=data.get("raised"),
        )

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {}
        if self.last is not None:
            out["recent"], out["last"] = self.recent, self.last
        if self.pending is not None:
            out["pending"] = self.pending
        if self.raised is not None:
            out["raised"] = self.raised
        return out

    def on_raised(self) -> None:
        """The rule was raised on the pending step: it becomes the raised one."""
        if self.pending is not None:
            self.raised, self.pending = self.pending, None

    def on_quiet(self) -> None:
        """A line without the raise condition: a pending step is dropped."""
        self.pending = None

    def detail(self) -> dict[str, Any]:
        """The last line's step per channel (value, robust z, the score of the common
        mode, and what each needed), and the line of a pending or raised step."""
        out: dict[str, Any] = {}
        seen = (self.last or {}).get("seen", {})
        for ch, unit, what in _CHANNELS:
            e = seen.get(ch)
            if e is None:
                continue
            row = {"step": e["value"], "unit": unit, "z": e["z"]}
            if "threshold" in e:
                row["step_needed"] = e["threshold"]
            if "score" in e:
                row["score"] = e["score"]
                row["steady"] = e["steady"]
            for key in ("score_needed", "z_needed", "credible"):
                if key in e:
                    row[key] = e[key]
            row["pixels"] = f"{e['range'][0]}–{e['range'][1] - 1}"
            out[what] = row
        if self.pending is not None:
            out["pending_step_line"] = self.pending.get("line")
        if self.raised is not None:
            out["raised_step_line"] = self.raised.get("line")
        return out


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
        z = robust_z(v, st[0], st[1], 0.1 * thr)
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
            "threshold": thr,
        }
        if score is not None:
            entry["score"], entry["steady"] = score, steady
            entry["score_needed"] = spec.center_mean_step_t_above
        else:
            entry["z_needed"] = spec.z_above
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
    line departed and returned, as a touched sample does. A common-mode excursion must
    also pass as a pair (:func:`_combined`). Returns the pending record of that previous
    line (already reverted), or None.
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
    pending["basis"] = _basis(spec, pending, m.line_index)
    pending["severity"] = _severity(spec, pending, m.line_index)
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


def _step_text(channel: str, value: float) -> str:
    """One channel's step in words, in one unit: ``PL −30 %``, ``resonance mean +4.25 MHz``,
    ``field roughness +35 %``."""
    if channel == "pl":
        return f"PL {percent_text(value, signed=True)}"
    if channel == "center_mean":
        return f"resonance mean {signed_text(value / HZ_PER_MHZ, 2)} MHz"
    return f"field roughness {percent_text(math.expm1(value), signed=True)}"


def _lines_text(first: int, last: int) -> str:
    return f"line {first}" if last <= first else f"lines {first}–{last}"


def _basis(spec: ResonanceJumpSpec, pending: Mapping[str, Any], reverted_at: int | None) -> str:
    """The channel a verdict rests on, whose step the event reports (its value, z and
    pixels): PL for a tip crash, the common mode for a contact, the roughness for a
    stand-off change, the largest step for a touch."""
    chans = pending["channels"]
    if pending.get("departed_at") is not None or reverted_at is not None:
        return str(pending["primary"])
    pl = chans.get("pl")
    if pl is not None and pl["value"] <= -spec.pl_drop_fraction_for_crash:
        return "pl"
    if "center_mean" in chans:
        return "center_mean"
    return "field" if "field" in chans else str(pending["primary"])


def _jump_verdict(
    spec: ResonanceJumpSpec, pending: Mapping[str, Any], reverted_at: int | None
) -> str:
    """What a step is taken for and the step that says so (:func:`_basis`), in one unit:
    ``tip crash suspected: PL −30 % since line 26``; a touch gives the lines that were off
    their level and by how much: ``sample touched: PL −30 % on line 26 only``."""
    line = pending["line"]
    basis = _basis(spec, pending, reverted_at)
    value = float(pending["channels"][basis]["value"])
    departed = pending.get("departed_at")
    if departed is not None:  # ``line`` stepped back to where line ``departed`` left
        off, lines = _step_text(basis, -value), _lines_text(departed, line - 1)
        return f"sample touched: {off} on {lines} only"
    if reverted_at is not None:
        off, lines = _step_text(basis, value), _lines_text(line, reverted_at - 1)
        return f"sample touched: {off} on {lines} only"
    pl = pending["channels"].get("pl")
    if pl is not None and pl["value"] <= -spec.pl_drop_fraction_for_crash:
        what = "tip crash"
    else:
        what = "contact" if basis == "center_mean" else "stand-off change"
    return f"{what} suspected: {_step_text(basis, value)} since line {line}"


def _severity(
    spec: ResonanceJumpSpec, pending: Mapping[str, Any], reverted_at: int | None
) -> Severity:
    """The severity of a raise on ``pending``: ``reverted_severity`` when it had already
    reverted, ``roughness_only_severity`` when only the field roughness stepped (no PL
    drop, no common-mode shift: the sample's own texture does that too), else the rule's."""
    if reverted_at is not None:
        return spec.reverted_severity
    if set(pending["channels"]) == {"field"}:
        return spec.roughness_only_severity
    return spec.severity


def _new_pending(
    spec: ResonanceJumpSpec,
    m: LineMetrics,
    flagged: dict[str, Any],
    memory: JumpMemory,
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
    pending["basis"] = _basis(spec, pending, None)
    memory.pending = pending
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
    for line, seen in _recent_steps(recent, pending["direction"], pending["line"]):
        for ch in _TRANSIENT_CHANNELS:
            now, then = pending["channels"].get(ch), seen.get(ch)
            if now is None or then is None:
                continue
            if _opposes(now, then, spec.hold_fraction, 0.0):
                found = line
    return found


def _recent_steps(
    recent: list[Any], direction: str, line: int
) -> list[tuple[int, Mapping[str, Any]]]:
    """(line, steps seen) of the remembered lines of ``direction`` within the
    ``_RECENT_LINES`` before ``line``, oldest first."""
    return [
        (int(past["line"]), past["seen"])
        for past in recent
        if isinstance(past, Mapping)
        and past.get("direction") == direction
        and 0 < line - int(past["line"]) <= _RECENT_LINES
    ]


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
    thr, h = spec.center_mean_step_hz_above, spec.hold_fraction
    best: tuple[float, int] | None = None
    for line, past in _recent_steps(recent, m.direction, m.line_index):
        then = past.get("center_mean")
        if then is None or not (then.get("credible", True) and then.get("steady", True)):
            continue
        if not (_opposes(now, then, h, thr) and _opposes(then, now, h, thr)):
            continue
        combined = _combined(spec, now, then)
        if combined >= spec.center_mean_pair_t_above and (best is None or combined > best[0]):
            best = (combined, line)
    if best is None:
        return None
    pending: dict[str, Any] = {
        "line": m.line_index,
        "direction": m.direction,
        "channels": {"center_mean": now},
        "primary": "center_mean",
        "departed_at": best[1],
        "reverted_at": m.line_index,
        "confirmed": True,
    }
    pending["verdict"] = _jump_verdict(spec, pending, m.line_index)
    pending["basis"] = _basis(spec, pending, m.line_index)
    pending["severity"] = _severity(spec, pending, m.line_index)
    return pending


def _confirm(
    spec: ResonanceJumpSpec,
    pending: dict[str, Any],
    m: LineMetrics,
    flagged: dict[str, Any],
    memory: JumpMemory,
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
        memory.pending = None
        if flagged:
            return _new_pending(spec, m, flagged, memory, fresh=True)
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
    departed = _departure(spec, pending, memory.recent) if hold == "held" else None
    if departed is not None:  # the end of an excursion: back where it was
        pending["departed_at"] = departed
        reverted_at = pending["line"]
    pending["verdict"] = _jump_verdict(spec, pending, reverted_at)
    pending["basis"] = _basis(spec, pending, reverted_at)
    pending["severity"] = _severity(spec, pending, reverted_at)
    pending["reverted_at"] = reverted_at
    return _jump_obs(
        pending, m, raise_cond=True, clear_cond=False, clear_now=False, text=pending["verdict"]
    )


def _after_raise(
    raised: Mapping[str, Any], m: LineMetrics, flagged: Mapping[str, Any], clear_when_quiet: bool
) -> Observation:
    """A line after the raise: cleared at once when the step reverts, or when it had
    reverted already and nothing new steps; otherwise kept (cleared after quiet lines
    only with ``clear_when_quiet``)."""
    clear = now = True
    if _reverts(raised, m):
        msg = f"the step from line {raised['line']} reverted at line {m.line_index} (a touch)"
    elif raised.get("reverted_at") is not None and not flagged:
        msg = f"no new step since line {raised['reverted_at']}"
    else:
        msg = f"the shift from line {raised['line']} persists, no new step"
        clear, now = not flagged and clear_when_quiet, False
    return _jump_obs(
        raised, m, raise_cond=False, clear_cond=clear, clear_now=now, text=msg, clear_message=msg
    )


def resonance_jump_detector(spec: ResonanceJumpSpec) -> Detector:
    """The line detector of a resonance-jump rule, with its :class:`JumpMemory`."""
    clear_when_quiet = spec.clear_when_quiet

    def detect(m: LineMetrics, base: BaselineView, memory: JumpMemory) -> Observation | None:
        flagged, undoing, seen = _steps(spec, m, base)
        last = memory.last
        recent = [*memory.recent, last] if last is not None else []
        memory.recent = recent[-2 * _RECENT_LINES :]  # both directions
        memory.last = {"line": m.line_index, "direction": m.direction, "seen": seen}
        pending = memory.pending
        raised = memory.raised
        if raised is not None:  # the engine has raised: look for recovery or more steps
            return _after_raise(raised, m, flagged, clear_when_quiet)
        # The previous line departed and this one returned (an excursion), or a weak
        # departure of the last lines and a weak return here together pass (a pair).
        touch = _excursion(spec, m, undoing, last)
        if touch is None and pending is None:
            touch = _touch_pair(spec, m, seen, recent)
        if touch is not None:
            memory.pending = touch
            obs = _jump_obs(
                touch, m, raise_cond=True, clear_cond=False, clear_now=False, text=touch["verdict"]
            )
            return replace(obs, run_lines=2)
        if pending is not None:
            return _confirm(spec, pending, m, flagged, memory)
        return _new_pending(spec, m, flagged, memory, fresh=False) if flagged else None

    return Detector(detect, JumpMemory.from_json)


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
    # the channel the verdict names (a state saved before it was kept: the largest step)
    basis = event.get("basis") or event["primary"]
    prim = event["channels"][basis]
    unit = _UNITS[basis]
    rng = (int(prim["range"][0]), int(prim["range"][1]))
    return Observation(
        raise_cond=raise_cond,
        clear_cond=clear_cond,
        clear_now=clear_now,
        severity=event.get("severity"),
        seen_value=float(prim["value"]),
        seen_unit=unit,
        baseline_value=float(prim["median"]),
        baseline_spread=float(prim["spread"]),
        confidence_z=float(prim["z"]),
        pixel_range=rng,
        message=text,
        clear_message=clear_message,
    )
