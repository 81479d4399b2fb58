"""What a line detector reads (the baseline) and returns (an observation).

Shared by the detectors of :mod:`strayline.rules._detectors` and
:mod:`strayline.rules._jump`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, Protocol

from strayline.rules.metrics import LineMetrics
from strayline.rules.spec import Severity

__all__ = [
    "BaselineView",
    "Detector",
    "DetectorMemory",
    "NoMemory",
    "Observation",
    "robust_z",
]


class BaselineView(Protocol):
    """What a detector may ask of the baseline."""

    def stats(self, name: str) -> tuple[float, float] | None: ...

    def anchor_stats(self, name: str) -> tuple[float, float] | None: ...


@dataclass(frozen=True)
class Observation:
    """One detector's reading of one line.

    ``confidence_z`` is a robust z-score: (value − baseline median) / baseline spread.
    ``run_lines``: when set, the number of lines in a row (this one included) the raise
    condition is known to have held, replacing the engine's count: 1 when the lines
    counted so far were about something that did not hold, 2 when this line confirms
    what the previous one showed. ``severity``: the severity of a raise on this
    observation when it is not the rule's own (a touch that has already reverted is a
    warning under a critical rule). ``detail``: the statistics the detector compared, with
    their thresholds (plain JSON), for the line's decision record.

    ``message`` says what was seen, each quantity once in one unit (a fraction as a
    percentage), short enough for a terminal line beside the time, scan and rule; it
    does not repeat the line or the pixel range, which the event carries (and the
    readable alert line shows once).
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
    severity: Severity | None = None
    detail: Mapping[str, Any] = field(default_factory=dict)


class DetectorMemory(Protocol):
    """What a detector remembers between lines of a scan; saved with the engine's state."""

    def to_json(self) -> dict[str, Any]:
        """Plain JSON-ready data that :attr:`Detector.memory` reads back."""
        ...

    def on_raised(self) -> None:
        """The engine raised the rule on this line's observation."""
        ...

    def on_quiet(self) -> None:
        """A line without the raise condition while the rule is not raised."""
        ...

    def detail(self) -> dict[str, Any]:
        """What the detector saw on the last line, for its decision record (plain JSON)."""
        ...


@dataclass
class NoMemory:
    """The memory of a detector that remembers nothing."""

    @classmethod
    def from_json(cls, _data: Mapping[str, Any]) -> NoMemory:
        return cls()

    def to_json(self) -> dict[str, Any]:
        return {}

    def on_raised(self) -> None:
        pass

    def on_quiet(self) -> None:
        pass

    def detail(self) -> dict[str, Any]:
        return {}


@dataclass(frozen=True)
class Detector:
    """A line detector: ``detect(metrics, baseline, memory)`` gives the line's observation
    (or None: nothing to judge); ``memory(saved)`` builds its memory, fresh from ``{}``."""

    detect: Callable[[LineMetrics, BaselineView, Any], Observation | None]
    memory: Callable[[Mapping[str, Any]], DetectorMemory] = NoMemory.from_json


def robust_z(value: float, median: float, spread: float, floor: float) -> float:
    """(value − median) / spread, the spread at least ``floor``."""
    return (value - median) / max(spread, floor, 1e-300)
