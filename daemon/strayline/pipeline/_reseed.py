"""After a restart, the metrics memory of a scan rebuilt from its store's maps.

The tracker compares each line with the previous lines of its direction; a restarted
daemon gets those rows back from the committed maps (the store keeps every quantity the
rows hold except the PL rate's 1σ).
"""

from __future__ import annotations

import numpy as np

from strayline.fit import FitStatus
from strayline.lines import ScanLine
from strayline.rules import ROW_KEYS, MetricsTracker, field_perp
from strayline.store import ScanStore

__all__ = ["SEED_LINES", "center_mean_sigma_from_maps", "seed_tracker"]


#: Store map that holds each metrics row key directly.
_ROW_FROM_MAP = {
    "field_nv_t": "field_nv_t",
    "field_nv_sigma_t": "field_nv_sigma_t",
    "pl_per_s": "pl_rate_cps",
    "center_mean_hz": "center_mean_hz",
}


def center_mean_sigma_from_maps(
    center_mean_hz: np.ndarray,
    freq_hi_hz: np.ndarray,
    freq_lo_sigma_hz: np.ndarray,
    freq_hi_sigma_hz: np.ndarray,
) -> np.ndarray:
    """1σ of the resonance-pair mean, rebuilt from the stored maps.

    Where both resonances were fitted the mean is (f₋ + f₊)/2, so with independent errors
    σ = ½·√(σ₋² + σ₊²) (Gaussian error propagation, common practice; the same expression
    :func:`~strayline.field.field_from_fit` uses). Where the dips merged into one, the mean
    *is* the one centre and σ = σ₋. Where no mean was computed the result is NaN.

    Parameters
    ----------
    center_mean_hz, freq_hi_hz, freq_lo_sigma_hz, freq_hi_sigma_hz : ndarray, shape (n,)
        Rows of the store's maps of the same names, Hz.

    Returns
    -------
    ndarray, shape (n,)
        σ of the centre mean, Hz.
    """
    mean = np.asarray(center_mean_hz, dtype=float)
    hi = np.asarray(freq_hi_hz, dtype=float)
    s_lo = np.asarray(freq_lo_sigma_hz, dtype=float)
    s_hi = np.asarray(freq_hi_sigma_hz, dtype=float)
    pair = 0.5 * np.hypot(s_lo, s_hi)
    out = np.where(np.isfinite(hi), pair, s_lo)
    return np.where(np.isfinite(mean), out, np.nan)


def seed_tracker(tracker: MetricsTracker, store: ScanStore, line: ScanLine) -> None:
    """After a restart, remember the last committed lines of each direction.

    The tracker compares a line with the previous one and with a reference built from a
    few lines before it, so the last :data:`SEED_LINES` committed lines of each direction
    are seeded, oldest first. Every row is rebuilt from the store's maps except
    ``pl_sigma_per_s``: the store does not keep the PL rate's 1σ, so that row is NaN (no
    metric uses it today).
    """
    committed = store.committed()
    for direction in ("forward", "backward"):
        done = sorted(i for (i, d) in committed if d == direction and i < line.line_index)
        # Maps run in increasing x; metrics rows run in acquisition order, which is this
        # line's for its own direction and the reverse for the other one.
        x_m = np.asarray(line.x_m, dtype=float)
        x_m = x_m if direction == line.direction else x_m[::-1].copy()
        order = np.argsort(x_m, kind="stable")
        for index in done[-SEED_LINES:]:
            tracker.seed(direction, _stored_rows(store, direction, index, order, x_m))


#: Committed lines per direction given back to the metrics memory after a restart.
SEED_LINES = 4


def _stored_rows(
    store: ScanStore, direction: str, index: int, order: np.ndarray, x_m: np.ndarray
) -> dict[str, np.ndarray]:
    """The metrics rows (:data:`ROW_KEYS`) of one committed line, from the store's maps."""

    def row(name: str) -> np.ndarray:
        stored = np.asarray(store.read_map(name, direction)[index], dtype=float)
        in_file_order = np.empty_like(stored)
        in_file_order[order] = stored
        return in_file_order

    ok = row("status") == FitStatus.OK
    rows = {key: row(name) for key, name in _ROW_FROM_MAP.items()}
    for key in ("field_nv_t", "center_mean_hz"):  # as metrics.comparison_rows keeps them
        rows[key] = np.where(ok, rows[key], np.nan)
    rows["center_mean_sigma_hz"] = center_mean_sigma_from_maps(
        rows["center_mean_hz"],
        row("freq_hi_hz"),
        row("freq_lo_sigma_hz"),
        row("freq_hi_sigma_hz"),
    )
    rows["field_perp_t"] = field_perp(row("field_abs_t"), row("angle_rad"), ok)
    rows["pl_sigma_per_s"] = np.full(store.n_pixels, np.nan)
    rows["x_m"] = x_m
    return {key: rows[key] for key in ROW_KEYS}
