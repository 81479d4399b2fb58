"""Per-line numbers the rules look at: :class:`LineMetrics`.

Pure functions over the stage records (:class:`~strayline.lines.ScanLine`,
:class:`~strayline.fit.LineFit`, :class:`~strayline.field.LineField`); no I/O, no clock.

Line-to-line comparisons are made at the same pixel against the previous line of the
*same direction* (a backward trace is compared with the previous backward trace). The
per-pixel rows needed for that are produced by :func:`comparison_rows`; they hold exactly the
quantities the scan store keeps (field, PL rate, centre mean and their 1σ), so after a
restart the caller can rebuild them from the store. :class:`MetricsTracker` does that
bookkeeping for a running daemon.

Step search (see :mod:`strayline.rules._steps`): three channels are searched, in
acquisition order, for the pixel range that changed most against the previous line —

- ``pl``: relative PL change, ``PL_now / PL_prev − 1``;
- ``center_mean``: shift of (f₋ + f₊)/2, Hz (common mode: temperature, strain);
- ``field``: log ratio of the field's fast-axis roughness, ``Σ (ΔₓB)²`` with the noise
  floor removed. The stray field of a thin magnetic film is the source pattern low-pass
  filtered by ``exp(−k d)`` (Beardsley 1989, eq. for the Fourier-space field; PHYSICS.md
  §4), so raising the stand-off d by δ scales every Fourier component by ``exp(−k δ)`` and
  the roughness falls from the pixel where it happened; a wall that moves carries its
  roughness with it and leaves the sums unchanged.

Confirmation against a reference: a step found against the previous line may be the
previous line's oddity, or a sample feature that moved. The tracker therefore keeps the
last few lines of each direction; the per-pixel median of ``reference_lines`` of them is a
reference that one odd line cannot move. Each step range is measured again against the
reference of the lines up to the previous one (``{ch}_step_ref``), and the next line is
measured over that same range against the reference from *before* the step
(``{ch}_step_held``): the rules raise a step only when it is still there, with the same
sign and a comparable size (or when it has cleanly reverted: a touched sample).

Acquisition order: forward lines are acquired toward increasing x, backward lines toward
decreasing x, whatever order the arrays are stored in. Reported ranges are in storage
indices, half-open, and ``*_step_first_pixel`` is the first pixel acquired in the range.

References
----------
.. [1] J. A. Beardsley, "Reconstruction of the magnetization in a thin film by a
   combination of Lorentz microscopy and external field measurements", IEEE Trans. Magn.
   25, 671 (1989).
"""

from __future__ import annotations

from collections import deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields
from types import MappingProxyType

import numpy as np

from strayline._numbers import median, median_and_spread
from strayline.field import LineField
from strayline.fit import FitStatus, LineFit
from strayline.lines import ScanLine
from strayline.rules._step_features import (
    MetricsOptions,
    change_fields,
    common_mode_sigma,
    nanmedian,
    reference_fields,
    row_mean,
    steady_fields,
)

__all__ = [
    "ROW_KEYS",
    "LineMetrics",
    "MetricsOptions",
    "MetricsTracker",
    "common_mode_sigma",
    "comparison_rows",
    "field_perp",
    "line_metrics",
    "metric_names",
    "unexplained_failures",
]


#: Keys of the per-pixel rows kept from one line to compare the next (all shape (n_pixels,)).
ROW_KEYS = (
    "field_nv_t",
    "field_nv_sigma_t",
    "field_perp_t",
    "pl_per_s",
    "pl_sigma_per_s",
    "center_mean_hz",
    "center_mean_sigma_hz",
    "x_m",
)

_STEP_CHANNELS = ("pl", "center_mean", "field")

_AUX_STATS = ("median", "p10", "p90", "min", "max", "spread")


def unexplained_failures(
    fit: LineFit, freq_hz: np.ndarray, center_mean_hz: np.ndarray
) -> np.ndarray:
    """Pixels whose fit failed for no reason the sample itself gives, shape (n_pixels,).

    Not failures of the measurement: OK; MERGED (|B∥| below resolution, a bound is
    reported: the field is small there); AMBIGUOUS (two dips fitted, the hyperfine
    component in doubt); ONE_RESONANCE where the partner's mirror image about D lies
    outside the sweep (the field moved it out of the window). D is taken as the median
    (f₋ + f₊)/2 of the line's OK pixels (``center_mean_hz``); the transverse field lifts
    that by 3(γB⊥)²/(2D) at most a few MHz (PHYSICS.md §2), small against a sweep edge.
    """
    status = np.asarray(fit.status)
    measured = np.isin(status, (FitStatus.OK, FitStatus.MERGED, FitStatus.AMBIGUOUS))
    one = status == FitStatus.ONE_RESONANCE
    d_hz = nanmedian(np.where(status == FitStatus.OK, center_mean_hz, np.nan))
    if np.any(one) and np.isfinite(d_hz):
        mirror = 2.0 * d_hz - np.asarray(fit.center_hz)[:, 0]
        outside = (mirror < float(freq_hz[0])) | (mirror > float(freq_hz[-1]))
        measured |= one & outside
    return ~measured


@dataclass(frozen=True)
class LineMetrics:
    """Numbers describing one processed line (NaN where a value cannot be computed).

    Identity: ``scan_id``, ``line_index``, ``direction``, ``n_lines_planned``, ``n_pixels``,
    ``end_time_s`` (line end, POSIX s, UTC).

    Levels (over the line's pixels): ``pl_median_per_s`` and ``pl_p10_per_s`` (PL rate =
    fitted baseline / dwell, counts/s), ``contrast_median`` and ``contrast_mean``
    (fraction; pixels whose fit found no dip count as 0; the mean, each pixel clipped to
    [0, 1], moves smoothly where about half of a weak line's dips go undetected, where the
    median jumps between the dips' depth and 0), ``fwhm_median_hz``,
    ``fit_failure_fraction`` (fits that failed for no reason the sample gives,
    :func:`unexplained_failures`),
    ``field_median_t`` and ``field_spread_t`` (1.4826·MAD), ``center_mean_median_hz``
    ((f₋+f₊)/2), ``chi2_red_median``, ``field_sigma_median_t`` (fit-reported 1σ),
    ``center_mean_p10_hz`` (10th percentile of (f₋+f₊)/2 over the line's good fits: a
    field transverse to the NV axis only raises (f₋+f₊)/2, by about 3(γB⊥)²/(2D) [num,
    PHYSICS.md §2], so the lowest centres of a line track D with the least bias from the
    sample's field).

    Against the previous line of the same direction, at the same pixel:
    ``field_change_median_t`` (median |ΔB|), ``field_change_fraction`` (fraction of pixels
    with |ΔB| above ``change_sigma`` σ of the difference), ``pl_change_median`` (signed
    median of PL_now/PL_prev − 1), ``center_mean_change_median_hz`` (signed median).

    Steps (see module notes): for channel in (``pl``, ``center_mean``, ``field``):
    ``{ch}_step`` (value of the changed range: relative PL change; Hz; log roughness
    ratio), ``{ch}_step_score``, ``{ch}_step_range`` (storage indices, half-open, or None),
    ``{ch}_step_first_pixel`` (first acquired pixel of the range, -1 if none),
    ``{ch}_step_to_end`` (1.0 if the range runs to the end of the acquisition, else 0.0).
    ``pl_step_level_per_s``: median PL over the PL step range.
    ``center_mean_step_before``: the previous line over this line's common-mode step range
    against the reference of the lines before it (Hz; NaN without them): near 0 when the
    pixels were steady before the step, comparable with the step when the common mode
    there was already moving (a feature coming into view).

    Against a *reference* (per pixel, the median of the last ``reference_lines`` lines of
    the same direction before the line it is compared with; see module notes):
    ``{ch}_step_ref``, the value of this line's own step range against the reference of
    the lines up to the previous one (a step that only undoes an odd previous line is
    near 0 here); ``{ch}_step_held``, the value of this line over the *previous* line's
    step range against the reference of the lines before the previous one, i.e. from
    before that step (a tip event keeps its value; a transient returns to 0; a feature
    that moves on does not keep the same value over the same pixels). Same units as
    ``{ch}_step``; NaN without a range or a reference.

    Timing: ``time_since_previous_s`` (end of this line − end of the line before, any
    direction).

    ``aux_stats``: per auxiliary channel, ``median``, ``p10``, ``p90``, ``min``, ``max``,
    ``spread`` in the channel's unit (``aux_units``).
    """

    scan_id: str
    line_index: int
    direction: str
    n_lines_planned: int
    n_pixels: int
    end_time_s: float
    pl_median_per_s: float
    pl_p10_per_s: float
    contrast_median: float
    contrast_mean: float
    fwhm_median_hz: float
    fit_failure_fraction: float
    field_median_t: float
    field_spread_t: float
    center_mean_median_hz: float
    chi2_red_median: float
    field_sigma_median_t: float
    center_mean_p10_hz: float = float("nan")
    time_since_previous_s: float = float("nan")
    field_change_median_t: float = float("nan")
    field_change_fraction: float = float("nan")
    pl_change_median: float = float("nan")
    center_mean_change_median_hz: float = float("nan")
    pl_step: float = float("nan")
    pl_step_score: float = float("nan")
    pl_step_range: tuple[int, int] | None = None
    pl_step_first_pixel: int = -1
    pl_step_to_end: float = float("nan")
    pl_step_level_per_s: float = float("nan")
    center_mean_step: float = float("nan")
    center_mean_step_score: float = float("nan")
    center_mean_step_range: tuple[int, int] | None = None
    center_mean_step_first_pixel: int = -1
    center_mean_step_to_end: float = float("nan")
    center_mean_step_before: float = float("nan")
    field_step: float = float("nan")
    field_step_score: float = float("nan")
    field_step_range: tuple[int, int] | None = None
    field_step_first_pixel: int = -1
    field_step_to_end: float = float("nan")
    pl_step_ref: float = float("nan")
    pl_step_held: float = float("nan")
    center_mean_step_ref: float = float("nan")
    center_mean_step_held: float = float("nan")
    field_step_ref: float = float("nan")
    field_step_held: float = float("nan")
    aux_stats: Mapping[str, Mapping[str, float]] = field(
        default_factory=lambda: MappingProxyType({})
    )
    aux_units: Mapping[str, str] = field(default_factory=lambda: MappingProxyType({}))

    def value(self, name: str) -> float:
        """Numeric value by name: a float field, or ``aux.<channel>.<stat>``.

        Raises
        ------
        KeyError
            If the name is not a numeric metric of this line.
        """
        if name.startswith("aux."):
            _, channel, stat = name.split(".", 2)
            return float(self.aux_stats[channel][stat])
        if name not in _NUMERIC_FIELDS:
            raise KeyError(name)
        return float(getattr(self, name))

    def numeric(self) -> dict[str, float]:
        """All numeric metrics by name (float fields and ``aux.<channel>.<stat>``)."""
        out = {name: float(getattr(self, name)) for name in _NUMERIC_FIELDS}
        for channel, stats in self.aux_stats.items():
            for stat, v in stats.items():
                out[f"aux.{channel}.{stat}"] = float(v)
        return out


_NUMERIC_FIELDS = tuple(f.name for f in fields(LineMetrics) if f.type in ("float", "int"))


def metric_names() -> tuple[str, ...]:
    """Names of the numeric :class:`LineMetrics` fields a rule may refer to."""
    return _NUMERIC_FIELDS


def comparison_rows(line: ScanLine, fit: LineFit, field_: LineField) -> dict[str, np.ndarray]:
    """Per-pixel rows of one line, kept to compare the next line of the same direction.

    Returns
    -------
    dict
        Keys :data:`ROW_KEYS`, each an ndarray of shape (n_pixels,): ``field_nv_t`` and
        ``field_nv_sigma_t`` (T), ``field_perp_t`` (field across the NV axis,
        |B|·|sin θ|, T; NaN without two resonances), ``pl_per_s`` and ``pl_sigma_per_s`` (counts/s),
        ``center_mean_hz`` and ``center_mean_sigma_hz`` (Hz), ``x_m`` (m). Field and
        centre rows are NaN where the fit status is not OK: a failed fit's resonances
        are not a measurement, and one such pixel would otherwise dominate the next
        line's roughness comparison.
    """
    dwell_s = float(line.dwell_s)
    ok = np.asarray(fit.status) == FitStatus.OK
    return {
        "field_nv_t": np.where(ok, np.asarray(field_.field_nv_t, dtype=float), np.nan),
        "field_nv_sigma_t": np.asarray(field_.field_nv_sigma_t, dtype=float).copy(),
        "field_perp_t": field_perp(field_.field_abs_t, field_.angle_rad, ok),
        "pl_per_s": np.asarray(fit.baseline, dtype=float) / dwell_s,
        "pl_sigma_per_s": np.asarray(fit.baseline_sigma, dtype=float) / dwell_s,
        "center_mean_hz": np.where(ok, np.asarray(field_.center_mean_hz, dtype=float), np.nan),
        "center_mean_sigma_hz": np.asarray(field_.center_mean_sigma_hz, dtype=float).copy(),
        "x_m": np.asarray(line.x_m, dtype=float).copy(),
    }


def field_perp(field_abs_t: np.ndarray, angle_rad: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """Field across the NV axis, |B|·|sin θ| (T), NaN where ``ok`` is False."""
    perp = np.asarray(field_abs_t, dtype=float) * np.abs(np.sin(np.asarray(angle_rad, float)))
    return np.where(ok, perp, np.nan)


def _nanpercentile(a: np.ndarray, q: float) -> float:
    a = a[np.isfinite(a)]
    return float(np.percentile(a, q)) if a.size else float("nan")


def _nanmean(a: np.ndarray) -> float:
    a = a[np.isfinite(a)]
    return float(np.mean(a)) if a.size else float("nan")


def _spread(a: np.ndarray) -> float:
    a = a[np.isfinite(a)]
    if a.size == 0:
        return float("nan")
    return median_and_spread(a)[1]


def _aux_stats(line: ScanLine) -> dict[str, Mapping[str, float]]:
    out: dict[str, Mapping[str, float]] = {}
    for name, values in line.aux.items():
        v = np.asarray(values, dtype=float)
        finite = v[np.isfinite(v)]
        stats = dict.fromkeys(_AUX_STATS, float("nan"))
        if finite.size:
            stats.update(
                median=median(finite),
                p10=float(np.percentile(finite, 10)),
                p90=float(np.percentile(finite, 90)),
                min=float(finite.min()),
                max=float(finite.max()),
                spread=_spread(finite),
            )
        out[name] = MappingProxyType(stats)
    return out


def line_metrics(
    line: ScanLine,
    fit: LineFit,
    field: LineField,
    previous: LineMetrics | None = None,
    previous_rows: Mapping[str, np.ndarray] | None = None,
    *,
    options: MetricsOptions | None = None,
    older_rows: Sequence[Mapping[str, np.ndarray]] = (),
    previous_ranges: Mapping[str, tuple[int, int] | None] | None = None,
) -> LineMetrics:
    """Compute the metrics of one line.

    Parameters
    ----------
    line, fit, field
        The line's records; arrays of shape (n_pixels,) or (n_pixels, 2).
    previous : LineMetrics, optional
        Metrics of the line processed just before (any direction): gives
        ``time_since_previous_s``.
    previous_rows : mapping, optional
        :func:`comparison_rows` of the previous line of the *same direction*: gives the
        line-to-line changes and steps. Ignored if its pixel count differs.
    options : MetricsOptions, optional
        Defaults to ``MetricsOptions()``.
    older_rows : sequence of mappings, optional
        :func:`comparison_rows` of the lines of the same direction before ``previous_rows``,
        oldest first: with ``previous_rows`` they form the references of
        ``{ch}_step_ref`` and ``{ch}_step_held``.
    previous_ranges : mapping, optional
        Step ranges (``{ch}_step_range`` by channel ``pl``, ``center_mean``, ``field``) of
        the line ``previous_rows`` belongs to: where ``{ch}_step_held`` is measured.

    Returns
    -------
    LineMetrics
    """
    opts = options or MetricsOptions()
    rows = comparison_rows(line, fit, field)
    status = np.asarray(fit.status)
    ok = status == FitStatus.OK
    pl = rows["pl_per_s"]
    contrast = row_mean(fit.contrast)
    contrast = np.where(status == FitStatus.NO_RESONANCE, 0.0, contrast)
    fwhm = row_mean(fit.fwhm_hz)
    center_ok = np.where(ok, rows["center_mean_hz"], np.nan)
    b = np.where(ok, rows["field_nv_t"], np.nan)
    end_time_s = line.end_time.timestamp()
    values: dict[str, object] = {
        "scan_id": line.scan_id,
        "line_index": int(line.line_index),
        "direction": line.direction,
        "n_lines_planned": int(line.n_lines_planned),
        "n_pixels": int(line.n_pixels),
        "end_time_s": end_time_s,
        "pl_median_per_s": nanmedian(pl),
        "pl_p10_per_s": _nanpercentile(pl, 10.0),
        "contrast_median": nanmedian(contrast),
        "contrast_mean": _nanmean(np.clip(contrast, 0.0, 1.0)),
        "fwhm_median_hz": nanmedian(np.where(ok, fwhm, np.nan)),
        "fit_failure_fraction": (
            float(np.mean(unexplained_failures(fit, line.freq_hz, rows["center_mean_hz"])))
            if ok.size
            else float("nan")
        ),
        "field_median_t": nanmedian(b),
        "field_spread_t": _spread(b),
        "center_mean_median_hz": nanmedian(center_ok),
        "center_mean_p10_hz": _nanpercentile(center_ok, 10.0),
        "chi2_red_median": nanmedian(np.where(ok, fit.chi2_red, np.nan)),
        "field_sigma_median_t": nanmedian(np.where(ok, rows["field_nv_sigma_t"], np.nan)),
        "aux_stats": MappingProxyType(_aux_stats(line)),
        "aux_units": MappingProxyType(dict(line.aux_units)),
    }
    if previous is not None:
        values["time_since_previous_s"] = end_time_s - previous.end_time_s
    if previous_rows is not None:
        values.update(change_fields(rows, previous_rows, line.direction, opts))
        own = {ch: values.get(f"{ch}_step_range") for ch in _STEP_CHANNELS}
        before = {
            ch: None if previous_ranges is None else previous_ranges.get(ch)
            for ch in _STEP_CHANNELS
        }
        history = [*older_rows, previous_rows]
        values.update(reference_fields(rows, history, own, before, opts))  # type: ignore[arg-type]
        values.update(steady_fields(pl.shape[0], history, own["center_mean"], opts))
    return LineMetrics(**values)  # type: ignore[arg-type]


class MetricsTracker:
    """Keeps the previous line's metrics and, per direction, its last rows; not thread-safe.

    ``update(line, fit, field)`` returns the line's metrics and remembers what the next
    line needs: per direction, the rows of the last ``reference_lines + 1`` lines and the
    metrics of the last line. ``seed(...)`` restores the memory after a restart (rows from
    the store).
    One tracker per scan.
    """

    def __init__(self, options: MetricsOptions | None = None) -> None:
        self._options = options or MetricsOptions()
        self._previous: LineMetrics | None = None
        self._rows: dict[str, deque[dict[str, np.ndarray]]] = {}
        self._ranges: dict[str, dict[str, tuple[int, int] | None]] = {}

    def _history(self, direction: str) -> deque[dict[str, np.ndarray]]:
        return self._rows.setdefault(direction, deque(maxlen=self._options.reference_lines + 1))

    def update(self, line: ScanLine, fit: LineFit, field: LineField) -> LineMetrics:
        """Metrics of ``line`` against the remembered previous lines; then remember it."""
        history = self._history(line.direction)
        metrics = line_metrics(
            line,
            fit,
            field,
            self._previous,
            history[-1] if history else None,
            options=self._options,
            older_rows=list(history)[:-1],
            previous_ranges=self._ranges.get(line.direction),
        )
        self._previous = metrics
        self._ranges[line.direction] = {
            ch: getattr(metrics, f"{ch}_step_range") for ch in _STEP_CHANNELS
        }
        history.append(comparison_rows(line, fit, field))
        return metrics

    def seed(
        self,
        direction: str,
        rows: Mapping[str, np.ndarray],
        previous: LineMetrics | None = None,
    ) -> None:
        """Remember ``rows`` (keys :data:`ROW_KEYS`) as the last line of ``direction``.

        Calling it again for the same direction adds an older-to-newer history (the
        rows given last are the last line): seeding the last ``reference_lines + 1``
        lines, oldest first, restores the references exactly. The step ranges of the
        last line are recomputed from its rows and the rows before it.
        """
        missing = [k for k in ROW_KEYS if k not in rows]
        if missing:
            raise ValueError(f"rows for direction {direction!r} lack keys {missing}")
        history = self._history(direction)
        history.append({k: np.asarray(rows[k], dtype=float) for k in ROW_KEYS})
        self._ranges.pop(direction, None)
        if len(history) >= 2:
            steps = change_fields(history[-1], history[-2], direction, self._options)
            ranges: dict[str, tuple[int, int] | None] = {}
            for ch in _STEP_CHANNELS:
                rng = steps.get(f"{ch}_step_range")
                ranges[ch] = rng if isinstance(rng, tuple) else None
            self._ranges[direction] = ranges
        if previous is not None:
            self._previous = previous
