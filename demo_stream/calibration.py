"""Calibration scans: the demo tip over a structure of known sheet moment, to calibrate
its stand-off with ``strayline calibrate`` before it scans a sample.

:func:`calibration_scan` draws, from a seed, a patterned film edge (sharp, as an etched
edge is next to the stand-off) of known M_s t, in any direction, somewhere near the
scan's centre, under a tip whose stand-off is drawn from 30–120 nm (or given). The
sheet moment is chosen so that the edge's peak field μ0 I_s/(2π d) lies in 1.5–3.5 mT,
inside the demo's default sweep with the 3 mT bias on top (an invented scenario of our
own). The truth (stand-off, sheet moment, edge) is in the scan's truth record like any
demo scan's (scene parameters and tip).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from demo_stream.scenes import film_edge
from demo_stream.tip import TipModel
from demo_stream.writer import DemoConfig
from strayline.physics import MU0

__all__ = ["CALIBRATION_EDGE_WIDTH_M", "STANDOFF_RANGE_M", "calibration_scan"]

#: Stand-offs a calibration scan draws from, m.
STANDOFF_RANGE_M = (30e-9, 120e-9)
#: Edge-width parameter of the calibration film, m: sharp next to any stand-off drawn
#: (a soft edge of width δ changes the field at order (δ/d)²).
CALIBRATION_EDGE_WIDTH_M = 0.5e-9
_PEAK_FIELD_T = (1.5e-3, 3.5e-3)


def calibration_scan(
    seed: int,
    *,
    tip: TipModel | None = None,
    n_lines: int = 32,
    n_pixels: int = 64,
    pixel_m: float = 30e-9,
    scan_id: str = "calibration-0001",
    tip_id: str | None = "demo-tip",
) -> DemoConfig:
    """A demo scan of a film edge of known sheet moment, drawn from ``seed``.

    Parameters
    ----------
    seed : int
        Draws the stand-off (when ``tip`` is None), the sheet moment, the edge's direction
        and place, and seeds the photon noise.
    tip : TipModel, optional
        The tip to calibrate (its stand-off is then the truth); None: the default tip
        with a stand-off drawn from :data:`STANDOFF_RANGE_M`.
    n_lines, n_pixels : int
        Scan size.
    pixel_m : float
        Pixel pitch, m.
    scan_id : str
    tip_id : str or None
        Written into the line files (the calibration is kept under it); overrides the
        tip's own.

    Returns
    -------
    DemoConfig
        The scene is :func:`demo_stream.scenes.film_edge` with its parameters (the
        truth) in ``scene.params``; the stand-off is ``tip.standoff_m``.
    """
    rng = np.random.default_rng(seed)
    standoff_m = float(rng.uniform(*STANDOFF_RANGE_M))
    if tip is None:
        tip = TipModel(standoff_m=standoff_m)
    d = tip.standoff_m
    peak_t = float(rng.uniform(*_PEAK_FIELD_T))
    sheet_moment_a = peak_t * 2.0 * np.pi * d / MU0
    angle_rad = float(rng.uniform(0.0, 2.0 * np.pi))
    half_extent_m = 0.5 * pixel_m * min(n_lines, n_pixels)
    offset_m = float(rng.uniform(-0.3, 0.3) * half_extent_m)
    scene = film_edge(
        sheet_moment_a=sheet_moment_a,
        angle_rad=angle_rad,
        offset_m=offset_m,
        wall_width_m=CALIBRATION_EDGE_WIDTH_M,
    )
    return DemoConfig(
        scene=scene,
        tip=dataclasses.replace(tip, tip_id=tip_id),
        n_lines=n_lines,
        n_pixels=n_pixels,
        pixel_m=pixel_m,
        seed=int(rng.integers(0, 2**31)),
        scan_id=scan_id,
    )
