"""Alert rules: line metrics, the rolling baseline, the engine, rule specs and loading.

Each committed line's :class:`LineMetrics` (from :class:`MetricsTracker`) is judged by the
:class:`RuleEngine` against a rolling baseline of the scan's good lines; rules are data
(:class:`RulesConfig`, validated specs). The engine returns
:class:`~strayline.alerts.AlertEvent` records; it delivers nothing itself.
"""

from strayline.rules._load import apply_overrides, default_rules, load_rules, rules_from_data
from strayline.rules.baseline import RollingBaseline
from strayline.rules.decision import (
    DecisionLog,
    RuleDecision,
    format_decision,
    read_decisions,
)
from strayline.rules.engine import RuleEngine
from strayline.rules.metrics import (
    ROW_KEYS,
    LineMetrics,
    MetricsOptions,
    MetricsTracker,
    common_mode_sigma,
    comparison_rows,
    field_perp,
    line_metrics,
    metric_names,
)
from strayline.rules.spec import (
    RULE_KINDS,
    AcquisitionStalledSpec,
    AnyRuleSpec,
    BaselineSpec,
    ContrastCollapsedSpec,
    FitFailuresRisingSpec,
    FluorescenceLostSpec,
    ResonanceJumpSpec,
    RulesConfig,
    RuleSpec,
    Severity,
    ThresholdSpec,
    ZfsDriftSpec,
)

__all__ = [
    "ROW_KEYS",
    "RULE_KINDS",
    "AcquisitionStalledSpec",
    "AnyRuleSpec",
    "BaselineSpec",
    "ContrastCollapsedSpec",
    "DecisionLog",
    "FitFailuresRisingSpec",
    "FluorescenceLostSpec",
    "LineMetrics",
    "MetricsOptions",
    "MetricsTracker",
    "ResonanceJumpSpec",
    "RollingBaseline",
    "RuleDecision",
    "RuleEngine",
    "RuleSpec",
    "RulesConfig",
    "Severity",
    "ThresholdSpec",
    "ZfsDriftSpec",
    "apply_overrides",
    "common_mode_sigma",
    "comparison_rows",
    "default_rules",
    "field_perp",
    "format_decision",
    "line_metrics",
    "load_rules",
    "metric_names",
    "read_decisions",
    "rules_from_data",
]
