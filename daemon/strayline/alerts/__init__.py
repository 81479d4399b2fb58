"""Alerts: the event record, its delivery (log, hook, stop request) and the log read back.

An :class:`AlertEvent` is made by the rule engine, the quarantine or the service, delivered
by one :class:`AlertSink`, and read back by :func:`read_alert_log` (``strayline alerts``,
``status``, the products' report).
"""

from strayline.alerts.event import AlertEvent
from strayline.alerts.log import (
    ALERT_LINE_MAX,
    SEVERITY_ORDER,
    active_now,
    follow_alerts,
    format_alert,
    parse_since,
    read_alert_log,
)
from strayline.alerts.registry import ACTIVE_ALERTS_FILE, ActiveAlerts, deliver_remembered
from strayline.alerts.sink import (
    HOOK_PLACEHOLDERS,
    AlertNotLogged,
    AlertSink,
    SinkStatistics,
    fill_hook_arguments,
    write_stop_request,
)

__all__ = [
    "ACTIVE_ALERTS_FILE",
    "ALERT_LINE_MAX",
    "HOOK_PLACEHOLDERS",
    "SEVERITY_ORDER",
    "ActiveAlerts",
    "AlertEvent",
    "AlertNotLogged",
    "AlertSink",
    "SinkStatistics",
    "active_now",
    "deliver_remembered",
    "fill_hook_arguments",
    "follow_alerts",
    "format_alert",
    "parse_since",
    "read_alert_log",
    "write_stop_request",
]
