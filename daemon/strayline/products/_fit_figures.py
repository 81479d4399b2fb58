"""Figures of the fits: a tip calibration (data, model, normalised residual) and a line
cut (data with its σ band, the model with its band). matplotlib's object API on the Agg
canvas, no pyplot, so nothing stays open and no display is needed; written atomically.
"""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from strayline._atomic import write_bytes_atomic
from strayline.physics.wall_profile import WallCutFit
from strayline.products._cuts import CutSamples
from strayline.products.calibration import CalibrationFit

__all__ = ["calibration_figure", "cut_figure", "save_figure_png"]

_DPI = 110


def save_figure_png(fig: Figure, path: Path) -> None:
    """Render ``fig`` as PNG to ``path`` atomically."""
    buffer = io.BytesIO()
    FigureCanvasAgg(fig)
    fig.savefig(buffer, format="png", dpi=_DPI)
    write_bytes_atomic(path, buffer.getvalue())


def _unit(values: np.ndarray) -> tuple[str, float]:
    finite = np.abs(values[np.isfinite(values)])
    top = float(finite.max()) if finite.size else 0.0
    return ("mT", 1e3) if top >= 1e-3 else ("µT", 1e6)


def calibration_figure(calibration: CalibrationFit) -> Figure:
    """Measured B_NV, the fitted model, and (data − model)/σ over the pixels used."""
    fig = Figure(figsize=(13.5, 4.4))
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, 3)
    x, y = calibration.x_m, calibration.y_m
    extent = (x[0] * 1e6, x[-1] * 1e6, y[0] * 1e6, y[-1] * 1e6)
    result = calibration.result
    data = np.where(result.used, calibration.b_nv_t, np.nan)
    unit, scale = _unit(data)
    lo, hi = np.nanpercentile(data, [1, 99]) if np.any(np.isfinite(data)) else (0.0, 1.0)
    for ax, values, title in (
        (axes[0], data, "measured B_NV (pixels used)"),
        (axes[1], result.model_nv_t, "model"),
    ):
        image = ax.imshow(
            values * scale,
            origin="lower",
            extent=extent,
            cmap="RdBu_r",
            vmin=lo * scale,
            vmax=hi * scale,
            interpolation="nearest",
        )
        fig.colorbar(image, ax=ax, label=f"B_NV ({unit})")
        ax.set_title(title)
    z = (calibration.b_nv_t - result.model_nv_t) / calibration.sigma_t
    z = np.where(result.used, z, np.nan)
    image = axes[2].imshow(
        z, origin="lower", extent=extent, cmap="RdBu_r", vmin=-4, vmax=4, interpolation="nearest"
    )
    fig.colorbar(image, ax=axes[2], label="(data − model) / σ")
    axes[2].set_title(f"residual, χ²_red = {result.chi2_red:.3g}")
    for ax in axes:
        ax.set_xlabel("x (µm)")
        ax.set_ylabel("y (µm)")
    fig.suptitle(calibration.record.summary(), fontsize=9)
    fig.subplots_adjust(left=0.05, right=0.97, bottom=0.13, top=0.82, wspace=0.35)
    return fig


def cut_figure(samples: CutSamples, fit: WallCutFit, title: str) -> Figure:
    """The cut's pixels with their ±σ band, and the fitted model with its ±σ band."""
    fig = Figure(figsize=(8.0, 4.8))
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    unit, scale = _unit(samples.b_nv_t)
    s_nm = samples.s_m * 1e9
    ax.fill_between(
        s_nm,
        (samples.b_nv_t - samples.sigma_t) * scale,
        (samples.b_nv_t + samples.sigma_t) * scale,
        color="#90caf9",
        alpha=0.6,
        linewidth=0,
        label="data ± σ",
    )
    ax.plot(s_nm, samples.b_nv_t * scale, ".", color="#1565c0", markersize=3, label="data")
    fine = np.linspace(samples.s_m.min(), samples.s_m.max(), 400)
    curve, band = fit.curve_t(fine)
    ax.fill_between(
        fine * 1e9,
        (curve - band) * scale,
        (curve + band) * scale,
        color="#ef9a9a",
        alpha=0.7,
        linewidth=0,
        label="model ± σ",
    )
    ax.plot(fine * 1e9, curve * scale, color="#c62828", linewidth=1.5, label="model")
    v, e = fit.values, fit.sigmas
    width = (
        f"δ = {v['width_m'] * 1e9:.1f} ± {(fit.width_sigma_m or 0.0) * 1e9:.1f} nm"
        if fit.width_resolved
        else "δ < "
        + (
            f"{fit.width_upper_m * 1e9:.0f} nm (95 %)"
            if fit.width_upper_m is not None
            else f"{8 * fit.standoff_m * 1e9:.0f} nm: not bounded"
        )
    )
    ax.set_title(
        f"{title}\n{fit.kind}: s0 = {v['position_m'] * 1e9:.1f} ± {e['position_m'] * 1e9:.1f} nm, "
        f"M_s t = {v['sheet_moment_a'] * 1e3:.4g} ± {e['sheet_moment_a'] * 1e3:.2g} mA, {width}, "
        f"d = {fit.standoff_m * 1e9:.1f} nm, χ²_red = {fit.chi2_red:.3g}",
        fontsize=9,
    )
    ax.set_xlabel(
        f"distance along the cut (nm), direction {math.degrees(samples.direction_rad):.1f}°"
    )
    ax.set_ylabel(f"B_NV ({unit})")
    ax.legend(fontsize=8, loc="best")
    fig.subplots_adjust(left=0.12, right=0.97, bottom=0.12, top=0.86)
    return fig
