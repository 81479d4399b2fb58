"""The sections of the configuration, one pydantic model each, with their checks.

Each key speaks a human unit in its name (``fwhm_min_mhz``, ``settle_s``); a section offers
the SI value through a property (``fwhm_min_hz``), so stages never convert. Relative paths
resolve against the folder of the file that sets them.
"""

from __future__ import annotations

import difflib
import os
import string
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    ValidationInfo,
    model_validator,
)
from pydantic.types import Strict

from strayline._numbers import HZ_PER_MHZ, MIB
from strayline.alerts import HOOK_PLACEHOLDERS
from strayline.config._load import Problems
from strayline.lines import NAME_PATTERN, NAME_RULE

__all__ = [
    "LATEST_CALIBRATION",
    "AlertsSection",
    "FieldSection",
    "FitSection",
    "LimitsSection",
    "LoggingSection",
    "PathsSection",
    "ProductsSection",
    "ProfileRule",
    "ReaderRule",
    "ReadersSection",
    "ResolvedPath",
    "Section",
    "ServiceSection",
    "StoreSection",
    "WatchSection",
]

# --------------------------------------------------------------------------- field types


def _resolve_path(value: Path, info: ValidationInfo) -> Path:
    """Expand ``~`` and anchor a relative path at the folder of the file that set it."""
    value = value.expanduser()
    base = (info.context or {}).get("base_dir")
    if not value.is_absolute():
        value = Path(base if base is not None else Path.cwd()) / value
    return Path(os.path.normpath(value))


def _refuse_empty_path(value: Any) -> Any:
    if isinstance(value, str) and not value.strip():
        raise ValueError("expected a path to a file or folder")
    return value


def _check_sign(value: int) -> int:
    if value not in (1, -1):
        raise ValueError("expected +1 or -1")
    return value


def _check_hook_argument(value: str) -> str:
    try:
        fields = [name for _, name, _, _ in string.Formatter().parse(value) if name is not None]
    except ValueError as exc:
        raise ValueError(
            f"malformed braces ({exc}); write {{{{ and }}}} for literal braces"
        ) from exc
    allowed = sorted(HOOK_PLACEHOLDERS)
    for name in fields:
        if name not in HOOK_PLACEHOLDERS:
            close = difflib.get_close_matches(name, allowed, n=1, cutoff=0.6)
            hint = f"; did you mean {{{close[0]}}}?" if close else ""
            listing = ", ".join(f"{{{p}}}" for p in allowed)
            raise ValueError(f"unknown placeholder {{{name}}}{hint} (expected only {listing})")
    return value


def _check_metrics_file(value: Path) -> Path:
    if value.suffix != ".prom":
        raise ValueError(
            f"expected a file name ending in .prom (the node exporter's textfile collector "
            f"reads only *.prom files); found {value.name!r}"
        )
    return value


ResolvedPath = Annotated[
    Path, Strict(False), BeforeValidator(_refuse_empty_path), AfterValidator(_resolve_path)
]
Seconds = Annotated[float, Field(gt=0)]
Severity = Literal["info", "warning", "critical"]
HookArgument = Annotated[str, AfterValidator(_check_hook_argument)]


class Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True, allow_inf_nan=False)


# --------------------------------------------------------------------------- sections


#: Paths whose default derives from ``output_root``; null in a file asks for that default.
_DERIVED = ("state_dir", "alert_log")


def _console_switch(value: Any) -> Any:
    """YAML reads an unquoted ``off`` as false (and ``on`` as true): take them as meant."""
    if value is False:
        return "off"
    if value is True:
        return "auto"
    return value


class PathsSection(Section):
    """Where lines come from and where results go (absolute once loaded)."""

    watch_root: ResolvedPath
    output_root: ResolvedPath
    state_dir: ResolvedPath
    alert_log: ResolvedPath

    @model_validator(mode="before")
    @classmethod
    def _defaults_below_output_root(cls, data: Any) -> Any:
        if isinstance(data, Mapping):
            # null (or no key): the default below output_root, as default.yaml documents
            data = {k: v for k, v in data.items() if not (k in _DERIVED and v is None)}
            root = data.get("output_root")
            if isinstance(root, str | Path) and str(root):
                data.setdefault("state_dir", str(Path(root) / ".strayline"))
                data.setdefault("alert_log", str(Path(root) / "alerts.jsonl"))
            else:
                # output_root is missing or wrong and will be reported; do not also
                # report the two keys whose defaults derive from it.
                data.setdefault("state_dir", "(below output_root)")
                data.setdefault("alert_log", "(below output_root)")
        return data


class WatchSection(Section):
    """How the watch root is observed and when a line file counts as ready."""

    mode: Literal["native", "polling"] = "native"
    poll_interval_s: Seconds = 2.0
    settle_s: Annotated[float, Field(ge=0)] = 0.5
    give_up_s: Seconds = 600.0
    reconcile_interval_s: Seconds = 60.0
    pattern: Annotated[str, Field(min_length=1)] = "*.h5"

    @model_validator(mode="after")
    def _check_times(self) -> WatchSection:
        problems = []
        if self.settle_s >= self.give_up_s:
            problems.append(
                (
                    "settle_s",
                    f"must be below give_up_s ({self.give_up_s:g} s); found {self.settle_s:g} s",
                )
            )
        if self.poll_interval_s >= self.give_up_s:
            problems.append(
                (
                    "poll_interval_s",
                    f"must be below give_up_s ({self.give_up_s:g} s); "
                    f"found {self.poll_interval_s:g} s",
                )
            )
        if problems:
            raise Problems(problems)
        return self


class LimitsSection(Section):
    """Sizes above which a line file is refused (quarantined) instead of processed."""

    max_pixels: Annotated[int, Field(ge=1)] = 4096
    max_freq: Annotated[int, Field(ge=3)] = 2048
    max_file_mib: Annotated[float, Field(gt=0)] = 256.0

    @property
    def max_file_bytes(self) -> int:
        """Largest accepted line file, bytes."""
        return int(self.max_file_mib * MIB)


class FitSection(Section):
    """The ODMR line-shape fit applied to every spectrum."""

    model: Literal["two_dips", "one_dip"] = "two_dips"
    shared_width: bool = True
    hyperfine: Literal["14N", "15N"] | None = None
    fit_slope: bool = False
    fwhm_min_mhz: Annotated[float, Field(gt=0)] = 0.1
    fwhm_max_mhz: Annotated[float, Field(gt=0)] = 60.0
    center_min_mhz: Annotated[float, Field(gt=0)] | None = None
    center_max_mhz: Annotated[float, Field(gt=0)] | None = None
    contrast_max: Annotated[float, Field(gt=0, le=1)] = 0.6
    max_iter: Annotated[int, Field(ge=1)] = 100
    min_counts: Annotated[float, Field(ge=0)] = 20.0
    weighting: Literal["poisson", "unweighted"] = "poisson"
    transverse_field_max_mt: Annotated[float, Field(ge=0, le=100)] = 0.0

    @model_validator(mode="after")
    def _check_bounds(self) -> FitSection:
        problems = []
        if self.fwhm_min_mhz >= self.fwhm_max_mhz:
            problems.append(
                (
                    "fwhm_min_mhz",
                    f"must be below fwhm_max_mhz ({self.fwhm_max_mhz:g} MHz); "
                    f"found {self.fwhm_min_mhz:g} MHz",
                )
            )
        lo, hi = self.center_min_mhz, self.center_max_mhz
        if lo is not None and hi is not None and lo >= hi:
            problems.append(
                (
                    "center_min_mhz",
                    f"must be below center_max_mhz ({hi:g} MHz); found {lo:g} MHz",
                )
            )
        if problems:
            raise Problems(problems)
        return self

    @property
    def n_dips(self) -> int:
        """Number of dips of the model (2 for ``two_dips``, 1 for ``one_dip``)."""
        return 2 if self.model == "two_dips" else 1

    @property
    def fwhm_min_hz(self) -> float:
        """Lower bound of a dip's full width at half maximum, Hz."""
        return self.fwhm_min_mhz * HZ_PER_MHZ

    @property
    def fwhm_max_hz(self) -> float:
        """Upper bound of a dip's full width at half maximum, Hz."""
        return self.fwhm_max_mhz * HZ_PER_MHZ

    @property
    def center_min_hz(self) -> float | None:
        """Lowest allowed resonance, Hz (None: the line's lowest frequency)."""
        return None if self.center_min_mhz is None else self.center_min_mhz * HZ_PER_MHZ

    @property
    def center_max_hz(self) -> float | None:
        """Highest allowed resonance, Hz (None: the line's highest frequency)."""
        return None if self.center_max_mhz is None else self.center_max_mhz * HZ_PER_MHZ


class FieldSection(Section):
    """How resonances become a field along the NV axis."""

    zfs_mhz: Annotated[float, Field(gt=2800, lt=2950)] | None = None
    temperature_k: Annotated[float, Field(gt=0)] | None = None
    one_resonance_branch: Literal["upper", "lower"] = "upper"
    sign: Annotated[int, AfterValidator(_check_sign)] = 1

    @property
    def zfs_hz(self) -> float | None:
        """Fixed zero-field splitting D, Hz (None: from temperature)."""
        return None if self.zfs_mhz is None else self.zfs_mhz * HZ_PER_MHZ


class StoreSection(Section):
    """What the per-scan zarr store keeps."""

    raw_spectra: bool = False
    compression_level: Annotated[int, Field(ge=0, le=9)] = 5
    chunk_lines: Annotated[int, Field(ge=1)] = 16


#: The ``products.calibration`` value that means "the newest calibration of the scan's tip".
LATEST_CALIBRATION = "latest"


def _check_calibration(value: str) -> str:
    parts = value.split("/")
    if len(parts) > 2 or not all(NAME_PATTERN.fullmatch(part) for part in parts):
        raise ValueError(
            f"expected {LATEST_CALIBRATION!r}, a calibration name or NAME/RECORD, each {NAME_RULE}"
        )
    return value


class ProductsSection(Section):
    """What is made once a scan is complete (see :mod:`strayline.products`), and the live
    picture of a running scan (:mod:`strayline.products.live`)."""

    enabled: bool = True
    standoff_nm: Annotated[float, Field(gt=0)] | None = None
    calibration: Annotated[str, AfterValidator(_check_calibration)] | None = None
    images: bool = True
    folder: ResolvedPath | None = None
    live_image: bool = True
    live_every_lines: Annotated[int, Field(ge=1)] | None = 32
    live_every_s: Seconds | None = 30.0

    @model_validator(mode="after")
    def _check_live(self) -> ProductsSection:
        if self.live_image and self.live_every_lines is None and self.live_every_s is None:
            raise Problems(
                [
                    (
                        "live_every_lines",
                        "the live image needs live_every_lines or live_every_s (or both); "
                        "found both null (set live_image: false to turn it off)",
                    )
                ]
            )
        return self

    @model_validator(mode="after")
    def _one_standoff_source(self) -> ProductsSection:
        if self.standoff_nm is not None and self.calibration is not None:
            raise Problems(
                [
                    (
                        "calibration",
                        "takes the stand-off from a tip calibration: set standoff_nm to null, "
                        f"or calibration to null; found standoff_nm = {self.standoff_nm:g} "
                        f"and calibration = {self.calibration!r}",
                    )
                ]
            )
        return self

    @property
    def standoff_m(self) -> float | None:
        """NV–sample distance, m (None: unknown, the sheet moment is skipped)."""
        return None if self.standoff_nm is None else self.standoff_nm * 1e-9


class AlertsSection(Section):
    """Where alert events go besides the alert log."""

    hook: dict[Severity, Annotated[list[HookArgument], Field(min_length=1)]] = Field(
        default_factory=dict
    )
    hook_timeout_s: Seconds = 10.0
    stop_request_file: ResolvedPath | None = None
    console: bool = True


class LoggingSection(Section):
    """The daemon's own log (see :func:`strayline.logs.configure_logging`)."""

    level: Literal["debug", "info", "warning", "error", "critical"] = "info"
    console: Annotated[
        Literal["auto", "plain", "journald", "json", "off"], BeforeValidator(_console_switch)
    ] = "auto"
    json_file: ResolvedPath | None = None


class ServiceSection(Section):
    """Behaviour of the long-running service."""

    watchdog: bool = True
    status_interval_s: Seconds = 60.0
    min_free_disk_mib: Annotated[float, Field(ge=0)] = 1024.0
    metrics_file: Annotated[ResolvedPath, AfterValidator(_check_metrics_file)] | None = None

    @property
    def min_free_disk_bytes(self) -> int:
        """Free space below which the service stops writing, bytes."""
        return int(self.min_free_disk_mib * MIB)


class ProfileRule(Section):
    """Pick ``profile`` for scan folders whose name matches ``folder_glob`` (fnmatch)."""

    folder_glob: Annotated[str, Field(min_length=1)]
    profile: Annotated[str, Field(min_length=1)]


class ReaderRule(Section):
    """Read the scan folders whose name matches ``folder_glob`` (fnmatch) with ``reader``."""

    folder_glob: Annotated[str, Field(min_length=1)]
    reader: Annotated[str, Field(min_length=1)]


class ReadersSection(Section):
    """Which reader reads each scan folder's files (see :mod:`strayline.lines.readers`);
    the names are checked against the installed readers when the config is built."""

    default: Annotated[str, Field(min_length=1)] = "line-file"
    rules: list[ReaderRule] = Field(default_factory=list)
