"""Alert rules: data-driven detectors over line metrics, with persistence and hysteresis.

Rules are data (``config/rules.yaml``, validated by :class:`RulesConfig`). Each line's
:class:`~strayline.rules.metrics.LineMetrics` is judged against a :class:`RollingBaseline` of the
scan's previous *good* lines (a line is good when no rule is active on the scan and none
of the rules' raise conditions held on it). :class:`RuleEngine` counts lines for each
rule: it raises after ``persistence_lines`` lines in a row with the raise condition and
clears after ``clear_lines`` lines in a row with the (separate, hysteretic) clear
condition. A raise and a clear are each one :class:`AlertEvent`; a fault lasting a
hundred lines gives exactly one of each. Stalls are judged on clock ticks
(:meth:`RuleEngine.evaluate_tick`); the clock is injected. The engine's whole state is a
plain JSON-serialisable dict (:meth:`RuleEngine.state_dict`), so a restart mid-alert
neither raises the alert again nor forgets it.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import time
from collections import deque
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from os import PathLike
from pathlib import Path
from typing import Any, Literal

import numpy as np
import structlog
from pydantic import ValidationError

from strayline._atomic import write_text_atomic
from strayline._numbers import duration_text, finite_or_none
from strayline.alerts import AlertEvent
from strayline.errors import StoreError
from strayline.rules._detectors import Observation, build_detector
from strayline.rules._observation import DetectorMemory
from strayline.rules.baseline import RollingBaseline
from strayline.rules.decision import RuleDecision, Verdict
from strayline.rules.metrics import LineMetrics
from strayline.rules.spec import (
    AcquisitionStalledSpec,
    RulesConfig,
    RuleSpec,
)

__all__ = ["RuleEngine"]

_STATE_VERSION = 1
_MAX_SCANS_KEPT = 8


@dataclass
class _RuleState:
    active: bool = False
    true_count: int = 0
    clear_count: int = 0
    raised: dict[str, Any] | None = None
    memory: DetectorMemory | None = None  # the rule's detector's, built at its first line


def _iso(t_s: float) -> str:
    return datetime.fromtimestamp(t_s, UTC).isoformat(timespec="milliseconds")


class _RuleSet:
    """One rule set, ready to run: its enabled specs, line detectors and stall rules."""

    def __init__(self, config: RulesConfig) -> None:
        self.config = config
        self.specs: dict[str, RuleSpec] = {r.name: r for r in config.rules if r.enabled}
        self.detectors = {
            name: det for name, spec in self.specs.items() if (det := build_detector(spec))
        }
        self.stall_specs = [s for s in self.specs.values() if isinstance(s, AcquisitionStalledSpec)]


class _ScanState:
    def __init__(self, rule_set: _RuleSet) -> None:
        self.rule_set = rule_set
        baseline = rule_set.config.baseline
        self.baseline = RollingBaseline(
            baseline.window_lines, baseline.min_lines, baseline.anchor_lines
        )
        self.rules = {name: _RuleState() for name in rule_set.specs}
        self.last_arrival_s: float | None = None
        self.last_line_index: int | None = None
        self.last_direction: str | None = None
        self.last_sha256: str | None = None  # checksum of the last line's file, if known
        self.n_lines_planned: int | None = None
        self.lines_seen = 0
        self.intervals_s: deque[float] = deque(maxlen=20)

    def complete(self) -> bool:
        return (
            self.n_lines_planned is not None
            and self.last_line_index is not None
            and self.last_line_index >= self.n_lines_planned - 1
        )

    def state_dict(self, default: _RuleSet) -> dict[str, Any]:
        own = self.rule_set is not default
        return {
            "baseline": self.baseline.state_dict(),
            "rule_set": self.rule_set.config.model_dump(mode="json") if own else None,
            "rules": {
                name: {
                    "active": st.active,
                    "true_count": st.true_count,
                    "clear_count": st.clear_count,
                    "raised": st.raised,
                    "memo": {} if st.memory is None else st.memory.to_json(),
                }
                for name, st in self.rules.items()
            },
            "last_arrival_s": self.last_arrival_s,
            "last_line_index": self.last_line_index,
            "last_direction": self.last_direction,
            "last_sha256": self.last_sha256,
            "n_lines_planned": self.n_lines_planned,
            "lines_seen": self.lines_seen,
            "intervals_s": list(self.intervals_s),
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any], default: _RuleSet) -> _ScanState:
        own = state.get("rule_set")  # absent in states saved before per-scan rule sets
        rule_set = default
        if own is not None:
            with contextlib.suppress(ValidationError):  # from another version: the default
                rule_set = _RuleSet(RulesConfig.model_validate(own))
        out = cls(rule_set)
        out.baseline = RollingBaseline.from_state(state["baseline"])
        for name, st in state["rules"].items():
            if name in out.rules:  # rules removed from the config are forgotten
                detector = rule_set.detectors.get(name)
                out.rules[name] = _RuleState(
                    active=bool(st["active"]),
                    true_count=int(st["true_count"]),
                    clear_count=int(st["clear_count"]),
                    raised=st["raised"],
                    memory=None if detector is None else detector.memory(st["memo"] or {}),
                )
        out.last_arrival_s = state["last_arrival_s"]
        out.last_line_index = state["last_line_index"]
        out.last_direction = state["last_direction"]
        out.last_sha256 = state.get("last_sha256")  # absent in states of earlier versions
        out.n_lines_planned = state["n_lines_planned"]
        out.lines_seen = int(state["lines_seen"])
        out.intervals_s.extend(float(v) for v in state["intervals_s"])
        return out


class RuleEngine:
    """Evaluates rule sets line by line and on clock ticks; one engine for all scans.

    Each scan is judged by its own rule set (its sample-type profile's, given with
    :meth:`use_rules`; ``rules`` otherwise), which the saved state keeps.

    Parameters
    ----------
    rules : RulesConfig
        The rule set of scans given none of their own (disabled rules are skipped).
    clock : callable returning POSIX seconds
        Time source for event times and stall detection (inject a fake one in tests).
    """

    def __init__(self, rules: RulesConfig, *, clock: Callable[[], float] = time.time) -> None:
        self._default = _RuleSet(rules)
        self._clock = clock
        self._scans: dict[str, _ScanState] = {}
        self._latest: str | None = None
        self._decisions: tuple[RuleDecision, ...] = ()

    @property
    def config(self) -> RulesConfig:
        """The rule set of scans that were given none of their own."""
        return self._default.config

    def last_evaluated(self, scan_id: str) -> tuple[int | None, str | None, str | None]:
        """(line index, direction, file checksum) of the last line of ``scan_id`` this
        engine evaluated, as its saved state remembers (all None for a scan it does not
        know): after a crash between a line's commit and its evaluation, the pipeline
        compares it with the store's latest commit."""
        scan = self._scans.get(scan_id)
        if scan is None:
            return None, None, None
        return scan.last_line_index, scan.last_direction, scan.last_sha256

    def use_rules(self, scan_id: str, rules: RulesConfig) -> None:
        """Judge ``scan_id`` by ``rules`` from now on (its sample-type profile's set).

        The state of rules that keep their name carries over (an active alert stays
        active); rules no longer in the set are forgotten; the baseline is kept.
        """
        scan = self._scan(scan_id, rules)
        if scan.rule_set.config == rules:
            return
        scan.rule_set = self._default if rules == self._default.config else _RuleSet(rules)
        scan.rules = {name: scan.rules.get(name) or _RuleState() for name in scan.rule_set.specs}

    # -- events -------------------------------------------------------------------------

    def _event(
        self,
        scan_id: str,
        spec: RuleSpec,
        state: Literal["raised", "cleared"],
        *,
        obs: Observation | None,
        line_index: int | None,
        direction: str | None,
        now_s: float,
        message: str,
    ) -> AlertEvent:
        return AlertEvent(
            time=_iso(now_s),
            scan_id=scan_id,
            rule=spec.name,
            severity=spec.severity if obs is None or obs.severity is None else obs.severity,
            state=state,
            line_index=line_index,
            direction=direction,
            pixel_range=None if obs is None else obs.pixel_range,
            seen_value=None if obs is None else finite_or_none(obs.seen_value),
            seen_unit="" if obs is None else obs.seen_unit,
            baseline_value=None if obs is None else finite_or_none(obs.baseline_value),
            baseline_spread=None if obs is None else finite_or_none(obs.baseline_spread),
            confidence_z=None if obs is None else finite_or_none(obs.confidence_z),
            message=message,
            advice=spec.advice,
        )

    def _raise(self, st: _RuleState, event: AlertEvent) -> AlertEvent:
        st.active, st.clear_count, st.true_count = True, 0, 0
        st.raised = event.to_dict()
        if st.memory is not None:
            st.memory.on_raised()
        return event

    def _clear(self, st: _RuleState, event: AlertEvent) -> AlertEvent:
        st.active, st.clear_count, st.true_count, st.raised = False, 0, 0, None
        st.memory = None  # the detector starts afresh
        return event

    # -- evaluation ---------------------------------------------------------------------

    def _scan(self, scan_id: str, rules: RulesConfig | None = None) -> _ScanState:
        scan = self._scans.get(scan_id)
        if scan is None:
            if rules is None or rules == self._default.config:
                scan = _ScanState(self._default)
            else:
                scan = _ScanState(_RuleSet(rules))
            self._scans[scan_id] = scan
            while len(self._scans) > _MAX_SCANS_KEPT:
                oldest = next(iter(self._scans))
                if oldest == scan_id:
                    break
                del self._scans[oldest]
        return scan

    def _clear_stalls(
        self, scan_id: str, scan: _ScanState, now_s: float, why: str
    ) -> list[AlertEvent]:
        out = []
        for spec in scan.rule_set.stall_specs:
            st = scan.rules[spec.name]
            if st.active:
                out.append(
                    self._clear(
                        st,
                        self._event(
                            scan_id,
                            spec,
                            "cleared",
                            obs=None,
                            line_index=scan.last_line_index,
                            direction=scan.last_direction,
                            now_s=now_s,
                            message=why,
                        ),
                    )
                )
        return out

    def evaluate_line(
        self, scan_id: str, metrics: LineMetrics, *, source_sha256: str | None = None
    ) -> list[AlertEvent]:
        """Judge one processed line; returns the raise/clear events it causes (often none).

        ``source_sha256``, the checksum of the line's file, is remembered with the line
        (:meth:`last_evaluated`)."""
        now_s = float(self._clock())
        events: list[AlertEvent] = []
        if self._latest is not None and self._latest != scan_id and self._latest in self._scans:
            events += self._clear_stalls(
                self._latest,
                self._scans[self._latest],
                now_s,
                f"a new scan {scan_id!r} started",
            )
        self._latest = scan_id
        scan = self._scan(scan_id)
        if scan.last_arrival_s is not None:
            events += self._clear_stalls(scan_id, scan, now_s, f"line {metrics.line_index} arrived")
        observed: dict[str, Observation] = {}
        for name, detector in scan.rule_set.detectors.items():
            st = scan.rules[name]
            if st.memory is None:
                st.memory = detector.memory({})
            obs = detector.detect(metrics, scan.baseline, st.memory)
            if obs is not None:
                observed[name] = obs
        any_raise_cond = any(obs.raise_cond for obs in observed.values())
        # A rule explained by another (its suppressed_by) is not raised while that one
        # holds: raise condition on this line, or already active. Judged on the states
        # before this line, so the order of the rules does not matter.
        holding = {
            name
            for name, st in scan.rules.items()
            if st.active or (name in observed and observed[name].raise_cond)
        }
        decisions: list[RuleDecision] = []
        for name in scan.rule_set.detectors:
            spec, st = scan.rule_set.specs[name], scan.rules[name]
            seen = observed.get(name)
            explained: tuple[str, ...] = ()
            ev = None
            if seen is not None:
                explained = tuple(sorted(holding.intersection(spec.suppressed_by)))
                obs = replace(seen, raise_cond=False) if explained and not st.active else seen
                ev = self._step(scan_id, spec, st, obs, m=metrics, now_s=now_s)
                if ev is not None:
                    events.append(ev)
            decisions.append(
                self._decision(
                    scan_id,
                    metrics,
                    spec,
                    st,
                    seen=seen,
                    explained=explained,
                    now_s=now_s,
                    event=ev,
                )
            )
        self._decisions = tuple(decisions)
        if not any_raise_cond and not any(st.active for st in scan.rules.values()):
            scan.baseline.add(metrics.numeric())
        dt = metrics.time_since_previous_s
        if math.isfinite(dt) and dt > 0:
            scan.intervals_s.append(dt)
        scan.last_arrival_s = now_s
        scan.last_line_index = metrics.line_index
        scan.last_direction = metrics.direction
        scan.last_sha256 = source_sha256
        scan.n_lines_planned = metrics.n_lines_planned
        scan.lines_seen += 1
        return events

    def last_decisions(self) -> tuple[RuleDecision, ...]:
        """The decision record of every line rule on the last line judged
        (:meth:`evaluate_line`), in the rule set's order."""
        return self._decisions

    def _decision(
        self,
        scan_id: str,
        m: LineMetrics,
        spec: RuleSpec,
        st: _RuleState,
        *,
        seen: Observation | None,
        explained: tuple[str, ...],
        now_s: float,
        event: AlertEvent | None,
    ) -> RuleDecision:
        """One rule's decision on line ``m``, after the engine's step (``st`` updated)."""
        verdict: Verdict
        if event is not None:
            verdict = "raised" if event.state == "raised" else "cleared"
        elif st.active:
            verdict = "clearing" if st.clear_count > 0 else "active"
        elif seen is None:
            verdict = "not_judged"
        elif seen.raise_cond and explained:
            verdict = "explained"
        elif seen.raise_cond:
            verdict = "counting"
        else:
            verdict = "quiet"
        active = st.active or verdict == "cleared"
        detail = {} if st.memory is None else dict(st.memory.detail())
        return RuleDecision(
            time=_iso(now_s),
            scan_id=scan_id,
            line_index=m.line_index,
            direction=m.direction,
            rule=spec.name,
            verdict=verdict,
            raise_cond=bool(seen is not None and seen.raise_cond),
            clear_cond=bool(seen is not None and seen.clear_cond),
            count=st.clear_count if active else st.true_count,
            needed=spec.clear_lines if active else spec.persistence_lines,
            explained_by=explained,
            seen_value=None if seen is None else finite_or_none(seen.seen_value),
            seen_unit="" if seen is None else seen.seen_unit,
            baseline_value=None if seen is None else finite_or_none(seen.baseline_value),
            baseline_spread=None if seen is None else finite_or_none(seen.baseline_spread),
            confidence_z=None if seen is None else finite_or_none(seen.confidence_z),
            pixel_range=None if seen is None else seen.pixel_range,
            message="" if seen is None else seen.message,
            detail={**detail, **(seen.detail if seen is not None else {})},
        )

    def _step(
        self,
        scan_id: str,
        spec: RuleSpec,
        st: _RuleState,
        obs: Observation,
        *,
        m: LineMetrics,
        now_s: float,
    ) -> AlertEvent | None:
        if not st.active:
            run = st.true_count + 1 if obs.run_lines is None else obs.run_lines
            st.true_count = run if obs.raise_cond else 0
            if st.true_count >= spec.persistence_lines:
                ev = self._event(
                    scan_id,
                    spec,
                    "raised",
                    obs=obs,
                    line_index=m.line_index,
                    direction=m.direction,
                    now_s=now_s,
                    message=obs.message,
                )
                return self._raise(st, ev)
            if not obs.raise_cond and st.memory is not None:
                st.memory.on_quiet()
            return None
        if obs.clear_now:
            st.clear_count = spec.clear_lines
        elif obs.clear_cond:
            st.clear_count += 1
        else:
            st.clear_count = 0
        if st.clear_count >= spec.clear_lines:
            text = obs.clear_message or obs.message
            ev = self._event(
                scan_id,
                spec,
                "cleared",
                obs=obs,
                line_index=m.line_index,
                direction=m.direction,
                now_s=now_s,
                message=text,
            )
            return self._clear(st, ev)
        return None

    def evaluate_tick(self, now: float | None = None) -> list[AlertEvent]:
        """Stall check for the most recent scan at time ``now`` (default: the clock)."""
        now_s = float(self._clock() if now is None else now)
        if self._latest is None or self._latest not in self._scans:
            return []
        scan = self._scans[self._latest]
        if scan.last_arrival_s is None or scan.complete():
            return []
        events = []
        waited = now_s - scan.last_arrival_s
        usual = float(np.median(scan.intervals_s)) if scan.intervals_s else None
        for spec in scan.rule_set.stall_specs:
            st = scan.rules[spec.name]
            interval = usual if usual is not None else spec.fallback_interval_s
            if st.active or interval is None:
                continue
            limit = max(spec.interval_factor * interval, spec.min_stall_s)
            if waited > limit:
                obs = Observation(
                    raise_cond=True,
                    clear_cond=False,
                    seen_value=waited,
                    seen_unit="s",
                    baseline_value=interval,
                    message="",
                    confidence_z=None,
                )
                # the event's line is the last one that came
                message = (
                    f"no new line for {duration_text(waited)} (lines usually every "
                    f"{duration_text(interval)})"
                )
                ev = self._event(
                    self._latest,
                    spec,
                    "raised",
                    obs=obs,
                    line_index=scan.last_line_index,
                    direction=scan.last_direction,
                    now_s=now_s,
                    message=message,
                )
                events.append(self._raise(st, ev))
        return events

    # -- inspection and persistence -----------------------------------------------------

    def active(self) -> list[AlertEvent]:
        """The raise events of every alert still active, oldest scan first."""
        out = []
        for scan in self._scans.values():
            for st in scan.rules.values():
                if st.active and st.raised is not None:
                    out.append(AlertEvent.from_dict(st.raised))
        return out

    def state_dict(self) -> dict[str, Any]:
        """The whole state as plain JSON-serialisable data."""
        return {
            "version": _STATE_VERSION,
            "latest_scan": self._latest,
            "scans": {sid: scan.state_dict(self._default) for sid, scan in self._scans.items()},
        }

    def save(self, path: str | PathLike[str]) -> None:
        """Write :meth:`state_dict` as JSON atomically and durably (the one atomic writer:
        temporary file, fsync, rename, folder fsync).

        Raises
        ------
        StoreError
            If the state cannot be written (disk full, folder not writable).
        """
        p = Path(path)
        text = json.dumps(self.state_dict(), separators=(",", ":"))
        try:
            p.parent.mkdir(parents=True, exist_ok=True)
            write_text_atomic(p, text)
        except OSError as exc:
            raise StoreError(f"{p}: rule state could not be written: {exc.strerror}") from exc

    @classmethod
    def restore(
        cls,
        rules: RulesConfig,
        path: str | PathLike[str],
        *,
        clock: Callable[[], float] = time.time,
    ) -> RuleEngine:
        """An engine continuing from the state saved at ``path`` (fresh if there is none).

        A state file that cannot be parsed or belongs to another state version is moved
        aside to ``<name>.unreadable`` (never deleted), logged, and a fresh engine starts.
        """
        p = Path(path)
        try:
            state = json.loads(p.read_text(encoding="utf-8"))
        except FileNotFoundError:
            return cls(rules, clock=clock)
        except (OSError, ValueError) as exc:
            return cls._fresh_after(p, rules, clock, f"{type(exc).__name__}: {exc}")
        try:
            return cls.from_state(rules, state, clock=clock)
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            return cls._fresh_after(p, rules, clock, f"{type(exc).__name__}: {exc}")

    @classmethod
    def _fresh_after(
        cls, p: Path, rules: RulesConfig, clock: Callable[[], float], why: str
    ) -> RuleEngine:
        aside = p.with_name(p.name + ".unreadable")
        with contextlib.suppress(OSError):
            os.replace(p, aside)
        structlog.get_logger("strayline.rules").warning(
            "rule_state_unreadable", path=str(p), moved_to=str(aside), problem=why
        )
        return cls(rules, clock=clock)

    @classmethod
    def from_state(
        cls,
        rules: RulesConfig,
        state: Mapping[str, Any],
        *,
        clock: Callable[[], float] = time.time,
    ) -> RuleEngine:
        """An engine for ``rules`` that continues from a :meth:`state_dict`.

        Raises
        ------
        ValueError
            If the state was written by an incompatible version.
        """
        version = state.get("version")
        if version != _STATE_VERSION:
            raise ValueError(
                f"rule engine state must have version {_STATE_VERSION}; found {version!r}"
            )
        engine = cls(rules, clock=clock)
        for sid, scan_state in state["scans"].items():
            engine._scans[sid] = _ScanState.from_state(scan_state, engine._default)
        engine._latest = state["latest_scan"]
        return engine
