"""Why a rule did or did not raise: one decision record per line per rule.

The engine (:class:`strayline.rules.RuleEngine`) writes down, for every rule on every
line it judges, what the detector saw (the value, its baseline, the robust z, the
pixels), the statistics the detector compared with their thresholds (``detail``), and
what the engine made of it (the verdict, with the line count towards a raise or a
clear and the rules that explained it away). The pipeline appends the records of each
scan to ``<state_dir>/decisions/<scan_id>.jsonl`` (:class:`DecisionLog`), and
``strayline why SCAN LINE`` prints them (:func:`format_decision`), so "why did (or
didn't) it raise at line 84?" has an answer.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, Literal

__all__ = [
    "VERDICTS",
    "DecisionLog",
    "RuleDecision",
    "Verdict",
    "decisions_path",
    "format_decision",
    "read_decisions",
]

Verdict = Literal[
    "not_judged", "quiet", "counting", "explained", "raised", "active", "clearing", "cleared"
]

#: What each verdict means, in words (``strayline why`` prints these).
VERDICTS: Mapping[str, str] = {
    "not_judged": "no candidate on this line (the baseline is not ready yet, or nothing "
    "stepped far enough to be judged; the statistics below say which)",
    "quiet": "raise condition not met",
    "counting": "raise condition met; counting lines towards the raise",
    "explained": "raise condition met but explained by another rule (suppressed_by)",
    "raised": "raised on this line",
    "active": "active; clear condition not met",
    "clearing": "active; clear condition met, counting lines towards the clear",
    "cleared": "cleared on this line",
}


def _finite(value: Any) -> Any:
    """JSON-safe: non-finite floats become None, nested containers are walked."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    return value


@dataclass(frozen=True)
class RuleDecision:
    """One rule's decision on one line.

    Attributes
    ----------
    time : str
        When the line was judged, ISO 8601 (UTC).
    scan_id, line_index, direction, rule : str, int, str, str
        Which line, which rule.
    verdict : str
        A key of :data:`VERDICTS`.
    raise_cond, clear_cond : bool
        The detector's raise and clear conditions on this line (before suppression).
    count, needed : int
        Lines in a row counted towards the raise (rule idle) or the clear (rule active),
        and how many the rule needs (``persistence_lines`` / ``clear_lines``).
    explained_by : tuple of str
        Rules holding on this line that explain this one (its ``suppressed_by``).
    seen_value, seen_unit, baseline_value, baseline_spread, confidence_z
        What the detector saw, against what (None where it saw nothing).
    pixel_range : (int, int) or None
        Pixels [first, last + 1) the observation is about.
    message : str
        The detector's text for this line ("" when not judged).
    detail : mapping
        The detector's own statistics and thresholds (plain JSON).
    """

    time: str
    scan_id: str
    line_index: int
    direction: str
    rule: str
    verdict: Verdict
    raise_cond: bool = False
    clear_cond: bool = False
    count: int = 0
    needed: int = 1
    explained_by: tuple[str, ...] = ()
    seen_value: float | None = None
    seen_unit: str = ""
    baseline_value: float | None = None
    baseline_spread: float | None = None
    confidence_z: float | None = None
    pixel_range: tuple[int, int] | None = None
    message: str = ""
    detail: Mapping[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready data (non-finite numbers as null). The fields hold plain data
        only, so :func:`_finite`'s walk is the copy (``dataclasses.asdict`` would deep-copy
        everything first, at several times the cost)."""
        return _finite({f.name: getattr(self, f.name) for f in fields(self)})  # type: ignore[no-any-return]

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> RuleDecision:
        """The record :meth:`to_dict` wrote."""
        values = dict(data)
        values["explained_by"] = tuple(values.get("explained_by") or ())
        rng = values.get("pixel_range")
        values["pixel_range"] = None if rng is None else (int(rng[0]), int(rng[1]))
        values["detail"] = dict(values.get("detail") or {})
        return cls(**values)


def decisions_path(state_dir: str | os.PathLike[str], scan_id: str) -> Path:
    """Where the decision records of ``scan_id`` are kept."""
    return Path(state_dir) / "decisions" / f"{scan_id}.jsonl"


class DecisionLog:
    """Appends decision records, one JSON object per line, one file per scan.

    The records are a diagnostic aid, not a ledger: they are flushed, not synced, and a
    line judged again after a restart is simply recorded again (the last record wins).
    """

    def __init__(self, state_dir: str | os.PathLike[str]) -> None:
        self.state_dir = Path(state_dir)

    def append(self, decisions: Iterable[RuleDecision]) -> None:
        by_scan: dict[str, list[str]] = {}
        for d in decisions:
            by_scan.setdefault(d.scan_id, []).append(json.dumps(d.to_dict(), allow_nan=False))
        for scan_id, rows in by_scan.items():
            path = decisions_path(self.state_dir, scan_id)
            path.parent.mkdir(parents=True, exist_ok=True)
            with path.open("a", encoding="utf-8") as f:
                f.write("\n".join(rows) + "\n")


def read_decisions(
    state_dir: str | os.PathLike[str],
    scan_id: str,
    *,
    line_index: int | None = None,
    direction: str | None = None,
    rule: str | None = None,
) -> list[RuleDecision]:
    """The decision records of a scan, optionally of one line, direction and rule.

    Where a line was judged more than once (a restart), only its last records are kept.
    A partial last line (being written) is skipped; any other unreadable line raises
    ``ValueError`` naming the file and line number.
    """
    path = decisions_path(state_dir, scan_id)
    if not path.exists():
        return []
    lines = path.read_text(encoding="utf-8").split("\n")
    latest: dict[tuple[int, str, str], RuleDecision] = {}
    for number, text in enumerate(lines, start=1):
        if not text.strip():
            continue
        try:
            d = RuleDecision.from_dict(json.loads(text))
        except (ValueError, KeyError, TypeError) as exc:
            if number == len(lines):
                continue
            raise ValueError(
                f"{path}: line {number} must be one decision record as JSON; found "
                f"{text[:60]!r} ({exc.__class__.__name__})"
            ) from None
        if line_index is not None and d.line_index != line_index:
            continue
        if direction is not None and d.direction != direction:
            continue
        if rule is not None and d.rule != rule:
            continue
        key = (d.line_index, d.direction, d.rule)
        latest.pop(key, None)  # re-insert: the order is that of the last judgement
        latest[key] = d
    return list(latest.values())


def _number(value: Any) -> str:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return str(value)
    return f"{value:.4g}"


def _detail_text(detail: Mapping[str, Any], indent: str) -> list[str]:
    out = []
    for key, value in detail.items():
        if isinstance(value, Mapping):
            inner = ", ".join(
                f"{k} {_number(v)}" for k, v in value.items() if not isinstance(v, Mapping | list)
            )
            out.append(f"{indent}{key}: {inner}")
        elif isinstance(value, list):
            out.append(f"{indent}{key}: {', '.join(_number(v) for v in value)}")
        else:
            out.append(f"{indent}{key}: {_number(value)}")
    return out


def format_decision(d: RuleDecision) -> str:
    """A readable account of one decision: the verdict in words, then what was seen."""
    if d.verdict in ("counting", "clearing"):
        verdict = f"{d.verdict} ({d.count} of {d.needed} lines)"
    elif d.verdict == "explained":
        verdict = f"explained by {', '.join(d.explained_by)}"
    else:
        verdict = d.verdict
    head = f"line {d.line_index} {d.direction}  {d.rule}: {verdict}"
    rows = [head, f"    {VERDICTS[d.verdict]}"]
    if d.message:
        rows.append(f"    {d.message}")
    if d.seen_value is not None:
        seen = f"    seen {_number(d.seen_value)} {d.seen_unit}".rstrip()
        if d.baseline_value is not None:
            seen += f", baseline {_number(d.baseline_value)}"
            if d.baseline_spread is not None:
                seen += f" ± {_number(d.baseline_spread)}"
        if d.confidence_z is not None:
            seen += f", z {d.confidence_z:+.1f}"
        rows.append(seen)
    rows += _detail_text(d.detail, "    ")
    return "\n".join(rows)
