"""The alerts raised outside the rule engine and still active, remembered across restarts.

The service raises alerts of its own (output unavailable, disk space low); the rule
engine keeps its own alerts in its state. :class:`ActiveAlerts` is the one record of the
others: the service reads it to match a clear with its raise and to take over what a
previous run left raised, the pipeline delivers through the sink and then saves it, and
``statistics()`` counts it. Saved as JSON (``{"active": [event, ...]}``) with the atomic
writer.
"""

from __future__ import annotations

import json
from pathlib import Path

import structlog

from strayline._atomic import write_text_atomic
from strayline.alerts.event import AlertEvent
from strayline.alerts.sink import AlertSink
from strayline.errors import StoreError

__all__ = ["ACTIVE_ALERTS_FILE", "ActiveAlerts", "deliver_remembered"]

#: File name of the registry inside the state folder.
ACTIVE_ALERTS_FILE = "delivered_alerts.json"


class ActiveAlerts:
    """Raised events still active, keyed by (scan, rule); a "cleared" event removes its raise.

    Parameters
    ----------
    path : Path
        The JSON file it is loaded from (an unreadable one is logged and taken as empty)
        and saved to.
    """

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self._events = _load(self.path)
        self._unsaved = False

    def note(self, event: AlertEvent) -> None:
        """Record a raise (or replace it) or forget the raise a clear matches (in memory)."""
        key = (event.scan_id, event.rule)
        if event.state == "raised":
            changed = self._events.get(key) != event
            self._events[key] = event
        else:
            changed = self._events.pop(key, None) is not None
        self._unsaved |= changed

    def save(self) -> None:
        """Write the registry if it changed since it was loaded or last saved.

        Raises
        ------
        StoreError
            If it cannot be written (the events stay noted in memory).
        """
        if not self._unsaved:
            return
        text = json.dumps({"active": [e.to_dict() for e in self._events.values()]})
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            write_text_atomic(self.path, text)
        except OSError as error:
            problem = f"{self.path}: delivered alerts could not be saved: {error}"
            raise StoreError(problem) from error
        self._unsaved = False

    def raised(self, rule: str) -> AlertEvent | None:
        """The active raise of ``rule`` (of any scan; the latest noted), or None."""
        found = [e for (_, r), e in self._events.items() if r == rule]
        return found[-1] if found else None

    def active(self) -> tuple[AlertEvent, ...]:
        """Every active raise, in the order noted."""
        return tuple(self._events.values())

    def __len__(self) -> int:
        return len(self._events)


def _load(path: Path) -> dict[tuple[str, str], AlertEvent]:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        events = [AlertEvent.from_dict(item) for item in data["active"]]
    except FileNotFoundError:
        return {}
    except (OSError, ValueError, KeyError, TypeError) as error:
        structlog.get_logger("strayline.alerts").warning(
            "delivered_alerts_unreadable", path=str(path), problem=str(error)
        )
        return {}
    return {(e.scan_id, e.rule): e for e in events}


def deliver_remembered(
    sink: AlertSink, active: ActiveAlerts, event: AlertEvent, *, notify: bool = True
) -> None:
    """Deliver an alert raised outside the rule engine and keep the record of active ones:
    note it, deliver it through ``sink`` (``notify=False``: to the alert log only, for an
    event announced before), then save the record.

    Raises
    ------
    AlertNotLogged
        The alert log could not be written (the event was announced and noted; the record
        is saved once it is delivered again).
    StoreError
        The record could not be saved (the event was delivered).
    """
    active.note(event)
    sink.deliver(event, notify=notify)
    active.save()
