"""The alert event record: one alert raised or cleared, and its JSON-lines form.

Made by the rule engine, the quarantine and the service; delivered by
:class:`~strayline.alerts.AlertSink`; read back by :func:`~strayline.alerts.read_alert_log`.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Literal

from strayline._numbers import finite_or_none

__all__ = ["AlertEvent"]

#: The order of the keys in an event's JSON (the alert log keeps it line after line).
_FIELD_ORDER = (
    "time",
    "scan_id",
    "rule",
    "severity",
    "state",
    "line_index",
    "direction",
    "pixel_range",
    "seen_value",
    "seen_unit",
    "baseline_value",
    "baseline_spread",
    "confidence_z",
    "message",
    "advice",
)


@dataclass(frozen=True, kw_only=True)
class AlertEvent:
    """One alert raised or cleared.

    Attributes
    ----------
    time : str
        When it was decided, ISO 8601 UTC.
    scan_id, rule, severity : str
    state : {"raised", "cleared"}
    line_index : int or None
        The line that decided it (the last line seen, for a stall).
    direction : str or None
    pixel_range : (int, int) or None
        Half-open pixel range concerned, storage indices.
    seen_value : float or None
        What was seen, in ``seen_unit``.
    seen_unit : str
    baseline_value, baseline_spread : float or None
        The baseline it was judged against (median, and 1.4826·MAD) in the metric's unit.
    confidence_z : float or None
        Robust z-score of the seen metric against the baseline, (value − median) / spread.
    message : str
        One readable sentence: what was seen, where, against what.
    advice : str
        What to check.
    """

    time: str
    scan_id: str
    rule: str
    severity: str
    state: Literal["raised", "cleared"]
    message: str
    advice: str
    line_index: int | None = None
    direction: str | None = None
    pixel_range: tuple[int, int] | None = None
    seen_value: float | None = None
    seen_unit: str = ""
    baseline_value: float | None = None
    baseline_spread: float | None = None
    confidence_z: float | None = None

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (non-finite numbers become None)."""
        d = {name: getattr(self, name) for name in _FIELD_ORDER}
        d["pixel_range"] = list(self.pixel_range) if self.pixel_range is not None else None
        for key in ("seen_value", "baseline_value", "baseline_spread", "confidence_z"):
            d[key] = finite_or_none(d[key])
        return d

    def to_json(self) -> str:
        """One line of JSON."""
        return json.dumps(self.to_dict(), ensure_ascii=False, separators=(",", ":"))

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> AlertEvent:
        """Inverse of :meth:`to_dict`; raises KeyError/TypeError/ValueError on bad input."""
        rng = data["pixel_range"]
        state = data["state"]
        if state not in ("raised", "cleared"):
            raise ValueError(f"state must be 'raised' or 'cleared'; found {state!r}")
        return cls(
            time=str(data["time"]),
            scan_id=str(data["scan_id"]),
            rule=str(data["rule"]),
            severity=str(data["severity"]),
            state=state,
            line_index=None if data["line_index"] is None else int(data["line_index"]),
            direction=data["direction"],
            pixel_range=None if rng is None else (int(rng[0]), int(rng[1])),
            seen_value=data["seen_value"],
            seen_unit=str(data["seen_unit"]),
            baseline_value=data["baseline_value"],
            baseline_spread=data["baseline_spread"],
            confidence_z=data["confidence_z"],
            message=str(data["message"]),
            advice=str(data["advice"]),
        )

    @classmethod
    def from_json(cls, text: str) -> AlertEvent:
        """Parse one line written by :meth:`to_json`."""
        return cls.from_dict(json.loads(text))

    @property
    def datetime(self) -> datetime:
        """:attr:`time` as an aware datetime."""
        return datetime.fromisoformat(self.time)
