"""Quick-look figures of a trace: matplotlib's object API on the Agg canvas.

No pyplot: figures are built as :class:`matplotlib.figure.Figure` objects that no global
registry holds, so nothing stays open after a product is written and no display is
needed. Colour scales are robust (:mod:`strayline.products._scales`): the field scale is
diverging and centred on the map's median (or on zero for the reconstructed components,
whose mean is not measurable), drawn as ΔB = B − median where the field is weak beside
its median; the PL scale comes from the lines that have fluorescence; the status map is
categorical with a legend whose shares are the report's (:func:`status_fractions`,
:func:`percent_text`). The title names the scan, trace, profile, lines done of those
planned, when the scan started and when the picture was drawn (local time, ISO 8601 with
its UTC offset); a line where an alert was raised is marked at the maps' right edge
(◀, coloured by severity). Pixels whose two resonances
merged into one dip are a measurement too, an upper bound on |B∥|
(:func:`strayline.field.merged_field_bound_t`): both panels show them as "below
resolution" in one neutral colour, not as failures.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Literal

import numpy as np
from matplotlib import colormaps
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import BoundaryNorm, Colormap, ListedColormap
from matplotlib.figure import Figure
from matplotlib.image import AxesImage
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.transforms import blended_transform_factory

from strayline.alerts import SEVERITY_ORDER
from strayline.fit import FitStatus
from strayline.products._maps import TraceMaps, VectorField, contrast_map
from strayline.products._marks import AlertMark
from strayline.products._report import percent_text, status_fractions
from strayline.products._scales import field_scale, field_unit, pl_scale, robust_range
from strayline.store import STATUS_FILL

__all__ = [
    "BELOW_RESOLUTION_LABEL",
    "NO_STANDOFF_TEXT",
    "QUICKLOOK_MAPS",
    "FigureHeading",
    "quicklook_figure",
    "save_png",
    "vector_figure",
]

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
}
#: The store maps :func:`quicklook_figure` draws from (a live picture reads only these).
QUICKLOOK_MAPS = (
    "field_nv_t",
    "field_nv_bound_t",
    "pl_rate_cps",
    "contrast_lo",
    "contrast_hi",
    "status",
)
#: Marker colours of the lines where an alert was raised, by severity.
_SEVERITY_COLOURS = {"info": "#1e88e5", "warning": "#fb8c00", "critical": "#d50000"}
NO_STANDOFF_TEXT = (
    "Sheet moment m_z not computed:\nno NV-sample stand-off is configured\n"
    "(set products.standoff_nm, or pass --standoff-nm\nto strayline products)"
)
# Drawn width of one map panel, inches: 12.5 in × (0.86 − 0.07) / (2 + wspace 0.42).
_PANEL_W_IN = 4.08
# Stretching a map more than this (physical aspect ratio) gets an unequal-aspect plot.
_MAX_ASPECT = 4.0


@dataclass(frozen=True)
class FigureHeading:
    """What a figure's title says besides its trace.

    Attributes
    ----------
    scan_id : str
    profile : str or None
        The scan's sample-type profile (None: the base config).
    lines_planned : int or None
        Lines the scan plans (None: unknown, the trace's line range is shown instead).
    started : datetime or None
        When the scan's store was created (aware), if known.
    drawn : datetime
        When the picture is drawn (aware).
    live : bool
        A picture of a scan still running, redrawn as lines arrive.
    """

    scan_id: str
    profile: str | None
    lines_planned: int | None
    started: datetime | None
    drawn: datetime
    live: bool = False

    def lines(self, trace: TraceMaps, what: str | None = None) -> str:
        """The title for ``trace``: scan, trace, profile, lines done of those planned;
        then ``what`` the figure shows, if given; then when the scan started and when the
        picture was drawn (local time)."""
        planned = self.lines_planned if self.lines_planned is not None else trace.shape[0]
        profile = self.profile if self.profile is not None else "none (base config)"
        lines = [
            f"{self.scan_id} — {trace.direction} trace — profile {profile} — "
            f"{trace.n_lines_committed} of {planned} lines × {trace.shape[1]} pixels"
        ]
        if what is not None:
            lines.append(what)
        when = [] if self.started is None else [f"scan started {_local(self.started)}"]
        when.append(f"drawn {_local(self.drawn)}")
        lines.append(("live picture — " if self.live else "") + ", ".join(when))
        return "\n".join(lines)


def _local(moment: datetime) -> str:
    """``moment`` in the machine's local time, ISO 8601 with its UTC offset."""
    return moment.astimezone().isoformat(timespec="seconds")


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
    gap_in = 1.1  # titles (up to two lines) above and axis labels below a map
    top_in, bottom_in = 1.2, 0.9  # the two-line title; axis labels and the marks' key
    height = 2 * map_h + gap_in + top_in + bottom_in
    fig = Figure(figsize=(12.5, height), dpi=_DPI)
    FigureCanvasAgg(fig)
    axes = fig.subplots(
        2,
        2,
        gridspec_kw={
            "left": 0.07,
            "right": 0.86,
            "bottom": bottom_in / height,
            "top": 1.0 - top_in / height,
            "wspace": 0.42,
            "hspace": gap_in / map_h,
        },
    )
    return fig, axes


def _colorbar(
    ax: Axes, image: AxesImage, label: str, extend: Literal["neither", "min"] = "neither"
) -> None:
    """A colour bar exactly as tall as the drawn map, just right of it."""
    cax = ax.inset_axes((1.03, 0.0, 0.04, 1.0))
    ax.figure.colorbar(image, cax=cax, label=label, extend=extend)


def _label_axes(ax: Axes, title: str) -> None:
    ax.set_title(title, fontsize=10)
    ax.set_xlabel("x (µm)")
    ax.set_ylabel("y (µm)")


def _field_panel(
    ax: Axes, trace: TraceMaps, values_t: np.ndarray, *, name: str, centre: float | None
) -> None:
    """A field map on a diverging scale, in µT or mT as its spread asks; where the field is
    weak beside its median, as ΔB = B − median (:func:`field_scale`), said in the colour
    bar's label and the title."""
    scale = field_scale(values_t, centre)
    mid, half = scale.centre_t, scale.half_range_t
    unit, factor = field_unit(half)
    shown, low = (values_t - mid, -half) if scale.relative else (values_t, mid - half)
    image = ax.imshow(
        shown * factor,
        origin="lower",
        extent=_extent_um(trace),
        aspect=_aspect(trace),
        cmap=_with_bad("RdBu_r"),
        vmin=low * factor,
        vmax=(low + 2 * half) * factor,
        interpolation="nearest",
    )
    median = _reference_text(mid, half)
    if scale.relative:
        _colorbar(ax, image, f"ΔB = {name} − {median} ({unit})")
        _label_axes(ax, f"{name}: ΔB from the median {median}")
    elif centre is not None:
        _colorbar(ax, image, f"{name} ({unit})")
        _label_axes(ax, name)
    else:
        _colorbar(ax, image, f"{name} ({unit})")
        _label_axes(ax, f"{name}, centred on the median {median}")


def _reference_text(centre_t: float, half_range_t: float) -> str:
    """The scale's centre in its own unit, to a hundredth of the half-range (so that
    "ΔB = B − 3.002 mT" names the reference as finely as the scale resolves)."""
    unit, factor = field_unit(centre_t)
    step = half_range_t * factor / 100.0
    decimals = min(max(0, -math.floor(math.log10(step))), 6) if step > 0 else 0
    return f"{centre_t * factor:.{decimals}f} {unit}"


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
        unit, factor = field_unit(median)
        label = f"below resolution (|B∥| < bound, median {median * factor:.3g} {unit})"
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
    limits = robust_range(values)
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


def _pl_panel(ax: Axes, trace: TraceMaps) -> None:
    """PL rate on a sequential scale from the lines that have fluorescence
    (:func:`pl_scale`); dark lines are drawn at its bottom and the title counts them."""
    values = np.asarray(trace.maps["pl_rate_cps"]) / 1e3
    scale = pl_scale(values, trace.committed)
    vmin, vmax = (scale.lo, scale.hi) if scale is not None else (0.0, 1.0)
    image = ax.imshow(
        values,
        origin="lower",
        extent=_extent_um(trace),
        aspect=_aspect(trace),
        cmap=_with_bad("magma"),
        vmin=vmin,
        vmax=vmax,
        interpolation="nearest",
    )
    dark = 0 if scale is None else scale.dark_lines
    _colorbar(ax, image, "PL (kcounts/s)", extend="min" if dark else "neither")
    title = "Photoluminescence rate (off resonance)"
    if dark:
        lines = "line" if dark == 1 else "lines"
        title += f"\nscale from the lines with fluorescence; {dark} dark {lines} below it"
    _label_axes(ax, title)


def _status_panel(ax: Axes, trace: TraceMaps) -> None:
    """Fit status codes in categorical colours, with a legend of the codes present; the
    shares are of the committed pixels, as in the report (:func:`status_fractions`,
    :func:`percent_text`)."""
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
    fractions = status_fractions(status[trace.committed])
    handles = [
        Patch(
            facecolor=_STATUS_COLOURS[int(member)],
            label=f"{_STATUS_LABELS[int(member)]} ({percent_text(fractions[member.name.lower()])})",
        )
        for member in FitStatus
        if fractions[member.name.lower()] > 0
    ]
    unwritten = trace.shape[0] - trace.n_lines_committed
    if unwritten:
        lines = "line" if unwritten == 1 else "lines"
        handles.append(
            Patch(
                facecolor=_STATUS_COLOURS[STATUS_FILL], label=f"not written ({unwritten} {lines})"
            )
        )
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


def _trace_marks(trace: TraceMaps, marks: Sequence[AlertMark]) -> dict[int, AlertMark]:
    """Per row of ``trace``, the most urgent mark on its line (rows with none left out)."""
    row_of = {int(index): row for row, index in enumerate(trace.line_index)}
    out: dict[int, AlertMark] = {}
    for mark in marks:
        row = row_of.get(mark.line_index)
        if row is None or not mark.on(trace.direction):
            continue
        if row not in out or mark.rank > out[row].rank:
            out[row] = mark
    return out


def _draw_marks(axes: Sequence[Axes], trace: TraceMaps, rows: dict[int, AlertMark]) -> None:
    """A ◀ at the right edge of each map, level with each marked line."""
    for ax in axes:
        edge = blended_transform_factory(ax.transAxes, ax.transData)
        for severity in SEVERITY_ORDER:
            ys = [trace.y_m[row] * 1e6 for row, m in rows.items() if m.severity == severity]
            if ys:
                ax.plot(
                    np.ones(len(ys)),
                    ys,
                    linestyle="none",
                    marker="<",
                    markersize=7,
                    markerfacecolor=_SEVERITY_COLOURS[severity],
                    markeredgecolor="black",
                    markeredgewidth=0.5,
                    transform=edge,
                    clip_on=False,
                    zorder=5,
                )


def _marks_key(fig: Figure, rows: dict[int, AlertMark]) -> None:
    """The markers' key below the maps: what ◀ means and the lines marked."""
    if not rows:
        return
    lines = sorted({m.line_index for m in rows.values()})
    shown = ", ".join(str(i) for i in lines[:12]) + (" …" if len(lines) > 12 else "")
    rules = ", ".join(sorted({m.rule for m in rows.values()}))
    handles = [
        Line2D(
            [],
            [],
            linestyle="none",
            marker="<",
            markersize=7,
            markerfacecolor=_SEVERITY_COLOURS[severity],
            markeredgecolor="black",
            markeredgewidth=0.5,
            label=severity,
        )
        for severity in SEVERITY_ORDER
        if any(m.severity == severity for m in rows.values())
    ]
    fig.legend(
        handles=handles,
        loc="lower left",
        bbox_to_anchor=(0.07, 0.0),
        ncols=len(handles) + 1,
        fontsize=8,
        frameon=False,
        title=f"◀ at a map's right edge: an alert raised at line {shown} ({rules})",
        title_fontsize=8,
        alignment="left",
    )


def quicklook_figure(
    trace: TraceMaps, heading: FigureHeading, marks: Sequence[AlertMark] = ()
) -> Figure:
    """Four panels: B_NV (diverging, median-centred, ΔB where weak; pixels below
    resolution in a neutral colour), PL rate (scaled by the lines with fluorescence),
    contrast, fit status; the lines where an alert was raised marked at the maps' edge."""
    fig, axes = _figure(trace)
    _field_panel(axes[0, 0], trace, trace.maps["field_nv_t"], name="B along NV", centre=None)
    _below_resolution(axes[0, 0], trace)
    _pl_panel(axes[0, 1], trace)
    _scalar_panel(
        axes[1, 0],
        trace,
        100.0 * contrast_map(trace),
        title="ODMR contrast (mean of the fitted dips)",
        label="contrast (%)",
        cmap="viridis",
    )
    _status_panel(axes[1, 1], trace)
    rows = _trace_marks(trace, marks)
    _draw_marks(list(axes.ravel()), trace, rows)
    _marks_key(fig, rows)
    fig.suptitle(heading.lines(trace), fontsize=11)
    return fig


def vector_figure(
    trace: TraceMaps, vector: VectorField, heading: FigureHeading, standoff_m: float | None
) -> Figure:
    """Bx, By, Bz (zero-centred) and m_z with a standoff, or in its place a panel saying
    no standoff is configured; filled pixels shaded grey."""
    fig, grid = _figure(trace)
    axes = grid.ravel()
    for ax, values, name in zip(axes, vector.b_xyz_t, ("Bx", "By", "Bz"), strict=False):
        _field_panel(ax, trace, values, name=name, centre=0.0)
    if vector.m_z_a is not None and standoff_m is not None:
        _sheet_panel(axes[3], trace, vector.m_z_a, standoff_m)
        shaded = axes
    else:
        axes[3].set_axis_off()
        axes[3].text(0.5, 0.5, NO_STANDOFF_TEXT, ha="center", va="center", fontsize=10, wrap=True)
        shaded = axes[:3]
    overlay = np.where(vector.filled, 1.0, np.nan)
    for ax in shaded:
        ax.imshow(
            overlay,
            origin="lower",
            extent=_extent_um(trace),
            aspect=_aspect(trace),
            cmap=ListedColormap(["#616161"]),
            alpha=0.6,
            interpolation="nearest",
        )
    filled = 100.0 * float(np.mean(vector.filled))
    fig.suptitle(
        heading.lines(
            trace,
            f"field vector reconstructed from B along NV (uniform parts not recoverable; "
            f"{filled:.1f} % of pixels filled in, shaded grey)",
        ),
        fontsize=11,
    )
    return fig


def _sheet_panel(ax: Axes, trace: TraceMaps, m_z_a: np.ndarray, standoff_m: float) -> None:
    """Sheet moment density on a zero-centred diverging scale, mA."""
    half = field_scale(m_z_a, 0.0).half_range_t
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
