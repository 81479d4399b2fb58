"""Products of a completed scan: quick-look images, vector field, sheet moment, report.

:func:`make_products` reads a scan store read-only (never its writer's lock, see
:mod:`strayline.products._read`) and writes, into one folder per scan
(``<output_root>/<scan_id>.products/`` by default, see :func:`products_dir`):

- ``quicklook_<direction>.png`` — field along the NV axis, PL rate, contrast, fit status,
  the lines where an alert was raised marked at the maps' edge;
- ``vector_<direction>.png`` — reconstructed Bx, By, Bz (and m_z), filled pixels grey;
- ``vector_field.zarr`` — zarr 3: one group per direction with ``bx_t``, ``by_t``,
  ``bz_t``, ``filled``, with a standoff ``m_z_a`` and its error bars and round trip
  (``m_z_sigma_a``, ``m_z_sigma_standoff_a``, ``residual_nv_t``), and coordinates ``x``,
  ``y`` (m), dims ``("y", "x")``, a ``units`` attribute on every array;
- ``report.json`` and ``report.md`` — written last, so a report means complete products.

Why a separate zarr and not a ``products/`` group inside the scan store: the store has
one writer at a time (the daemon holds its ledger lock while the scan runs, and the
backward trace or a changed line may still arrive after the forward trace completes), and
its recovery treats anything it did not commit as suspect. Products are derived and
remade at will (after a refit, with a calibrated standoff), so they live beside the store:
the daemon's live picture of a running scan (:mod:`strayline.products.live`) goes there too;
the CLI can remake them while the daemon writes, and deleting them loses nothing.

Every file is replaced atomically (temporary name, rename); the vector zarr is built in a
hidden sibling folder and swapped in. Files of this module's naming that a remake no longer
produces (a trace now absent, images turned off) are removed; nothing else in the folder
is touched.

The standoff comes from ``products.standoff_nm`` (or ``--standoff-nm``), or from a tip
calibration (``products.calibration``, :mod:`strayline.products.calibration`), which also
gives its 1σ, carried into the sheet moment's uncertainty, and may give the NV axis; the
report names the calibration used.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import uuid
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import zarr

import strayline
from strayline._atomic import write_text_atomic
from strayline.alerts import AlertEvent, read_alert_log
from strayline.errors import StoreError
from strayline.lines import DIRECTIONS
from strayline.products._maps import TraceMaps, VectorField, moment_arrays, reconstruct_vector
from strayline.products._marks import alert_marks
from strayline.products._read import StoreSnapshot, nv_axis_from_store, read_snapshot
from strayline.products._report import (
    REPORT_FORMAT,
    REPORT_FORMAT_VERSION,
    alert_summary,
    calibration_summary,
    report_markdown,
    trace_summary,
    vector_summary,
)
from strayline.products.calibration import CalibrationUse, standoff_choice

__all__ = [
    "REPORT_JSON",
    "REPORT_MD",
    "VECTOR_ZARR",
    "ProductFile",
    "ProductsReport",
    "SkippedProduct",
    "make_products",
    "products_dir",
    "remake_products",
]

REPORT_JSON = "report.json"
REPORT_MD = "report.md"
VECTOR_ZARR = "vector_field.zarr"
#: Smallest |cos θ| for which one projection determines Bz (as the physics requires).
_MIN_AXIS_Z = 1e-3


@dataclass(frozen=True)
class ProductFile:
    """One written product.

    Attributes
    ----------
    kind : str
        ``quicklook_image``, ``vector_image``, ``vector_field``, ``report_json`` or
        ``report_md``.
    path : Path
        Absolute path of the file (or zarr folder).
    description : str
    """

    kind: str
    path: Path
    description: str


@dataclass(frozen=True)
class SkippedProduct:
    """A product not made, and why."""

    product: str
    reason: str


@dataclass(frozen=True)
class ProductsReport:
    """What :func:`make_products` wrote.

    Attributes
    ----------
    scan_id : str
    store_path, out_dir : Path
    directions : tuple of str
        Trace directions with committed lines, in store order.
    files : tuple of ProductFile
        Every product written, the reports last.
    skipped : tuple of SkippedProduct
    """

    scan_id: str
    store_path: Path
    out_dir: Path
    directions: tuple[str, ...]
    files: tuple[ProductFile, ...]
    skipped: tuple[SkippedProduct, ...]

    def path_of(self, kind: str, direction: str | None = None) -> Path | None:
        """Path of the first product of ``kind`` (for ``direction``), or None."""
        for item in self.files:
            if item.kind == kind and (direction is None or f"_{direction}." in item.path.name):
                return item.path
        return None


def products_dir(output_root: Path, folder: Path | None, scan_id: str) -> Path:
    """``<folder or output_root>/<scan_id>.products``: where a scan's products go."""
    return Path(folder if folder is not None else output_root) / f"{scan_id}.products"


def remake_products(
    store_path: Path,
    *,
    standoff_m: float | None = None,
    out_dir: Path | None = None,
    nv_axis_rad: tuple[float, float] | None = None,
    alert_log: Path | None = None,
    images: bool | None = None,
    calibration: str | None = None,
    state_dir: Path | None = None,
) -> ProductsReport:
    """:func:`make_products` with every setting not given taken from the store itself.

    Defaults, from the configuration recorded in the store's attributes (the one that
    wrote the scan): ``standoff_m`` from ``products.standoff_nm`` or, with neither it nor
    ``calibration`` given, the calibration ``products.calibration`` names (one that
    cannot be found is reported, and the sheet moment skipped), looked up in
    ``state_dir`` (default ``paths.state_dir``), ``images`` from
    ``products.images``, ``out_dir`` = ``<products.folder or the store's folder>/
    <scan_id>.products``, ``alert_log`` = ``paths.alert_log`` if that file exists, else
    ``alerts.jsonl`` beside the store if it exists. The NV axis comes from the store's
    attributes (or, for a store written before stores recorded it, from its raw spectra
    or the committed lines' source files).

    Raises
    ------
    StoreError
        If the store cannot be read or the products cannot be written.
    CalibrationError
        If ``calibration`` is given and cannot be found or read.
    ValueError
        If the NV axis is given nowhere, a value is out of range, or both ``standoff_m``
        and ``calibration`` are given.
    """
    store_path = Path(store_path)
    snapshot = read_snapshot(store_path)
    config = _mapping(snapshot.attrs.get("config"))
    section = _mapping(config.get("products"))
    standoff_m, use = standoff_choice(
        config,
        snapshot.reader.tip_id,
        standoff_m=standoff_m,
        calibration=calibration,
        state_dir=state_dir,
    )
    if images is None:
        images = bool(section.get("images", True))
    if out_dir is None:
        folder = section.get("folder")
        out_dir = products_dir(
            store_path.parent, None if folder is None else Path(folder), snapshot.scan_id
        )
    if alert_log is None:
        candidates = [
            _mapping(config.get("paths")).get("alert_log"),
            store_path.parent / "alerts.jsonl",
        ]
        alert_log = next((Path(c) for c in candidates if c and Path(c).is_file()), None)
    if nv_axis_rad is None:
        nv_axis_rad = nv_axis_from_store(snapshot)
    if nv_axis_rad is None:
        raise ValueError(
            f"{store_path.name}: the NV axis is recorded neither in the store nor in a "
            "readable source line file; give it (--nv-theta-deg, --nv-phi-deg)"
        )
    return make_products(
        store_path,
        standoff_m=standoff_m,
        nv_theta_rad=nv_axis_rad[0],
        nv_phi_rad=nv_axis_rad[1],
        out_dir=out_dir,
        alert_log=alert_log,
        images=images,
        calibration=use,
    )


def _mapping(value: object) -> dict[str, Any]:
    """``value`` if it is a JSON object, else an empty one (an older or foreign store)."""
    return value if isinstance(value, dict) else {}


def _utc_now() -> datetime:
    return datetime.now(UTC)


def make_products(
    store_path: Path,
    *,
    standoff_m: float | None,
    nv_theta_rad: float,
    nv_phi_rad: float,
    out_dir: Path,
    alert_log: Path | None = None,
    images: bool = True,
    clock: Callable[[], datetime] = _utc_now,
    calibration: CalibrationUse | None = None,
) -> ProductsReport:
    """Make (or remake) the products of one scan store.

    Parameters
    ----------
    store_path : Path
        The scan's ``<scan_id>.zarr``; read only, never locked.
    standoff_m : float or None
        NV–sample distance d, m; None skips the sheet moment (the report says why).
    nv_theta_rad, nv_phi_rad : float
        NV axis in the scan frame, rad (as in the line files).
    out_dir : Path
        Folder receiving the products (created if missing).
    alert_log : Path or None
        JSON-lines alert log to take the scan's alerts from; None leaves them out.
    images : bool
        Write the PNG quick-looks.
    clock : callable returning an aware datetime
        Source of the report's ``made_time``.
    calibration : CalibrationUse, optional
        The tip calibration asked for: its record gives the standoff and its 1σ (and
        the NV axis, where it fitted it); without a record the sheet moment is skipped
        and the report says why. Not together with ``standoff_m``.

    Returns
    -------
    ProductsReport

    Raises
    ------
    StoreError
        If the store cannot be read or the products cannot be written.
    ValueError
        If ``standoff_m`` is not finite and > 0, or an angle is not finite, or both
        ``standoff_m`` and ``calibration`` are given.
    """
    if standoff_m is not None and calibration is not None:
        raise ValueError("give standoff_m or calibration, not both")
    standoff_sigma_m = 0.0
    if calibration is not None and calibration.record is not None:
        standoff_m = calibration.record.standoff_m
        standoff_sigma_m = calibration.record.standoff_sigma_m
        if calibration.record.nv_axis_fitted:
            nv_theta_rad, nv_phi_rad = calibration.record.nv_axis_rad
    if standoff_m is not None and not (math.isfinite(standoff_m) and standoff_m > 0):
        raise ValueError(f"standoff_m must be finite and > 0 or None; found {standoff_m!r}")
    for name, angle in (("nv_theta_rad", nv_theta_rad), ("nv_phi_rad", nv_phi_rad)):
        if not math.isfinite(angle):
            raise ValueError(f"{name} must be finite; found {angle!r}")
    store_path = Path(store_path)
    out_dir = Path(out_dir)
    snapshot = read_snapshot(store_path)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
        return _make(
            snapshot,
            standoff_m=standoff_m,
            axis=(float(nv_theta_rad), float(nv_phi_rad)),
            out_dir=out_dir,
            alert_log=alert_log,
            images=images,
            made=clock(),
            standoff_sigma_m=standoff_sigma_m,
            calibration=calibration,
        )
    except OSError as error:
        if isinstance(error, StoreError):
            raise
        raise StoreError(f"{out_dir}: writing the products failed: {error}") from error


def _make(
    snapshot: StoreSnapshot,
    *,
    standoff_m: float | None,
    axis: tuple[float, float],
    out_dir: Path,
    alert_log: Path | None,
    images: bool,
    made: datetime,
    standoff_sigma_m: float = 0.0,
    calibration: CalibrationUse | None = None,
) -> ProductsReport:
    if images:  # matplotlib only when drawing: it adds ~0.5 s to the daemon's start-up
        from strayline.products._figures import (
            FigureHeading,
            quicklook_figure,
            save_png,
            vector_figure,
        )

        heading = FigureHeading(
            snapshot.scan_id, snapshot.profile, snapshot.lines_planned, snapshot.started, made
        )
    events, alerts = _scan_alerts(alert_log, snapshot.scan_id)
    marks = alert_marks(events, snapshot.scan_id)
    files: list[ProductFile] = []
    skipped: list[SkippedProduct] = []
    vectors: dict[str, VectorField] = {}
    summaries: dict[str, dict[str, Any]] = {}
    axis_ok = abs(math.cos(axis[0])) >= _MIN_AXIS_Z
    if not snapshot.traces:
        skipped.append(SkippedProduct("all maps", "no committed line in the store"))
    for direction, trace in snapshot.traces.items():
        summary = trace_summary(trace)
        summaries[direction] = summary
        if images:
            path = out_dir / f"quicklook_{direction}.png"
            save_png(quicklook_figure(trace, heading, marks), path)
            files.append(
                ProductFile(
                    "quicklook_image",
                    path,
                    f"{direction} trace: field along the NV axis, PL rate, contrast, fit status",
                )
            )
        vector = _vector(
            trace,
            axis,
            axis_ok,
            standoff_m,
            skipped,
            standoff_sigma_m=standoff_sigma_m,
            calibration=calibration,
        )
        summary["vector"] = None if vector is None else vector_summary(vector)
        if vector is None:
            continue
        vectors[direction] = vector
        if images:
            path = out_dir / f"vector_{direction}.png"
            save_png(vector_figure(trace, vector, heading, standoff_m), path)
            what = "Bx, By, Bz" + (" and m_z" if vector.m_z_a is not None else "")
            files.append(ProductFile("vector_image", path, f"{direction} trace: {what}"))
    if not images:
        skipped.append(SkippedProduct("images", "turned off (products.images: false)"))
    _remove_stale(out_dir, {f.path.name for f in files})
    if vectors:
        path = out_dir / VECTOR_ZARR
        _write_vector_zarr(
            path,
            snapshot,
            vectors,
            axis,
            standoff_m,
            standoff_sigma_m=standoff_sigma_m,
            calibration=calibration,
        )
        files.append(
            ProductFile(
                "vector_field",
                path,
                "zarr 3: bx_t, by_t, bz_t, filled (and m_z_a with its 1 sigma and round-trip "
                "residual) per trace, dims (y, x), coordinates in m",
            )
        )
    else:
        _remove_tree(out_dir / VECTOR_ZARR)
    report = _report_dict(
        snapshot,
        summaries=summaries,
        axis=axis,
        standoff_m=standoff_m,
        alerts=alerts,
        made=made,
        out_dir=out_dir,
        files=files,
        skipped=skipped,
    ) | {"standoff_sigma_m": standoff_sigma_m, "calibration": calibration_summary(calibration)}
    json_path, md_path = out_dir / REPORT_JSON, out_dir / REPORT_MD
    report["products"] += [
        {"kind": "report_json", "path": REPORT_JSON, "description": "this report (JSON)"},
        {"kind": "report_md", "path": REPORT_MD, "description": "this report (Markdown)"},
    ]
    _write_text(md_path, report_markdown(report))
    _write_text(json_path, json.dumps(_finite(report), indent=2, allow_nan=False) + "\n")
    files += [
        ProductFile("report_json", json_path, "scan report (JSON)"),
        ProductFile("report_md", md_path, "scan report (Markdown)"),
    ]
    return ProductsReport(
        scan_id=snapshot.scan_id,
        store_path=snapshot.path,
        out_dir=out_dir,
        directions=tuple(snapshot.traces),
        files=tuple(files),
        skipped=tuple(skipped),
    )


def _vector(
    trace: TraceMaps,
    axis: tuple[float, float],
    axis_ok: bool,
    standoff_m: float | None,
    skipped: list[SkippedProduct],
    *,
    standoff_sigma_m: float = 0.0,
    calibration: CalibrationUse | None = None,
) -> VectorField | None:
    """The trace's vector field, or None with the reason appended to ``skipped``."""
    where = f"{trace.direction} trace"
    valid = trace.valid
    if not axis_ok:
        reason = f"the NV axis lies in the sample plane (θ = {math.degrees(axis[0]):.2f}°)"
    elif not np.any(valid):
        reason = "no pixel with a measured field"
    else:
        vector = reconstruct_vector(
            trace.maps["field_nv_t"],
            valid,
            pixel_m=trace.pixel_m,
            nv_theta_rad=axis[0],
            nv_phi_rad=axis[1],
            standoff_m=standoff_m,
            sigma_nv_t=trace.maps["field_nv_sigma_t"],
            standoff_sigma_m=standoff_sigma_m,
        )
        if standoff_m is None:
            unknown = (
                "the NV-sample standoff is unknown (set products.standoff_nm or "
                "products.calibration, or pass --standoff-nm or --calibration)"
            )
            if calibration is not None and calibration.problem:
                unknown = f"no tip calibration: {calibration.problem}"
            skipped.append(SkippedProduct(f"sheet moment ({where})", unknown))
        return vector
    skipped.append(SkippedProduct(f"vector field ({where})", reason))
    skipped.append(SkippedProduct(f"sheet moment ({where})", reason))
    return None


#: Missing line indices listed per trace in the report (the count is always whole).
_MISSING_LISTED = 20


def _missing_lines(snapshot: StoreSnapshot) -> dict[str, dict[str, Any]]:
    """Per trace with any committed line: how many planned lines are not in the store, and
    the first of them (a line quarantined or never delivered leaves a gap in the map)."""
    planned = int(snapshot.attrs.get("n_lines_planned") or 0)  # type: ignore[call-overload]
    out: dict[str, dict[str, Any]] = {}
    for direction, lines in snapshot.committed.items():
        if not lines:
            continue
        done = set(lines)
        missing = [i for i in range(planned) if i not in done]
        out[direction] = {"count": len(missing), "first": missing[:_MISSING_LISTED]}
    return out


def _report_dict(
    snapshot: StoreSnapshot,
    *,
    summaries: dict[str, dict[str, Any]],
    axis: tuple[float, float],
    standoff_m: float | None,
    alerts: dict[str, Any],
    made: datetime,
    out_dir: Path,
    files: Iterable[ProductFile],
    skipped: Iterable[SkippedProduct],
) -> dict[str, Any]:
    attrs = snapshot.attrs
    return {
        "report_format": REPORT_FORMAT,
        "report_format_version": REPORT_FORMAT_VERSION,
        "scan_id": snapshot.scan_id,
        "store": str(snapshot.path),
        "made_time": made.astimezone(UTC).isoformat(timespec="seconds"),
        "software_version": strayline.__version__,
        "store_software_version": attrs.get("software_version"),
        "store_created_time": attrs.get("created_time"),
        "config_digest": attrs.get("config_digest"),
        "other_config_digests": sorted(dict(attrs.get("other_configs") or {})),  # type: ignore[call-overload]
        "n_lines_planned": attrs.get("n_lines_planned"),
        "n_pixels": attrs.get("n_pixels"),
        "nv_axis": {
            "theta_rad": axis[0],
            "phi_rad": axis[1],
            "theta_deg": math.degrees(axis[0]),
            "phi_deg": math.degrees(axis[1]),
        },
        "standoff_m": standoff_m,
        "traces": summaries,
        "missing_lines": _missing_lines(snapshot),
        "alerts": alerts,
        "products": [
            {
                "kind": f.kind,
                "path": os.path.relpath(f.path, out_dir),
                "description": f.description,
            }
            for f in files
        ],
        "skipped": [{"product": s.product, "reason": s.reason} for s in skipped],
    }


def _scan_alerts(alert_log: Path | None, scan_id: str) -> tuple[list[AlertEvent], dict[str, Any]]:
    """The scan's alert events from the log (for the images' marks) and the report's
    alerts block (their summary, or why the log was not read)."""
    if alert_log is None:
        return [], alert_summary([]) | {"problem": "no alert log given"}
    try:
        events = read_alert_log(alert_log, scan_id=scan_id)
    except (OSError, ValueError) as error:
        return [], alert_summary([]) | {"problem": str(error), "log": str(alert_log)}
    return events, alert_summary(events) | {"problem": None, "log": str(alert_log)}


def _finite(value: Any) -> Any:
    """JSON-ready copy with every non-finite float replaced by None."""
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    if isinstance(value, float | np.floating):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, np.integer):
        return int(value)
    return value


# -- writing -------------------------------------------------------------------------------


def _write_text(path: Path, text: str) -> None:
    write_text_atomic(path, text)


def _remove_tree(path: Path) -> None:
    if path.is_dir():
        shutil.rmtree(path)


def _remove_stale(out_dir: Path, written: set[str]) -> None:
    """Delete PNGs of this module's naming that this run did not write."""
    for direction in DIRECTIONS:
        for stem in ("quicklook", "vector"):
            name = f"{stem}_{direction}.png"
            if name not in written:
                (out_dir / name).unlink(missing_ok=True)


_VECTOR_ARRAYS = (
    ("bx_t", "T", "reconstructed field, x component (uniform part removed)"),
    ("by_t", "T", "reconstructed field, y component (uniform part removed)"),
    ("bz_t", "T", "reconstructed field, z component (uniform part removed)"),
)


def _write_vector_zarr(
    path: Path,
    snapshot: StoreSnapshot,
    vectors: dict[str, VectorField],
    axis: tuple[float, float],
    standoff_m: float | None,
    *,
    standoff_sigma_m: float = 0.0,
    calibration: CalibrationUse | None = None,
) -> None:
    """Build the vector-field zarr in a hidden sibling, then swap it into place."""
    tmp = path.with_name(f".{path.name}.making-{uuid.uuid4().hex}")
    old = path.with_name(f".{path.name}.old-{uuid.uuid4().hex}")
    try:
        root = zarr.open_group(
            tmp,
            mode="w-",
            zarr_format=3,
            attributes={
                "scan_id": snapshot.scan_id,
                "source_store": str(snapshot.path),
                "config_digest": snapshot.attrs.get("config_digest"),
                "software_version": strayline.__version__,
                "nv_theta_rad": axis[0],
                "nv_phi_rad": axis[1],
                "standoff_m": standoff_m,
                "standoff_sigma_m": standoff_sigma_m,
                "calibration": (
                    None
                    if calibration is None or calibration.record is None
                    else calibration.record.label
                ),
                "method": (
                    "Bz(k) = B_NV(k) / [u_z - i (u_x kx + u_y ky)/k], B_xy(k) = -i (k_xy/k) "
                    "Bz(k) (Lima & Weiss, J. Geophys. Res. 114, B06102 (2009)); m_z(k) = "
                    "2 exp(kd) W(k) Bz(k) / (mu0 k), Hann window W cut at pi/d, from B_NV "
                    "less the median of its border pixels; m_z_sigma_a from the field "
                    "sigma map through the same filter, the background's and the "
                    "standoff's sigma (strayline.physics.sheet_moment)"
                ),
            },
        )
        for direction, vector in vectors.items():
            trace = snapshot.traces[direction]
            _write_trace_group(root, trace, vector)
        if path.exists():
            _swap(tmp, path, old)
        else:
            os.rename(tmp, path)
    finally:
        _remove_tree(tmp)
        _remove_tree(old)


def _swap(new: Path, path: Path, old: Path) -> None:
    os.rename(path, old)
    try:
        os.rename(new, path)
    except OSError:
        os.rename(old, path)  # put the previous products back
        raise


def _write_trace_group(root: zarr.Group, trace: TraceMaps, vector: VectorField) -> None:
    group = root.create_group(
        trace.direction,
        attributes={
            "direction": trace.direction,
            "pixel_y_m": trace.pixel_m[0],
            "pixel_x_m": trace.pixel_m[1],
            "line_index_first": int(trace.line_index.min()),
            "line_index_last": int(trace.line_index.max()),
            "k_cut_rad_per_m": vector.k_cut_rad_per_m,
        },
    )
    arrays: list[tuple[str, np.ndarray, str, str]] = [
        (name, values, units, long_name)
        for (name, units, long_name), values in zip(_VECTOR_ARRAYS, vector.b_xyz_t, strict=True)
    ]
    arrays += moment_arrays(vector)
    for name, values, units, long_name in arrays:
        array = group.create_array(
            name,
            shape=values.shape,
            dtype="float64",
            fill_value=float("nan"),
            dimension_names=("y", "x"),
            attributes={"units": units, "long_name": long_name},
        )
        array[:] = values
    filled = group.create_array(
        "filled",
        shape=vector.filled.shape,
        dtype="uint8",
        fill_value=0,
        dimension_names=("y", "x"),
        attributes={
            "units": "",
            "long_name": "B_NV filled from the nearest measured pixel before transforming",
            "flag_values": [0, 1],
            "flag_meanings": "measured filled",
        },
    )
    filled[:] = vector.filled.astype(np.uint8)
    for name, coord, long_name in (
        ("x", trace.x_m, "fast-axis position"),
        ("y", trace.y_m, "slow-axis position"),
    ):
        array = group.create_array(
            name,
            shape=coord.shape,
            dtype="float64",
            fill_value=float("nan"),
            dimension_names=(name,),
            attributes={"units": "m", "long_name": long_name},
        )
        array[:] = coord
