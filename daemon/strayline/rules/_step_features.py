"""Line-to-line step features: the front half of the resonance-jump detector.

Each channel (PL, common mode (f₋ + f₊)/2, field roughness) of a line is compared pixel by
pixel with the previous line of the same direction and searched for the pixel range that
changed most (:mod:`strayline.rules._steps`); the range is then measured again against a
reference of older lines (``{ch}_step_ref``, ``{ch}_step_held``) and the common mode's
steadiness before the step (``center_mean_step_before``). The results are fields of
:class:`~strayline.rules.metrics.LineMetrics`; the detectors judge them.

Pure numpy over the rows of :func:`~strayline.rules.metrics.comparison_rows`; no I/O.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from strayline._numbers import median
from strayline.physics.constants import D_ROOM_HZ, GAMMA_NV_HZ_PER_T
from strayline.rules._steps import Segment, best_energy_segment, best_level_segment

__all__ = [
    "MetricsOptions",
    "change_fields",
    "common_mode_sigma",
    "nanmedian",
    "pixel_median",
    "reference_fields",
    "row_mean",
    "steady_fields",
]


@dataclass(frozen=True)
class MetricsOptions:
    """How line metrics are computed; settled once, shared by every line.

    Attributes
    ----------
    change_sigma : float
        A pixel's field change counts as significant above this many 1σ of the difference.
    reference_lines : int
        Lines of the same direction whose per-pixel median forms the *reference* a step is
        checked against (``{ch}_step_ref``, ``{ch}_step_held``): the median of three lines
        ignores one odd line among them, the previous line included.
    min_step_pixels : int
        Smallest pixel range (and remainder of the line) the field-roughness step search
        considers (a roughness sum needs many pixels to be stable).
        Also the smallest range of the PL step search.
    min_level_pixels : int
        Smallest pixel range (and remainder) the centre-mean step search considers: a
        touch of the sample can shift the resonances over only a few pixels.
    transverse_change_ratio : float
        Assumed |ΔB⊥| / |ΔB∥| of the sample's own field change between two lines, for the
        common-mode noise model (see :func:`common_mode_sigma`): the stray field of a
        planar source has in-plane and out-of-plane Fourier components of equal size,
        |b̃ₓ|² + |b̃ᵧ|² = |b̃_z|² (Casola, van der Sar & Yacoby, Nat. Rev. Mater. 3, 17088
        (2018), Box 2), so the two changes are of the same order.
    """

    change_sigma: float = 5.0
    reference_lines: int = 3
    min_step_pixels: int = 16
    min_level_pixels: int = 4
    transverse_change_ratio: float = 1.0


def common_mode_sigma(
    rows: Mapping[str, np.ndarray], prev: Mapping[str, np.ndarray], transverse_ratio: float
) -> np.ndarray:
    """1σ of the line-to-line change of (f₋ + f₊)/2 that the sample alone explains, Hz.

    ``σ² = σ²_now + σ²_prev + (3γ² B⊥ |ΔB⊥| / D)²`` with ``|ΔB⊥| = transverse_ratio ·
    |ΔB∥|``, ``B⊥`` the mean of the two lines' (where known) and ``D`` the
    room-temperature zero-field splitting: the fit errors of the two centre means, plus
    the shift a change of the transverse field gives, from f± ≈ D + 3(γB⊥)²/(2D) ± γB∥
    (PHYSICS.md §2): (3γ²/2D)(B⊥,now² − B⊥,prev²) = (3γ²/D) B̄⊥ ΔB⊥ exactly, B̄⊥ being the
    mean. A moving domain wall changes B∥ and B⊥ together and is down-weighted where it
    does; a touch shifts D alone, leaves B∥ where it was and keeps the fit errors alone
    as its noise (the B⊥ the inversion reads into its shift then multiplies ΔB∥ ≈ 0).
    """
    perp = row_mean(np.stack([rows["field_perp_t"], prev["field_perp_t"]], axis=1))
    perp = np.where(np.isfinite(perp), perp, 0.0)
    d_par = np.abs(rows["field_nv_t"] - prev["field_nv_t"])
    d_par = np.where(np.isfinite(d_par), d_par, 0.0)
    sample = 3.0 * GAMMA_NV_HZ_PER_T**2 * perp * transverse_ratio * d_par / D_ROOM_HZ
    fit = rows["center_mean_sigma_hz"] ** 2 + prev["center_mean_sigma_hz"] ** 2
    return np.sqrt(fit + sample**2)


def nanmedian(a: np.ndarray) -> float:
    a = a[np.isfinite(a)]
    return median(a)


def row_mean(a: np.ndarray) -> np.ndarray:
    """Mean of the finite values of each row, NaN for a row with none, shape (n_rows,).

    The same numbers as ``np.nanmean(a, axis=1)`` (sum of the finite values over their
    count) without its "Mean of empty slice" warning on rows where every value is NaN
    (e.g. both dips of a failed fit). A 1-D input is one value per row already.
    """
    a = np.asarray(a, dtype=float)
    if a.ndim == 1:
        return np.where(np.isfinite(a), a, np.nan)
    ok = np.isfinite(a)
    count = ok.sum(axis=1)
    total = np.where(ok, a, 0.0).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan)


def _acquisition_order(direction: str, x_m: np.ndarray) -> np.ndarray:
    """Storage indices in the order the pixels were acquired."""
    idx = np.arange(x_m.shape[0])
    increasing = x_m.shape[0] < 2 or bool(x_m[-1] >= x_m[0])
    forward = direction == "forward"
    return idx if forward == increasing else idx[::-1]


def _roughness(b_t: np.ndarray, sigma_t: np.ndarray) -> np.ndarray:
    """Fast-axis roughness ``(B[p+1] − B[p])² − σ²_p − σ²_{p+1}``, floored at 0, T²."""
    g = np.diff(b_t)
    noise = sigma_t[1:] ** 2 + sigma_t[:-1] ** 2
    noise = np.where(np.isfinite(noise), noise, 0.0)
    return np.maximum(g * g - noise, 0.0)


def _step_fields(
    prefix: str, seg: Segment | None, order: np.ndarray, n_pixels: int
) -> dict[str, object]:
    if seg is None:
        return {}
    stop = min(seg.stop, n_pixels)
    acq = order[seg.start : stop]
    first = int(acq[0])
    rng = (int(acq.min()), int(acq.max()) + 1)
    return {
        f"{prefix}_step": seg.value,
        f"{prefix}_step_score": seg.score,
        f"{prefix}_step_range": rng,
        f"{prefix}_step_first_pixel": first,
        f"{prefix}_step_to_end": 1.0 if stop >= n_pixels - 1 else 0.0,
    }


def pixel_median(stack: list[np.ndarray]) -> np.ndarray:
    """Per-pixel median of the finite values of a few rows, NaN where none, shape (n,).

    (``np.nanmedian`` without its warning on all-NaN columns.)
    """
    a = np.stack(stack)
    n = a.shape[1]
    count = np.isfinite(a).sum(axis=0)
    ordered = np.sort(a, axis=0)  # NaN sorts last
    lo = np.maximum((count - 1) // 2, 0)
    hi = np.maximum(count // 2 - (count == 0), 0)
    cols = np.arange(n)
    return np.where(count > 0, 0.5 * (ordered[lo, cols] + ordered[hi, cols]), np.nan)


def _range_against(
    rows: Mapping[str, np.ndarray],
    refs: Sequence[Mapping[str, np.ndarray]],
    ranges: Mapping[str, tuple[int, int] | None],
    eps_t2: float,
) -> dict[str, float]:
    """Value of each channel of ``rows`` over its given pixel range against ``refs``.

    ``pl``: median over the range of ``PL / PL_ref − 1`` (clipped to ±1); ``center_mean``:
    median of ``cm − cm_ref`` (Hz); ``field``: ``ln((E + ε) / (E_ref + ε))`` with ``E`` the
    fast-axis roughness summed over the range and ``E_ref`` the median of the reference
    lines' sums, ``ε = eps_t2`` (T²). The reference of the level channels is the per-pixel
    median of ``refs``. Ranges are storage indices, half-open.
    """
    out: dict[str, float] = {}
    n = rows["pl_per_s"].shape[0]
    for ch, rng in ranges.items():
        if rng is None or not refs:
            continue
        a, b = max(int(rng[0]), 0), min(int(rng[1]), n)
        if b - a < 2:
            continue
        if ch == "field":
            e_now = _roughness(rows["field_nv_t"][a:b], rows["field_nv_sigma_t"][a:b])
            e_refs = [_roughness(r["field_nv_t"][a:b], r["field_nv_sigma_t"][a:b]) for r in refs]
            ok = np.isfinite(e_now)
            for e in e_refs:
                ok &= np.isfinite(e)
            if ok.sum() < 2 or not eps_t2 > 0:
                continue
            ref_sum = median([float(e[ok].sum()) for e in e_refs])
            out[ch] = float(np.log((float(e_now[ok].sum()) + eps_t2) / (ref_sum + eps_t2)))
            continue
        key = "pl_per_s" if ch == "pl" else "center_mean_hz"
        ref = pixel_median([r[key][a:b] for r in refs])
        if ch == "pl":
            with np.errstate(invalid="ignore", divide="ignore"):
                change = np.clip(rows[key][a:b] / ref - 1.0, -1.0, 1.0)
        else:
            change = rows[key][a:b] - ref
        out[ch] = nanmedian(change)
    return out


def reference_fields(
    rows: Mapping[str, np.ndarray],
    history: Sequence[Mapping[str, np.ndarray]],
    own_ranges: Mapping[str, tuple[int, int] | None],
    previous_ranges: Mapping[str, tuple[int, int] | None],
    options: MetricsOptions,
) -> dict[str, object]:
    """``{ch}_step_ref`` and ``{ch}_step_held`` (see :class:`LineMetrics`).

    ``history`` holds the rows of the lines of the same direction before this one, oldest
    first, the previous line last; rows of another pixel count are ignored.
    """
    n = rows["pl_per_s"].shape[0]
    hist = [h for h in history if h["pl_per_s"].shape[0] == n]
    if not hist:
        return {}
    m = options.reference_lines
    noise = 2.0 * nanmedian(hist[-1]["field_nv_sigma_t"]) ** 2
    noise = noise if np.isfinite(noise) else 0.0
    out: dict[str, object] = {}
    # Regulariser of the roughness ratio as in the step search: min_step_pixels times the
    # larger of the reference line's mean roughness per pixel and the noise floor (T²).
    for name, refs, ranges in (
        ("ref", hist[-m:], own_ranges),
        ("held", hist[:-1][-m:], previous_ranges),
    ):
        if not refs:
            continue
        e = _roughness(refs[-1]["field_nv_t"], refs[-1]["field_nv_sigma_t"])
        finite = e[np.isfinite(e)]
        mean_e = float(np.mean(finite)) if finite.size else 0.0
        eps = max(mean_e, noise) * options.min_step_pixels
        for ch, v in _range_against(rows, refs, ranges, eps).items():
            out[f"{ch}_step_{name}"] = v
    return out


def steady_fields(
    n: int,
    history: Sequence[Mapping[str, np.ndarray]],
    cm_range: object,
    options: MetricsOptions,
) -> dict[str, object]:
    """``center_mean_step_before`` (see :class:`LineMetrics`) for a line of ``n`` pixels;
    ``history`` oldest first, the previous line last; rows of another pixel count are
    ignored."""
    hist = [h for h in history if h["center_mean_hz"].shape[0] == n]
    if len(hist) < 2 or not isinstance(cm_range, tuple):
        return {}
    refs = hist[:-1][-options.reference_lines :]
    got = _range_against(hist[-1], refs, {"center_mean": cm_range}, 0.0)
    return {} if "center_mean" not in got else {"center_mean_step_before": got["center_mean"]}


def change_fields(
    rows: Mapping[str, np.ndarray],
    prev: Mapping[str, np.ndarray],
    direction: str,
    options: MetricsOptions,
) -> dict[str, object]:
    b, bp = rows["field_nv_t"], prev["field_nv_t"]
    if bp.shape != b.shape:
        return {}
    n = b.shape[0]
    out: dict[str, object] = {}
    db = b - bp
    sigma_d = np.hypot(rows["field_nv_sigma_t"], prev["field_nv_sigma_t"])
    finite = np.isfinite(db) & np.isfinite(sigma_d)
    out["field_change_median_t"] = nanmedian(np.abs(db))
    if finite.any():
        big = np.abs(db[finite]) > options.change_sigma * sigma_d[finite]
        out["field_change_fraction"] = float(np.mean(big))
    with np.errstate(invalid="ignore", divide="ignore"):
        pl_ratio = rows["pl_per_s"] / prev["pl_per_s"] - 1.0
    pl_ratio = np.where(np.isfinite(pl_ratio), np.clip(pl_ratio, -1.0, 1.0), np.nan)
    d_cm = rows["center_mean_hz"] - prev["center_mean_hz"]
    out["pl_change_median"] = nanmedian(pl_ratio)
    out["center_mean_change_median_hz"] = nanmedian(d_cm)

    order = _acquisition_order(direction, rows["x_m"])
    k = options.min_step_pixels
    pl_seg = best_level_segment(pl_ratio[order], k)
    out.update(_step_fields("pl", pl_seg, order, n))
    pl_range = out.get("pl_step_range")
    if isinstance(pl_range, tuple):
        out["pl_step_level_per_s"] = nanmedian(rows["pl_per_s"][pl_range[0] : pl_range[1]])
    # The common-mode shift, over ranges down to min_level_pixels (a touch can be that
    # narrow), each pixel weighted by the noise the fits and the sample's own field
    # change give it: strain or heat from a touch moves D, i.e. (f₋+f₊)/2, and leaves
    # B∥ alone, while a wall that moves changes B⊥ *and* B∥ (common_mode_sigma).
    cm_sigma = common_mode_sigma(rows, prev, options.transverse_change_ratio)
    cm_seg = best_level_segment(d_cm[order], options.min_level_pixels, cm_sigma[order])
    out.update(_step_fields("center_mean", cm_seg, order, n))
    e_now = _roughness(b[order], rows["field_nv_sigma_t"][order])
    e_prev = _roughness(bp[order], prev["field_nv_sigma_t"][order])
    # What noise alone puts into one pixel's roughness term: 2σ² of the line (T²).
    noise = 2.0 * nanmedian(prev["field_nv_sigma_t"]) ** 2
    noise = noise if np.isfinite(noise) else 0.0
    out.update(_step_fields("field", best_energy_segment(e_now, e_prev, k, noise), order, n))
    return out
