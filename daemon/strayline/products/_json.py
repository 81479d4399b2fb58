"""JSON-ready copies of the products' records."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

__all__ = ["finite_json"]


def finite_json(value: Any) -> Any:
    """Copy of ``value`` with numpy scalars as Python numbers and every non-finite float
    as None (JSON has no NaN)."""
    if isinstance(value, dict):
        return {k: finite_json(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [finite_json(v) for v in value]
    if isinstance(value, float | np.floating):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, np.integer | np.bool_):
        return value.item()
    return value
