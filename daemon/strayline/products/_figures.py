"""Quick-look figures of a trace: matplotlib's object API on the Agg canvas.

No pyplot: figures are built as :class:`matplotlib.figure.Figure` objects that no global
registry holds, so nothing stays open after a product is written and no display is
needed. Colour scales are robust (1st–99th percentile), the field scale is diverging and
centred on the map's median (or on zero for the reconstructed components, whose mean is
not measurable), the status map is categorical with a legend. Pixels whose two resonances
merged into one dip are a measurement too, an upper bound on |B∥|
(:func:`strayline.field.merged_field_bound_t`): both panels show them as "below
resolution" in one neutral colour, not as failures.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Literal

import numpy as np
from matplotlib import colormaps
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import BoundaryNorm, Colormap, ListedColormap
from matplotlib.figure import Figure
from matplotlib.image import AxesImage
from matplotlib.patches import Patch

from strayline.fit import FitStatus
from strayline.products._maps import TraceMaps, VectorField, contrast_map
from strayline.store import STATUS_FILL

__all__ = ["BELOW_RESOLUTION_LABEL", "quicklook_figure", "save_png", "vector_figure"]

_DPI = 110
# Pixels below resolution (status MERGED): a neutral blue-grey, apart from the field's
# diverging scale, from the light grey of "no value" and from the failures' colours.
_BELOW_RESOLUTION_COLOUR = "#90a4ae"
BELOW_RESOLUTION_LABEL = "below resolution (|B∥| < bound)"
_STATUS_COLOURS = {
    int(FitStatus.OK): "#2e7d32",
    int(FitStatus.NO_RESONANCE): "#c62828",
    int(FitStatus.MERGED): _BELOW_RESOLUTION_COLOUR,
    int(FitStatus.AT_BOUND): "#6a1b9a",
    int(FitStatus.NOT_CONVERGED): "#ef6c00",
    int(FitStatus.LOW_COUNTS): "#37474f",
    int(FitStatus.ONE_RESONANCE): "#0277bd",
    int(FitStatus.AMBIGUOUS): "#8d6e63",
    STATUS_FILL: "#e0e0e0",
}
_STATUS_LABELS = {int(s): s.name.lower().replace("_", " ") for s in FitStatus} | {
    int(FitStatus.MERGED): "below resolution (merged dips)",
    STATUS_FILL: "not written",
}
# Drawn width of one map panel, inches: 12.5 in × (0.86 − 0.07) / (2 + wspace 0.42).
_PANEL_W_IN = 4.08
# Stretching a map more than this (physical aspect ratio) gets an unequal-aspect plot.
_MAX_ASPECT = 4.0


def _with_bad(name: str) -> Colormap:
    """The named colormap, with NaN (no measurement) drawn light grey."""
    return colormaps[name].with_extremes(bad="#bdbdbd")


def _extent_um(trace: TraceMaps) -> tuple[float, float, float, float]:
    """imshow extent (left, right, bottom, top) in µm, pixel edges around the centres."""
    py, px = trace.pixel_m
    x, y = trace.x_m, trace.y_m
    return (
        (x[0] - px / 2) * 1e6,
        (x[-1] + px / 2) * 1e6,
        (y[0] - py / 2) * 1e6,
        (y[-1] + py / 2) * 1e6,
    )


def _aspect(trace: TraceMaps) -> Literal["equal", "auto"]:
    left, right, bottom, top = _extent_um(trace)
    ratio = abs(right - left) / max(abs(top - bottom), 1e-12)
    return "equal" if 1 / _MAX_ASPECT <= ratio <= _MAX_ASPECT else "auto"


def _figure(trace: TraceMaps) -> tuple[Figure, np.ndarray]:
    """A 2 × 2 panel figure whose height follows the map's shape (no empty bands).

    Margins are fixed rather than solved by a layout engine: rendering takes about half
    the time, which matters because the daemon draws these between two lines.
    """
    left, right, bottom, top = _extent_um(trace)
    tall = abs(top - bottom) / max(abs(right - left), 1e-12)
    if _aspect(trace) == "auto":
        tall = 0.5
    map_h = min(max(_PANEL_W_IN * tall, 1.6), 5.5)
    gap_in = 1.0  # titles above and axis labels below a map
    height = 2 * map_h + gap_in + 1.0 + 0.7
    fig = Figure(figsize=(12.5, height), dpi=_DPI)
    FigureCanvasAgg(fig)
    axes = fig.subplots(
        2,
        2,
        gridspec_kw={
            "left": 0.07,
            "right": 0.86,
            "bottom": 0.7 / height,
            "top": 1.0 - 1.0 / height,
            "wspace": 0.42,
            "hspace": gap_in / map_h,
        },
    )
    return fig, axes


def _robust_range(values: np.ndarray) -> tuple[float, float] | None:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return None
    lo, hi = np.percentile(finite, [1.0, 99.0])
    if hi <= lo:
        pad = max(abs(float(lo)) * 1e-3, 1e-30)
        return float(lo) - pad, float(hi) + pad
    return float(lo), float(hi)


def field_unit(half_range_t: float) -> tuple[str, float]:
    """Unit label and scale for a field map: mT from a 1 mT half-range, else µT."""
    return ("mT", 1e3) if half_range_t >= 1e-3 else ("µT", 1e6)


def _diverging_limits(values: np.ndarray, centre: float | None) -> tuple[float, float]:
    """(centre, half range) of a symmetric colour scale covering the 1st–99th percentile.

    The centre is ``centre`` or, when None, the median of the finite values.
    """
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return (0.0 if centre is None else centre), 1e-9
    mid = float(np.median(finite)) if centre is None else centre
    lo, hi = np.percentile(finite, [1.0, 99.0])
    return mid, max(abs(float(hi) - mid), abs(mid - float(lo)), 1e-12)


def _colorbar(ax: Axes, image: AxesImage, label: str) -> None:
    """A colour bar exactly as tall as the drawn map, just right of it."""
    cax = ax.inset_axes((1.03, 0.0, 0.04, 1.0))
    ax.figure.colorbar(image, cax=cax, label=label)


def _label_axes(ax: Axes, title: str) -> None:
    ax.set_title(title, fontsize=10)
    ax.set_xlabel("x (µm)")
    ax.set_ylabel("y (µm)")


def _field_panel(
    ax: Axes, trace: TraceMaps, values_t: np.ndarray, *, name: str, centre: float | None
) -> None:
    """A field map on a diverging scale, in µT or mT as its spread asks."""
    mid, half = _diverging_limits(values_t, centre)
    unit, scale = field_unit(half)
    image = ax.imshow(
        values_t * scale,
        origin="lower",
        extent=_extent_um(trace),
        aspect=_aspect(trace),
        cmap=_with_bad("RdBu_r"),
        vmin=(mid - half) * scale,
        vmax=(mid + half) * scale,
        interpolation="nearest",
    )
    _colorbar(ax, image, f"{name} ({unit})")
    title = (
        name if centre is not None else f"{name}, centred on the median {mid * scale:.4g} {unit}"
    )
    _label_axes(ax, title)


def _below_resolution(ax: Axes, trace: TraceMaps) -> None:
    """Draw the pixels below resolution (status MERGED) over a field panel in the neutral
    colour, with a legend entry giving the median of their bound on |B∥|."""
    merged = trace.committed[:, None] & (np.asarray(trace.maps["status"]) == FitStatus.MERGED)
    if not np.any(merged):
        return
    ax.imshow(
        np.where(merged, 1.0, np.nan),
        origin="lower",
        extent=_extent_um(trace),
        aspect=_aspect(trace),
        cmap=ListedColormap([_BELOW_RESOLUTION_COLOUR]),
        interpolation="nearest",
    )
    bound = np.asarray(trace.maps["field_nv_bound_t"])[merged]
    bound = bound[np.isfinite(bound)]
    label = BELOW_RESOLUTION_LABEL
    if bound.size:
        median = float(np.median(bound))
        unit, scale = field_unit(median)
        label = f"below resolution (|B∥| < bound, median {median * scale:.3g} {unit})"
    ax.legend(
        handles=[Patch(facecolor=_BELOW_RESOLUTION_COLOUR, label=label)],
        loc="lower left",
        fontsize=7,
        framealpha=0.85,
    )


def _scalar_panel(
    ax: Axes, trace: TraceMaps, values: np.ndarray, *, title: str, label: str, cmap: str
) -> None:
    """A positive quantity on a sequential scale from its 1st to 99th percentile."""
    limits = _robust_range(values)
    vmin, vmax = limits if limits is not None else (0.0, 1.0)
    image = ax.imshow(
        values,
        origin="lower",
        extent=_extent_um(trace),
        aspect=_aspect(trace),
        cmap=_with_bad(cmap),
        vmin=vmin,
        vmax=vmax,
        interpolation="nearest",
    )
    _colorbar(ax, image, label)
    _label_axes(ax, title)


def _status_panel(ax: Axes, trace: TraceMaps) -> None:
    """Fit status codes in categorical colours, with a legend of the codes present."""
    codes = sorted(_STATUS_COLOURS)
    cmap = ListedColormap([_STATUS_COLOURS[c] for c in codes])
    bounds = [*(c - 0.5 for c in codes), codes[-1] + 0.5]
    norm = BoundaryNorm(bounds, cmap.N)
    status = np.asarray(trace.maps["status"]).astype(np.int64)
    ax.imshow(
        status,
        origin="lower",
        extent=_extent_um(trace),
        aspect=_aspect(trace),
        cmap=cmap,
        norm=norm,
        interpolation="nearest",
    )
    total = status.size
    handles = []
    for code in codes:
        count = int(np.count_nonzero(status == code))
        if count:
            label = f"{_STATUS_LABELS[code]} ({100.0 * count / total:.1f} %)"
            handles.append(Patch(facecolor=_STATUS_COLOURS[code], label=label))
    ax.legend(
        handles=handles,
        loc="upper left",
        bbox_to_anchor=(1.02, 1.0),
        fontsize=8,
        frameon=False,
        title="fit status",
        title_fontsize=8,
    )
    _label_axes(ax, "Fit status")


def quicklook_figure(trace: TraceMaps, scan_id: str) -> Figure:
    """Four panels: B_NV (diverging, median-centred; pixels below resolution in a neutral
    colour), PL rate, contrast, fit status."""
    fig, axes = _figure(trace)
    _field_panel(axes[0, 0], trace, trace.maps["field_nv_t"], name="B along NV", centre=None)
    _below_resolution(axes[0, 0], trace)
    _scalar_panel(
        axes[0, 1],
        trace,
        trace.maps["pl_rate_cps"] / 1e3,
        title="Photoluminescence rate (off resonance)",
        label="PL (kcounts/s)",
        cmap="magma",
    )
    _scalar_panel(
        axes[1, 0],
        trace,
        100.0 * contrast_map(trace),
        title="ODMR contrast (mean of the fitted dips)",
        label="contrast (%)",
        cmap="viridis",
    )
    _status_panel(axes[1, 1], trace)
    fig.suptitle(
        f"{scan_id} — {trace.direction} trace, {trace.n_lines_committed} of {trace.shape[0]} "
        f"lines × {trace.shape[1]} pixels",
        fontsize=12,
    )
    return fig


def vector_figure(
    trace: TraceMaps, vector: VectorField, scan_id: str, standoff_m: float | None
) -> Figure:
    """Bx, By, Bz (zero-centred) and, with a standoff, m_z; filled pixels shaded grey."""
    panels = 4 if vector.m_z_a is not None and standoff_m is not None else 3
    fig, grid = _figure(trace)
    axes = grid.ravel()
    for ax, values, name in zip(axes, vector.b_xyz_t, ("Bx", "By", "Bz"), strict=False):
        _field_panel(ax, trace, values, name=name, centre=0.0)
    if vector.m_z_a is not None and standoff_m is not None:
        _sheet_panel(axes[3], trace, vector.m_z_a, standoff_m)
    overlay = np.where(vector.filled, 1.0, np.nan)
    for ax in axes[:panels]:
        ax.imshow(
            overlay,
            origin="lower",
            extent=_extent_um(trace),
            aspect=_aspect(trace),
            cmap=ListedColormap(["#616161"]),
            alpha=0.6,
            interpolation="nearest",
        )
    for ax in axes[panels:]:
        ax.set_visible(False)
    filled = 100.0 * float(np.mean(vector.filled))
    fig.suptitle(
        f"{scan_id} — {trace.direction} trace: field vector reconstructed from B along NV\n"
        f"(uniform parts not recoverable; {filled:.1f} % of pixels filled in, shaded grey)",
        fontsize=11,
    )
    return fig


def _sheet_panel(ax: Axes, trace: TraceMaps, m_z_a: np.ndarray, standoff_m: float) -> None:
    """Sheet moment density on a zero-centred diverging scale, mA."""
    _, half = _diverging_limits(m_z_a, 0.0)
    image = ax.imshow(
        m_z_a * 1e3,
        origin="lower",
        extent=_extent_um(trace),
        aspect=_aspect(trace),
        cmap=_with_bad("PuOr_r"),
        vmin=-half * 1e3,
        vmax=half * 1e3,
        interpolation="nearest",
    )
    _colorbar(ax, image, "m_z (mA)")
    _label_axes(ax, f"Sheet moment m_z (out-of-plane, d = {standoff_m * 1e9:.0f} nm, mean lost)")


def save_png(fig: Figure, path: Path) -> None:
    """Render ``fig`` to ``path`` atomically (temporary name in the folder, then rename)."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        fig.savefig(tmp, format="png", dpi=_DPI)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
