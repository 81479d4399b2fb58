"""Line cuts: B_NV along a cut through a scan (between two points, or across the
strongest wall found automatically), fitted with a wall or film-edge model at the
calibrated stand-off (:mod:`strayline.physics.wall_profile`), written as a product.

:func:`cut_store` reads the store (read only) and writes, into the scan's products
folder, ``cut_<name>.json`` (the fit: position, M_s t with 1σ, the wall width's 1σ or
upper bound, χ², the stand-off and where it came from, the cut's ends and pixels) and
``cut_<name>.png`` (data with its σ band, the model with its band). Both are replaced
atomically; a cut of another name is left alone.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import strayline
from strayline._atomic import write_text_atomic
from strayline.errors import StoreError
from strayline.lines import NAME_PATTERN, NAME_RULE
from strayline.physics import nv_axis
from strayline.physics.wall_profile import CutKind, WallCutFit, fit_wall_cut
from strayline.products._cuts import CutSamples, cut_across_strongest_wall, sample_cut
from strayline.products._json import finite_json
from strayline.products._read import nv_axis_from_store, read_snapshot
from strayline.products.calibration import standoff_choice
from strayline.products.make import products_dir

__all__ = ["CUT_FORMAT", "CutProduct", "cut_store"]

CUT_FORMAT = "strayline-cut"
#: Half-length of an automatic cut, in stand-offs: far enough for the tails that fix the
#: offset and slope, short enough to stay clear of most neighbouring walls [cp].
AUTO_HALF_LENGTH_STANDOFFS = 5.0


@dataclass(frozen=True, eq=False)
class CutProduct:
    """A cut made and written.

    Attributes
    ----------
    name : str
    fit : WallCutFit
    samples : CutSamples
    json_path, png_path : Path or None
        The files written (``png_path`` None when images are off).
    report : dict
        What ``json_path`` holds.
    """

    name: str
    fit: WallCutFit
    samples: CutSamples
    json_path: Path
    png_path: Path | None
    report: dict[str, Any]


def _utc_now() -> datetime:
    return datetime.now(UTC)


def cut_store(
    store_path: Path,
    out_dir: Path | None = None,
    *,
    start_m: tuple[float, float] | None = None,
    end_m: tuple[float, float] | None = None,
    kind: CutKind = "wall",
    name: str | None = None,
    direction: str | None = None,
    width_px: int = 1,
    half_length_m: float | None = None,
    standoff_m: float | None = None,
    calibration: str | None = None,
    state_dir: Path | None = None,
    nv_axis_rad: tuple[float, float] | None = None,
    images: bool = True,
    clock: Callable[[], datetime] = _utc_now,
) -> CutProduct:
    """Fit a wall (or edge) along a cut through a scan and write the cut product.

    Parameters
    ----------
    store_path : Path
        The scan store; read only.
    out_dir : Path, optional
        Folder receiving ``cut_<name>.json`` and ``.png`` (created if missing); default
        the scan's products folder (as ``strayline products`` makes it).
    start_m, end_m : (float, float), optional
        The cut's ends (x, y), m; both None: across the strongest wall, automatically.
    kind : {"wall", "edge"}
    name : str, optional
        Names the files; default ``auto`` or ``line``.
    direction : {"forward", "backward"}, optional
        The trace; default forward when it has lines.
    width_px : int
        Band width, pixels.
    half_length_m : float, optional
        Half-length of an automatic cut, m (default 5 stand-offs).
    standoff_m : float, optional
        The stand-off, m.
    calibration : str, optional
        A tip calibration (as ``products.calibration`` names one, or a record file): its
        record gives d and σ_d. Not with ``standoff_m``; with neither, what the store's
        recorded configuration says (:func:`~strayline.products.calibration.standoff_choice`).
    state_dir : Path, optional
        Where calibrations are kept (default: the store's recorded ``paths.state_dir``).
    nv_axis_rad : (float, float), optional
        Default: the calibration's fitted axis, else the scan's.
    images : bool
        Also draw the PNG.
    clock : callable
        Source of the product's time.

    Returns
    -------
    CutProduct

    Raises
    ------
    StoreError
        The store cannot be read, or the files written.
    ValueError
        No stand-off, both or neither end given, a bad name, no pixel on the cut, or too
        few to fit.
    CalibrationError
        The calibration given cannot be found or read.
    """
    snapshot = read_snapshot(Path(store_path))
    config = snapshot.attrs.get("config")
    config = config if isinstance(config, dict) else {}
    source = "given" if standoff_m is not None else "products.standoff_nm recorded in the store"
    standoff_m, use = standoff_choice(
        config,
        snapshot.reader.tip_id,
        standoff_m=standoff_m,
        calibration=calibration,
        state_dir=state_dir,
    )
    standoff_sigma_m = 0.0
    record = None if use is None else use.record
    if use is not None and record is None:
        raise ValueError(f"no tip calibration: {use.problem}")
    if record is not None:
        standoff_m, standoff_sigma_m, source = (
            record.standoff_m,
            record.standoff_sigma_m,
            f"calibration {record.label}",
        )
    if standoff_m is None:
        raise ValueError("a cut's fit needs the standoff: give it, or a tip calibration")
    if (start_m is None) != (end_m is None):
        raise ValueError("give both ends of the cut, or neither (a cut across the strongest wall)")
    name = name or ("auto" if start_m is None else "line")
    if not NAME_PATTERN.fullmatch(name):
        raise ValueError(f"the cut's name must be {NAME_RULE}; found {name!r}")
    trace_name = direction or ("forward" if "forward" in snapshot.traces else "backward")
    trace = snapshot.traces.get(trace_name)
    if trace is None:
        raise ValueError(f"{snapshot.path.name}: the {trace_name} trace has no committed line")
    if nv_axis_rad is None:
        nv_axis_rad = (
            record.nv_axis_rad
            if record is not None and record.nv_axis_fitted
            else nv_axis_from_store(snapshot)
        )
    if nv_axis_rad is None:
        raise ValueError(f"{snapshot.path.name}: the NV axis is recorded nowhere; give it")
    if start_m is None or end_m is None:
        half = (
            half_length_m
            if half_length_m is not None
            else (AUTO_HALF_LENGTH_STANDOFFS * standoff_m)
        )
        start_m, end_m = cut_across_strongest_wall(trace, half)
    samples = sample_cut(trace, start_m, end_m, width_px=width_px)
    angle = samples.direction_rad
    ux, uy, uz = nv_axis(*nv_axis_rad)
    u_n = float(ux * math.cos(angle) + uy * math.sin(angle))
    fit = fit_wall_cut(
        samples.s_m,
        samples.b_nv_t,
        samples.sigma_t,
        kind=kind,
        standoff_m=standoff_m,
        u_n=u_n,
        u_z=float(uz),
        standoff_sigma_m=standoff_sigma_m,
    )
    report = _report(
        snapshot.scan_id,
        snapshot.path,
        trace_name,
        name,
        samples=samples,
        fit=fit,
        source=source,
        axis=nv_axis_rad,
        made=clock(),
    )
    if out_dir is None:
        products = config.get("products")
        folder = products.get("folder") if isinstance(products, dict) else None
        out_dir = products_dir(
            snapshot.path.parent, None if folder is None else Path(folder), snapshot.scan_id
        )
    out_dir = Path(out_dir)
    json_path = out_dir / f"cut_{name}.json"
    png_path = out_dir / f"cut_{name}.png" if images else None
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
        write_text_atomic(
            json_path, json.dumps(finite_json(report), indent=2, allow_nan=False) + "\n"
        )
        if png_path is not None:
            from strayline.products._fit_figures import cut_figure, save_figure_png

            title = f"{snapshot.scan_id} ({trace_name}), cut {name!r}"
            save_figure_png(cut_figure(samples, fit, title), png_path)
    except OSError as error:
        raise StoreError(f"{out_dir}: writing the cut failed: {error}") from error
    return CutProduct(name, fit, samples, json_path, png_path, report)


def _report(
    scan_id: str,
    store: Path,
    direction: str,
    name: str,
    *,
    samples: CutSamples,
    fit: WallCutFit,
    source: str,
    axis: tuple[float, float],
    made: datetime,
) -> dict[str, Any]:
    return {
        "format": CUT_FORMAT,
        "format_version": 1,
        "name": name,
        "scan_id": scan_id,
        "store": str(store),
        "direction": direction,
        "made_time": made.astimezone(UTC).isoformat(timespec="seconds"),
        "software_version": strayline.__version__,
        "cut": {
            "start_m": list(samples.start_m),
            "end_m": list(samples.end_m),
            "direction_rad": samples.direction_rad,
            "width_px": samples.width_px,
            "pixels": int(samples.s_m.size),
        },
        "model": fit.kind,
        "standoff_m": fit.standoff_m,
        "standoff_sigma_m": fit.standoff_sigma_m,
        "standoff_source": source,
        "nv_axis_rad": list(axis),
        "values": dict(fit.values),
        "sigmas": dict(fit.sigmas),
        "width": {
            "best_m": fit.values["width_m"],
            "resolved": fit.width_resolved,
            "sigma_m": fit.width_sigma_m,
            "upper_95_m": fit.width_upper_m,
            "profile": [{"width_m": w, "chi2": c} for w, c in fit.width_profile],
            "meaning": (
                "tanh wall-width parameter delta (the wall is pi*delta wide); bounded "
                "from above where the data do not resolve it (delta << d)"
            ),
        },
        "fit": {
            "chi2": fit.chi2,
            "dof": fit.dof,
            "chi2_red": fit.chi2_red,
            "sigma_scaled": fit.sigma_scaled,
            "sigma_includes_standoff": fit.standoff_sigma_m > 0,
        },
        "caution": (
            "a straight Bloch-type wall (or sharp-profile film edge) crossed at right "
            "angles, in a thin film magnetised uniformly through its thickness"
        ),
    }
