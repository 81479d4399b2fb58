"""Tip calibrations: fit a scan of a known straight structure for the NV's stand-off (and
the structure, and optionally the NV axis), keep the result as a record, find it again.

- :func:`calibrate_store` reads a completed scan store (read only) and fits the whole
  map of one trace with :func:`strayline.physics.structure_fit.fit_structure_map`;
- :func:`write_calibration` keeps the record, atomically, as
  ``<state_dir>/calibrations/<name>/<record_id>.json`` (with a check figure beside it
  when asked), ``<name>`` being the scan's ``tip_id`` or a name given by the caller and
  ``<record_id>`` the UTC time it was made (``20310504T120000Z``);
- :func:`find_calibration` returns the newest record of a name (``latest``: of a tip),
  or one record (``NAME/RECORD``); :func:`use_calibration` is the same for the products,
  turning a missing record into a reason instead of an error.

The record (JSON, format ``strayline-calibration`` version 1) holds every parameter of
the model in SI units with its 1σ, which were fitted and which held, the goodness of
fit, the source store, the software version and the time (ISO 8601 UTC).
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np

import strayline
from strayline._atomic import write_text_atomic
from strayline.config import LATEST_CALIBRATION
from strayline.errors import CalibrationError, StoreError
from strayline.lines import NAME_PATTERN, NAME_RULE
from strayline.physics.structure_field import STRUCTURE_MODELS, StructureModel
from strayline.physics.structure_fit import PARAMETER_UNITS, StructureFit, fit_structure_map
from strayline.products._json import finite_json
from strayline.products._read import StoreSnapshot, nv_axis_from_store, read_snapshot

__all__ = [
    "CALIBRATIONS_DIR",
    "RECORD_FORMAT",
    "RECORD_FORMAT_VERSION",
    "CalibrationFit",
    "CalibrationRecord",
    "CalibrationUse",
    "calibrate_store",
    "calibrations_dir",
    "find_calibration",
    "keep_calibration",
    "read_calibration",
    "standoff_choice",
    "use_calibration",
    "write_calibration",
]

CALIBRATIONS_DIR = "calibrations"
RECORD_FORMAT = "strayline-calibration"
RECORD_FORMAT_VERSION = 1
_RECORD_ID = re.compile(r"\d{8}T\d{6}Z(-\d+)?")
_CAUTION = (
    "d and the strength hold for the model named: a thin film (t << d unless a thickness "
    "is given) magnetised uniformly through its thickness, a sharp straight edge or wire"
)


def calibrations_dir(state_dir: Path) -> Path:
    """``<state_dir>/calibrations``: where calibration records are kept."""
    return Path(state_dir) / CALIBRATIONS_DIR


@dataclass(frozen=True)
class CalibrationRecord:
    """One tip calibration.

    Attributes
    ----------
    name : str
        What it is kept under: the tip's ``tip_id`` or a name given.
    record_id : str
        The UTC time it was made, ``YYYYMMDDTHHMMSSZ`` (``-2``… when two share a second).
    tip_id : str or None
        The tip recorded in the source store.
    model : {"film-edge", "stripe", "wire"}
    values, sigmas : Mapping[str, float]
        Every model parameter (SI units, :data:`PARAMETER_UNITS`) and the 1σ of the fitted
        ones.
    fitted : tuple of str
    held : Mapping[str, float | None]
        Values held in the model: a known strength, a film thickness.
    fit : Mapping[str, Any]
        Goodness of fit: ``chi2``, ``dof``, ``chi2_red``, ``sigma_scaled``, ``n_pixels``,
        ``n_clipped``, ``converged``, ``message``.
    source_store, scan_id, direction : str
        The scan it was fitted on.
    made_time : str
        ISO 8601 UTC.
    software_version : str
    path : Path or None
        Where it was read from or written to.
    """

    name: str
    record_id: str
    tip_id: str | None
    model: StructureModel
    values: Mapping[str, float]
    sigmas: Mapping[str, float]
    fitted: tuple[str, ...]
    held: Mapping[str, float | None]
    fit: Mapping[str, Any]
    source_store: str
    scan_id: str
    direction: str
    made_time: str
    software_version: str
    path: Path | None = field(default=None, compare=False)

    @property
    def standoff_m(self) -> float:
        """The calibrated stand-off d, m."""
        return float(self.values["standoff_m"])

    @property
    def standoff_sigma_m(self) -> float:
        """Its 1σ, m."""
        return float(self.sigmas.get("standoff_m", 0.0))

    @property
    def nv_axis_fitted(self) -> bool:
        """Whether the calibration fitted an NV angle (then the products take its axis)."""
        return "nv_theta_rad" in self.fitted or "nv_phi_rad" in self.fitted

    @property
    def nv_axis_rad(self) -> tuple[float, float]:
        """(θ, φ) the calibration used or fitted, rad."""
        return float(self.values["nv_theta_rad"]), float(self.values["nv_phi_rad"])

    @property
    def label(self) -> str:
        """``name/record_id``: names one record (as ``products.calibration`` may)."""
        return f"{self.name}/{self.record_id}"

    def to_json_dict(self) -> dict[str, Any]:
        """The record as written (JSON-ready; non-finite numbers as null)."""
        return finite_json(
            {
                "format": RECORD_FORMAT,
                "format_version": RECORD_FORMAT_VERSION,
                "name": self.name,
                "record_id": self.record_id,
                "tip_id": self.tip_id,
                "model": self.model,
                "values": dict(self.values),
                "sigmas": dict(self.sigmas),
                "units": {k: PARAMETER_UNITS[k] for k in self.values},
                "fitted": list(self.fitted),
                "held": dict(self.held),
                "fit": dict(self.fit),
                "source_store": self.source_store,
                "scan_id": self.scan_id,
                "direction": self.direction,
                "made_time": self.made_time,
                "software_version": self.software_version,
                "caution": _CAUTION,
            }
        )

    def summary(self) -> str:
        """One line for people: d ± σ, strength ± σ, χ²_red."""
        strength = STRUCTURE_MODELS[self.model]
        s_value, s_sigma = self.values[strength], self.sigmas.get(strength)
        strength_text = f"{s_value * 1e3:.4g}" + (
            " mA (held)" if s_sigma is None else f" ± {s_sigma * 1e3:.2g} mA"
        )
        axis = ""
        if self.nv_axis_fitted:
            axis = ", NV " + ", ".join(
                f"{key[3:-4]} {math.degrees(self.values[key]):.2f} ± "
                f"{math.degrees(self.sigmas[key]):.2g}°"
                for key in ("nv_theta_rad", "nv_phi_rad")
                if key in self.sigmas
            )
        return (
            f"{self.label}: {self.model}, d = {self.standoff_m * 1e9:.2f} ± "
            f"{self.standoff_sigma_m * 1e9:.2g} nm, {strength} = {strength_text}{axis}, "
            f"χ²_red = {self.fit['chi2_red']:.3g}"
            + (" (σ scaled by it)" if self.fit.get("sigma_scaled") else "")
        )


def _utc_now() -> datetime:
    return datetime.now(UTC)


def _check_name(name: str, what: str) -> str:
    if not NAME_PATTERN.fullmatch(name):
        raise ValueError(f"{what} must be {NAME_RULE}; found {name!r}")
    return name


@dataclass(frozen=True, eq=False)
class CalibrationFit:
    """A calibration and the fit it came from (maps for a check figure).

    Attributes
    ----------
    record : CalibrationRecord
        Not yet written (see :func:`keep_calibration`).
    result : StructureFit
    b_nv_t, sigma_t : ndarray, shape (ny, nx)
        The map fitted and its 1σ, T.
    x_m, y_m : ndarray
        Its axes, m.
    recorded_state_dir : Path or None
        The state folder of the daemon that wrote the scan (from the store's config).
    """

    record: CalibrationRecord
    result: StructureFit
    b_nv_t: np.ndarray
    sigma_t: np.ndarray
    x_m: np.ndarray
    y_m: np.ndarray
    recorded_state_dir: Path | None = None


def calibrate_store(
    store_path: Path,
    *,
    model: StructureModel,
    name: str | None = None,
    direction: str | None = None,
    strength_a: float | None = None,
    thickness_m: float | None = None,
    fit_theta: bool = False,
    fit_phi: bool = False,
    nv_axis_rad: tuple[float, float] | None = None,
    clock: Callable[[], datetime] = _utc_now,
) -> CalibrationFit:
    """Fit the stand-off (and the structure) on a scan of a known straight structure.

    Parameters
    ----------
    store_path : Path
        The scan's store; read only (never locked).
    model : {"film-edge", "stripe", "wire"}
    name : str, optional
        Name to keep the calibration under; default the store's ``tip_id``.
    direction : {"forward", "backward"}, optional
        The trace to fit; default the forward one when it has lines.
    strength_a : float, optional
        The structure's known sheet moment (or current), A, held; None fits it.
    thickness_m : float, optional
        Known film thickness, m.
    fit_theta, fit_phi : bool
        Also fit the NV polar angle / azimuth (two of strength, θ, φ at most).
    nv_axis_rad : (float, float), optional
        NV axis (start values when fitted); default the one recorded for the scan.
    clock : callable
        Source of the record's time.

    Returns
    -------
    CalibrationFit
        The record (not yet written) and the fit.

    Raises
    ------
    StoreError
        The store cannot be read.
    CalibrationError
        No name to keep it under, no such trace, no NV axis, or the fit cannot be made
        (too few pixels, too many free amplitudes).
    """
    snapshot = read_snapshot(Path(store_path))
    key = name if name is not None else snapshot.reader.tip_id
    if key is None:
        raise CalibrationError(
            f"{snapshot.path.name}: the scan names no tip (line-file attribute tip_id); "
            "give the calibration a name (--name)"
        )
    try:
        _check_name(key, "the calibration name")
    except ValueError as error:
        raise CalibrationError(str(error)) from None
    trace_name = direction or ("forward" if "forward" in snapshot.traces else "backward")
    trace = snapshot.traces.get(trace_name)
    if trace is None:
        raise CalibrationError(
            f"{snapshot.path.name}: the {trace_name} trace has no committed line to fit"
        )
    axis = nv_axis_rad if nv_axis_rad is not None else nv_axis_from_store(snapshot)
    if axis is None:
        raise CalibrationError(
            f"{snapshot.path.name}: the NV axis is recorded neither in the store nor in a "
            "readable source line file; give it"
        )
    b = np.asarray(trace.maps["field_nv_t"], dtype=np.float64)
    sigma = np.asarray(trace.maps["field_nv_sigma_t"], dtype=np.float64)
    try:
        result = fit_structure_map(
            b,
            sigma,
            trace.x_m,
            trace.y_m,
            model=model,
            nv_theta_rad=axis[0],
            nv_phi_rad=axis[1],
            valid=trace.valid,
            strength_a=strength_a,
            fit_theta=fit_theta,
            fit_phi=fit_phi,
            thickness_m=thickness_m,
        )
    except ValueError as error:
        raise CalibrationError(f"{snapshot.path.name}: {error}") from None
    record = _record(
        snapshot,
        key,
        trace_name,
        result,
        strength_a=strength_a,
        thickness_m=thickness_m,
        made=clock(),
    )
    config = snapshot.attrs.get("config")
    paths = config.get("paths") if isinstance(config, dict) else None
    state = paths.get("state_dir") if isinstance(paths, dict) else None
    return CalibrationFit(
        record, result, b, sigma, trace.x_m, trace.y_m, None if not state else Path(str(state))
    )


def _record(
    snapshot: StoreSnapshot,
    key: str,
    direction: str,
    result: StructureFit,
    *,
    strength_a: float | None,
    thickness_m: float | None,
    made: datetime,
) -> CalibrationRecord:
    made = made.astimezone(UTC)
    return CalibrationRecord(
        name=key,
        record_id=made.strftime("%Y%m%dT%H%M%SZ"),
        tip_id=snapshot.reader.tip_id,
        model=result.model,
        values=MappingProxyType(dict(result.values)),
        sigmas=MappingProxyType(dict(result.sigmas)),
        fitted=result.fitted,
        held=MappingProxyType(
            {STRUCTURE_MODELS[result.model]: strength_a, "thickness_m": thickness_m}
        ),
        fit=MappingProxyType(
            {
                "chi2": result.chi2,
                "dof": result.dof,
                "chi2_red": result.chi2_red,
                "sigma_scaled": result.sigma_scaled,
                "n_pixels": result.n_pixels,
                "n_clipped": result.n_clipped,
                "converged": result.converged,
                "message": result.message,
            }
        ),
        source_store=str(snapshot.path),
        scan_id=snapshot.scan_id,
        direction=direction,
        made_time=made.isoformat(timespec="seconds"),
        software_version=strayline.__version__,
    )


def write_calibration(state_dir: Path, record: CalibrationRecord) -> CalibrationRecord:
    """Keep a record as ``<state_dir>/calibrations/<name>/<record_id>.json`` (atomically;
    a record id already taken gets ``-2``, ``-3``…); returns it with its path set.

    Raises
    ------
    StoreError
        The folder or the file cannot be written.
    """
    folder = calibrations_dir(state_dir) / record.name
    try:
        folder.mkdir(parents=True, exist_ok=True)
        record_id, n = record.record_id, 1
        while (folder / f"{record_id}.json").exists():
            n += 1
            record_id = f"{record.record_id}-{n}"
        kept = _replace(record, record_id=record_id, path=folder / f"{record_id}.json")
        text = json.dumps(kept.to_json_dict(), indent=2, allow_nan=False) + "\n"
        write_text_atomic(folder / f"{record_id}.json", text)
    except OSError as error:
        raise StoreError(f"{folder}: writing the calibration failed: {error}") from error
    return kept


def keep_calibration(
    made: CalibrationFit, state_dir: Path | None = None, *, figure: bool = True
) -> tuple[CalibrationRecord, Path | None]:
    """Write a calibration (:func:`write_calibration`) and, with ``figure``, its check
    figure beside it (``<record_id>.png``: data, model, normalised residual).

    Parameters
    ----------
    made : CalibrationFit
    state_dir : Path, optional
        Default: the state folder of the daemon that wrote the scan.
    figure : bool

    Returns
    -------
    record, figure_path
        The record as written (its path set), and the figure's path (None without one).

    Raises
    ------
    CalibrationError
        No state folder given and none recorded in the store.
    StoreError
        Writing failed.
    """
    folder = state_dir if state_dir is not None else made.recorded_state_dir
    if folder is None:
        raise CalibrationError(
            f"{Path(made.record.source_store).name}: the store records no state folder; give one"
        )
    record = write_calibration(folder, made.record)
    if not figure or record.path is None:
        return record, None
    from strayline.products._fit_figures import calibration_figure, save_figure_png

    png = record.path.with_suffix(".png")
    try:
        save_figure_png(calibration_figure(made), png)
    except OSError as error:
        raise StoreError(f"{png}: writing the calibration figure failed: {error}") from error
    return record, png


def _replace(record: CalibrationRecord, **changes: Any) -> CalibrationRecord:
    from dataclasses import replace

    return replace(record, **changes)


def read_calibration(path: Path) -> CalibrationRecord:
    """Read one calibration record.

    Raises
    ------
    CalibrationError
        The file cannot be read or is not a calibration record of a known version.
    """
    path = Path(path)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as error:
        raise CalibrationError(f"{path}: cannot read the calibration: {error}") from error
    if not isinstance(data, dict) or data.get("format") != RECORD_FORMAT:
        raise CalibrationError(f"{path}: format must be {RECORD_FORMAT!r}; found another file")
    if data.get("format_version") != RECORD_FORMAT_VERSION:
        raise CalibrationError(
            f"{path}: format_version must be {RECORD_FORMAT_VERSION}; "
            f"found {data.get('format_version')!r}"
        )
    try:
        model = data["model"]
        if model not in STRUCTURE_MODELS:
            raise ValueError(f"model {model!r} is not one of {', '.join(STRUCTURE_MODELS)}")
        values = {k: float(v) for k, v in data["values"].items()}
        sigmas = {k: (math.inf if v is None else float(v)) for k, v in data["sigmas"].items()}
        if not (math.isfinite(values["standoff_m"]) and values["standoff_m"] > 0):
            raise ValueError(f"values.standoff_m must be > 0; found {values['standoff_m']!r}")
        return CalibrationRecord(
            name=str(data["name"]),
            record_id=str(data["record_id"]),
            tip_id=None if data.get("tip_id") is None else str(data["tip_id"]),
            model=model,
            values=MappingProxyType(values),
            sigmas=MappingProxyType(sigmas),
            fitted=tuple(str(n) for n in data["fitted"]),
            held=MappingProxyType(dict(data.get("held") or {})),
            fit=MappingProxyType(dict(data["fit"])),
            source_store=str(data["source_store"]),
            scan_id=str(data["scan_id"]),
            direction=str(data["direction"]),
            made_time=str(data["made_time"]),
            software_version=str(data["software_version"]),
            path=path,
        )
    except (KeyError, TypeError, ValueError, AttributeError) as error:
        raise CalibrationError(f"{path}: not a complete calibration record: {error}") from error


def _records(folder: Path) -> list[Path]:
    """Record files of one name, oldest first (record ids sort by time)."""
    if not folder.is_dir():
        return []
    found = [p for p in folder.glob("*.json") if _RECORD_ID.fullmatch(p.stem)]

    def order(path: Path) -> tuple[str, int]:
        stem, _, n = path.stem.partition("-")
        return stem, int(n or 1)

    return sorted(found, key=order)


def find_calibration(state_dir: Path, setting: str, tip_id: str | None = None) -> CalibrationRecord:
    """The calibration a setting names.

    Parameters
    ----------
    state_dir : Path
        The daemon's state folder.
    setting : str
        ``latest`` (the newest record of ``tip_id``), a name (its newest record),
        ``NAME/RECORD`` (that record), or the path of a record file (ending ``.json``).
    tip_id : str, optional
        The scan's tip, for ``latest``.

    Raises
    ------
    CalibrationError
        Nothing is found, or the record cannot be read; the message says where it looked.
    """
    if setting.endswith(".json"):
        return read_calibration(Path(setting))
    where = calibrations_dir(state_dir)
    if setting == LATEST_CALIBRATION:
        if tip_id is None:
            raise CalibrationError(
                "calibration 'latest' needs the scan's tip, and the scan names none "
                "(line-file attribute tip_id)"
            )
        name, record_id = tip_id, None
    else:
        name, _, record_id = setting.partition("/")
    for part in (name, record_id) if record_id else (name,):
        if not NAME_PATTERN.fullmatch(part):
            raise CalibrationError(
                f"calibration {setting!r}: expected latest, NAME or NAME/RECORD, each "
                f"{NAME_RULE} (or a record file ending .json)"
            )
    if record_id:
        path = where / name / f"{record_id}.json"
        if not path.is_file():
            raise CalibrationError(f"calibration {setting!r}: no record {path}")
        return read_calibration(path)
    records = _records(where / name)
    if not records:
        raise CalibrationError(
            f"calibration {setting!r}: no record of {name!r} in {where} "
            "(make one with strayline calibrate)"
        )
    return read_calibration(records[-1])


@dataclass(frozen=True)
class CalibrationUse:
    """The calibration a scan's products are to use, or why there is none.

    Attributes
    ----------
    setting : str
        What was asked for (``products.calibration`` or a command-line option).
    record : CalibrationRecord or None
    problem : str or None
        Why ``record`` is None.
    """

    setting: str
    record: CalibrationRecord | None
    problem: str | None = None


def use_calibration(state_dir: Path, setting: str, tip_id: str | None) -> CalibrationUse:
    """:func:`find_calibration` for the products: a missing or unreadable record becomes
    a :class:`CalibrationUse` with the reason (the products are made without it)."""
    try:
        return CalibrationUse(setting, find_calibration(state_dir, setting, tip_id))
    except CalibrationError as error:
        return CalibrationUse(setting, None, str(error))


def standoff_choice(
    store_config: Mapping[str, Any],
    tip_id: str | None,
    *,
    standoff_m: float | None = None,
    calibration: str | None = None,
    state_dir: Path | None = None,
) -> tuple[float | None, CalibrationUse | None]:
    """Where a remade product takes the stand-off from: what is given, else the
    configuration recorded in the store.

    Parameters
    ----------
    store_config : Mapping
        The configuration the store recorded (its ``config`` attribute).
    tip_id : str or None
        The scan's tip.
    standoff_m : float, optional
        A stand-off given, m.
    calibration : str, optional
        A calibration given (as :func:`find_calibration` takes it); it must be found.
    state_dir : Path, optional
        Where calibrations are kept; default the recorded ``paths.state_dir``.

    Returns
    -------
    standoff_m, use
        The given stand-off (``use`` None), or the calibration to use (``standoff_m``
        None), or the recorded ``products.standoff_nm`` / ``products.calibration`` (a
        recorded calibration that cannot be found comes back with its reason), or
        (None, None).

    Raises
    ------
    ValueError
        Both a stand-off and a calibration are given.
    CalibrationError
        The calibration given cannot be found or read.
    """
    if standoff_m is not None and calibration is not None:
        raise ValueError("give a standoff or a calibration, not both")
    paths = store_config.get("paths")
    recorded_state = paths.get("state_dir") if isinstance(paths, Mapping) else None
    if state_dir is None and recorded_state:
        state_dir = Path(str(recorded_state))
    if calibration is not None:
        if state_dir is None and not calibration.endswith(".json"):
            raise CalibrationError(
                f"calibration {calibration!r}: the store records no state folder; give one"
            )
        record = find_calibration(state_dir or Path(), calibration, tip_id)
        return None, CalibrationUse(calibration, record)
    if standoff_m is not None:
        return standoff_m, None
    section = store_config.get("products")
    section = section if isinstance(section, Mapping) else {}
    if section.get("standoff_nm") is not None:
        return float(section["standoff_nm"]) * 1e-9, None
    if section.get("calibration"):
        setting = str(section["calibration"])
        if state_dir is None:
            return None, CalibrationUse(setting, None, "the store records no state folder")
        return None, use_calibration(state_dir, setting, tip_id)
    return None, None
