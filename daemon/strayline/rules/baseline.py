"""The rolling baseline a scan's lines are judged against: median and robust spread of each
metric over the last good lines, and an anchor of the first good lines."""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np

from strayline._numbers import finite_or_none, median_and_spread

__all__ = ["RollingBaseline"]


class RollingBaseline:
    """Median and spread of each metric over the last good lines of one scan.

    Also keeps an *anchor*: the median of the first ``anchor_lines`` good lines, a fixed
    reference for slow drifts that a rolling window would follow.

    Parameters
    ----------
    window_lines : int
        Good lines kept.
    min_lines : int
        Good lines needed before :meth:`stats` answers.
    anchor_lines : int
        Good lines forming the anchor.
    """

    def __init__(self, window_lines: int = 30, min_lines: int = 5, anchor_lines: int = 10) -> None:
        self.window_lines = int(window_lines)
        self.min_lines = int(min_lines)
        self.anchor_lines = int(anchor_lines)
        self._values: dict[str, deque[float]] = {}
        self._anchor: dict[str, list[float]] = {}
        self._count = 0

    @property
    def count(self) -> int:
        """Good lines added so far (not capped by the window)."""
        return self._count

    def add(self, values: Mapping[str, float]) -> None:
        """Add one good line's metrics (name → value; NaN allowed)."""
        self._count += 1
        for name, v in values.items():
            self._values.setdefault(name, deque(maxlen=self.window_lines)).append(float(v))
            anchor = self._anchor.setdefault(name, [])
            if len(anchor) < self.anchor_lines:
                anchor.append(float(v))

    def stats(self, name: str) -> tuple[float, float] | None:
        """(median, 1.4826·MAD) over the window, or None with too few finite values."""
        values = self._values.get(name)
        if values is None:
            return None
        a = np.asarray(values, dtype=float)
        a = a[np.isfinite(a)]
        if a.size < self.min_lines:
            return None
        return median_and_spread(a)

    def anchor_stats(self, name: str) -> tuple[float, float] | None:
        """(median, 1.4826·MAD) of the first ``anchor_lines`` good values, once complete."""
        a = np.asarray(self._anchor.get(name, []), dtype=float)
        a = a[np.isfinite(a)]
        if a.size < self.anchor_lines:
            return None
        return median_and_spread(a)

    def state_dict(self) -> dict[str, Any]:
        """JSON-serialisable state (NaN stored as None)."""

        def clean(seq: Iterable[float]) -> list[float | None]:
            return [finite_or_none(v) for v in seq]

        return {
            "window_lines": self.window_lines,
            "min_lines": self.min_lines,
            "anchor_lines": self.anchor_lines,
            "count": self._count,
            "values": {k: clean(v) for k, v in self._values.items()},
            "anchor": {k: clean(v) for k, v in self._anchor.items()},
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> RollingBaseline:
        """Rebuild from :meth:`state_dict`."""
        out = cls(state["window_lines"], state["min_lines"], state["anchor_lines"])
        out._count = int(state["count"])

        def restore(seq: Iterable[float | None]) -> list[float]:
            return [math.nan if v is None else float(v) for v in seq]

        for k, v in state["values"].items():
            out._values[k] = deque(restore(v), maxlen=out.window_lines)
        out._anchor = {k: restore(v) for k, v in state["anchor"].items()}
        return out
