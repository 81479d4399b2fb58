"""Refits of a line's fits that settle what the first fit leaves open.

A looser width prior where the line's widths truly differ (:func:`looser_prior`), the
best of a fit and its hyperfine aliases (:func:`best_alias`), and the centres' 1σ from
the profile likelihood (:func:`profile_sigma`). Each takes a ``refit`` callable that runs
the compiled kernel on rows of the line, so that this module needs no kernel arguments.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from strayline._numbers import MAD_TO_SIGMA, median
from strayline.fit._layout import Layout as _Layout

__all__ = ["MIN_POOLED", "best_alias", "looser_prior", "penalised", "profile_sigma"]

MIN_POOLED = 8  # fewest kept fits from which a line's width scatter is judged


def looser_prior(
    res: dict[str, np.ndarray],
    keep: np.ndarray,
    i_width: int,
    prior: tuple[float, float],
    spread: float,
) -> tuple[float, float] | None:
    """A looser width prior where the line's widths scatter more than the prior allows.

    The kept fits were made with ``prior``; their widths are first freed of its pull.
    The part of the kept fits' width scatter (1.4826 × MAD; 1.4826 = 1/Φ⁻¹(¾) makes the
    median absolute deviation a Gaussian σ, common practice) that their own 1σ does not
    explain is added to the prior's variance (spread · G₀)². Returned, as (centre,
    inverse variance), only when that at least doubles the variance; None otherwise, or
    with fewer than ``MIN_POOLED`` kept fits to judge by.
    """
    if np.count_nonzero(keep) < MIN_POOLED:
        return None
    # Undo the prior's pull: with data information I_d = 1/σ² − I_p, the width the data
    # alone would give is G₀ + (G − G₀)(I_d + I_p)/I_d, with 1σ of 1/√I_d.
    g0, i_prior = prior
    fitted = res["p"][keep, i_width]
    with np.errstate(divide="ignore", invalid="ignore"):
        i_data = 1.0 / res["sigma"][keep, i_width] ** 2 - i_prior
        good = np.isfinite(i_data) & (i_data > 0.0)
        widths = np.where(good, g0 + (fitted - g0) * (i_data + i_prior) / i_data, fitted)
        w_sigma = np.where(good, 1.0 / np.sqrt(i_data), np.nan)
    scatter2 = (MAD_TO_SIGMA * median(np.abs(widths - median(widths)))) ** 2
    own2 = median(np.where(np.isfinite(w_sigma), w_sigma, 0.0) ** 2)
    base = (spread * prior[0]) ** 2
    var = base + max(scatter2 - own2, 0.0)
    return (prior[0], 1.0 / var) if var >= 2.0 * base else None


def best_alias(
    layout: _Layout,
    res: dict[str, np.ndarray],
    spacing_x: float,
    refit: Callable[[np.ndarray, np.ndarray], dict[str, np.ndarray]],
    split_chi2: float,
) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Each row's best solution among its own and those shifted by one hyperfine spacing.

    With resolved hyperfine lines the likelihood has a local minimum wherever all but one
    component of a dip line up with the data, one spacing either side of the true centre
    (a fit locks onto a satellite, common practice). Every dip of every row is refitted
    from ±``spacing_x`` (scaled) off its centre, and the row keeps the solution with the
    lowest objective. ``refit(rows, p0)`` fits rows ``rows`` of the batch from ``p0``.

    Returns the best solutions and, per row, whether a solution with a centre at least
    half a spacing away comes within ``split_chi2`` of the best (the data cannot tell
    which component is which: the centre is uncertain by a whole spacing, far beyond
    its local 1σ).
    """
    nd = layout.n_dips
    n = res["p"].shape[0]
    if n == 0:
        return res, np.zeros(0, dtype=bool)
    starts = []
    for i in range(nd):
        for shift in (-spacing_x, spacing_x):
            p0 = res["p"].copy()
            p0[:, i] += shift
            starts.append(p0)
    rows = np.tile(np.arange(n), 2 * nd)
    alt = refit(rows, np.concatenate(starts))
    solutions = [res] + [{k: v[a * n : (a + 1) * n] for k, v in alt.items()} for a in range(2 * nd)]
    objective = np.stack([sol["objective"] for sol in solutions])  # (1 + 2 nd, n)
    objective = np.where(np.isfinite(objective), objective, np.inf)
    pick = np.argmin(objective, axis=0)
    cols = np.arange(n)
    best = {k: np.stack([sol[k] for sol in solutions])[pick, cols] for k in res}
    best["n_iter"] = res["n_iter"] + alt["n_iter"].reshape(2 * nd, n).sum(axis=0)
    centres = np.stack([np.sort(sol["p"][:, :nd], axis=1) for sol in solutions])
    moved = np.any(np.abs(centres - np.sort(best["p"][:, :nd], axis=1)) > 0.5 * spacing_x, axis=2)
    rival = moved & (objective < objective[pick, cols] + split_chi2)
    return best, np.any(rival, axis=0)


def penalised(
    res: dict[str, np.ndarray], layout: _Layout, prior: tuple[float, float] | None
) -> np.ndarray:
    """The objective the fit minimised: the likelihood-ratio χ² plus the width prior."""
    if prior is None:
        return res["objective"]
    i0 = 2 * layout.n_dips
    widths = res["p"][:, i0 : i0 + layout.n_widths]
    return res["objective"] + prior[1] * np.sum((widths - prior[0]) ** 2, axis=1)


def profile_sigma(
    layout: _Layout,
    res: dict[str, np.ndarray],
    z_max: float,
    refit: Callable[[np.ndarray, np.ndarray, tuple[np.ndarray, np.ndarray]], dict[str, np.ndarray]],
    prior: tuple[float, float] | None,
) -> np.ndarray:
    """Centres' 1σ from the profile likelihood where their dip is weaker than ``z_max``.

    For such a centre the profile of the objective (every other parameter refitted with
    the centre held) is followed out to where it has risen by 9 on each side, the 3σ
    points of a likelihood-ratio interval (Venzon & Moolgavkar, Appl. Stat. 37, 87
    (1988); from memory), and 1σ is a sixth of that interval. Where the likelihood is
    flatter than its curvature says, as at low signal, this is wider than the inverse
    information. Two held fits per side: one at 3σ of the information, one where a
    quadratic through that point reaches 9; the 3σ point is interpolated linearly in
    √Δχ² (exact for a quadratic profile). ``refit(rows, p0, pin)`` fits rows of the
    batch from ``p0`` with ``pin`` = (parameter index, value) per row held.

    Returns the centres' 1σ, shape (n, n_dips): the profile's where profiled, the
    information's elsewhere.
    """
    nd = layout.n_dips
    p, sigma = res["p"], res["sigma"]
    out = sigma[:, :nd].copy()
    z = np.abs(p[:, nd : 2 * nd]) / sigma[:, nd : 2 * nd]
    rows, dips = np.nonzero((z < z_max) & np.isfinite(sigma[:, :nd]))
    if rows.size == 0:
        return out
    base = penalised(res, layout, prior)[rows]
    step = 3.0 * sigma[rows, dips]
    side_rows = np.concatenate([rows, rows])
    side_dips = np.concatenate([dips, dips])
    sign = np.concatenate([-np.ones(rows.size), np.ones(rows.size)])
    centre = p[side_rows, side_dips]
    rise = []
    d_first = np.concatenate([step, step])
    distances = [d_first]
    for k in range(2):
        d = distances[k]
        held = centre + sign * d
        p0 = p[side_rows].copy()
        p0[np.arange(side_rows.size), side_dips] = held
        fitted = refit(side_rows, p0, (side_dips, held))
        gain = penalised(fitted, layout, prior) - np.concatenate([base, base])
        rise.append(np.sqrt(np.clip(gain, 0.0, None)))
        if k == 0:
            # where a quadratic through this point reaches 9
            distances.append(np.clip(d * 3.0 / np.maximum(rise[0], 0.5), 0.5 * d, 6.0 * d))
    d1, d2 = distances
    r1, r2 = rise
    slope = (r2 - r1) / (d2 - d1)
    with np.errstate(divide="ignore", invalid="ignore"):
        linear = d2 + (3.0 - r2) / slope
        quadratic = d2 * 3.0 / np.maximum(r2, 1e-9)
    reach = np.where((slope > 0.0) & np.isfinite(linear), linear, quadratic)
    reach = np.clip(reach, 0.25 * d1, 6.0 * d1)
    half = 0.5 * (reach[: rows.size] + reach[rows.size :])
    out[rows, dips] = np.maximum(half / 3.0, sigma[rows, dips])
    return out
