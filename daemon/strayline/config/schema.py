"""The daemon's configuration: a validated, frozen :class:`Config` read from YAML.

The YAML speaks human units with the unit in the key name (``fwhm_min_mhz``, ``settle_s``,
``max_file_mib``); the sections offer SI values through properties (``fwhm_min_hz``,
``max_file_bytes``), so stages never convert. Every key is documented in
``config/default.yaml``.

Loading rules:

- Relative paths resolve against the folder of the file that sets them.
- Every problem becomes a :class:`~strayline.errors.ConfigError` naming the file, the
  dotted key path (``fit.fwhm_min_mhz``, ``alerts.hook.critical[0]``), what was expected and
  what was found; an unknown key comes with the nearest valid key. All problems pydantic
  finds in one pass are reported in one error (one per line, the first in ``key_path``);
  cross-field checks run once every key is valid on its own.
- A *profile* (``<profiles_dir>/<name>.yaml``) is a partial overlay for one sample type,
  deep-merged over the base config and validated as a whole; it may only set the per-scan
  sections (:data:`PROFILE_SECTIONS`), not daemon-wide settings.
"""

from __future__ import annotations

import difflib
import fnmatch
import hashlib
import json
import os
import re
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
    PrivateAttr,
    ValidationError,
    ValidationInfo,
    model_validator,
)
from pydantic.types import Strict

from strayline._numbers import HZ_PER_MHZ, MIB
from strayline.alerts import HOOK_PLACEHOLDERS
from strayline.config._load import (
    Problems,
    deep_merge,
    raise_problems,
    read_yaml_mapping,
    suggest,
    translate_validation_error,
)
from strayline.errors import ConfigError
from strayline.rules import RulesConfig, load_rules

__all__ = [
    "PROFILE_SECTIONS",
    "AlertsSection",
    "Config",
    "FieldSection",
    "FitSection",
    "LimitsSection",
    "LoggingSection",
    "PathsSection",
    "ProductsSection",
    "ProfileRule",
    "ServiceSection",
    "StoreSection",
    "WatchSection",
    "config_digest",
    "config_from_mapping",
    "load_config",
    "select_profile",
]

#: Sections (and, for ``watch``, keys) a profile may set; the rest are daemon-wide.
PROFILE_SECTIONS: Mapping[str, frozenset[str] | None] = {
    "watch": frozenset({"settle_s", "give_up_s"}),
    "fit": None,
    "field": None,
    "store": None,
    "rules": None,
    "rule_overrides": None,
    "alerts": None,
    "products": frozenset({"enabled", "standoff_nm", "images"}),
}

_PROFILE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")


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


ResolvedPath = Annotated[
    Path, Strict(False), BeforeValidator(_refuse_empty_path), AfterValidator(_resolve_path)
]
Seconds = Annotated[float, Field(gt=0)]
Severity = Literal["info", "warning", "critical"]
HookArgument = Annotated[str, AfterValidator(_check_hook_argument)]


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True, allow_inf_nan=False)


# --------------------------------------------------------------------------- sections


class PathsSection(_Section):
    """Where lines come from and where results go (absolute once loaded)."""

    watch_root: ResolvedPath
    output_root: ResolvedPath
    state_dir: ResolvedPath
    alert_log: ResolvedPath

    @model_validator(mode="before")
    @classmethod
    def _defaults_below_output_root(cls, data: Any) -> Any:
        if isinstance(data, Mapping):
            data = dict(data)
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


class WatchSection(_Section):
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


class LimitsSection(_Section):
    """Sizes above which a line file is refused (quarantined) instead of processed."""

    max_pixels: Annotated[int, Field(ge=1)] = 4096
    max_freq: Annotated[int, Field(ge=3)] = 2048
    max_file_mib: Annotated[float, Field(gt=0)] = 256.0

    @property
    def max_file_bytes(self) -> int:
        """Largest accepted line file, bytes."""
        return int(self.max_file_mib * MIB)


class FitSection(_Section):
    """The ODMR line-shape fit applied to every spectrum."""

    model: Literal["two_dips", "one_dip"] = "two_dips"
    shared_width: bool = True
    hyperfine: Literal["14N", "15N"] | None = None
    fit_slope: bool = False
    fwhm_min_mhz: Annotated[float, Field(gt=0)] = 1.0
    fwhm_max_mhz: Annotated[float, Field(gt=0)] = 60.0
    center_min_mhz: Annotated[float, Field(gt=0)] | None = None
    center_max_mhz: Annotated[float, Field(gt=0)] | None = None
    contrast_max: Annotated[float, Field(gt=0, le=1)] = 0.6
    max_iter: Annotated[int, Field(ge=1)] = 100
    min_counts: Annotated[float, Field(ge=0)] = 20.0
    weighting: Literal["poisson", "unweighted"] = "poisson"

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


class FieldSection(_Section):
    """How resonances become a field along the NV axis."""

    zfs_mhz: Annotated[float, Field(gt=2800, lt=2950)] | None = None
    temperature_k: Annotated[float, Field(gt=0)] | None = None
    one_resonance_branch: Literal["upper", "lower"] = "upper"
    sign: Annotated[int, AfterValidator(_check_sign)] = 1

    @property
    def zfs_hz(self) -> float | None:
        """Fixed zero-field splitting D, Hz (None: from temperature)."""
        return None if self.zfs_mhz is None else self.zfs_mhz * HZ_PER_MHZ


class StoreSection(_Section):
    """What the per-scan zarr store keeps."""

    raw_spectra: bool = False
    compression_level: Annotated[int, Field(ge=0, le=9)] = 5
    chunk_lines: Annotated[int, Field(ge=1)] = 1


class ProductsSection(_Section):
    """What is made once a scan is complete (see :mod:`strayline.products`)."""

    enabled: bool = True
    standoff_nm: Annotated[float, Field(gt=0)] | None = None
    images: bool = True
    folder: ResolvedPath | None = None

    @property
    def standoff_m(self) -> float | None:
        """NV–sample distance, m (None: unknown, the sheet moment is skipped)."""
        return None if self.standoff_nm is None else self.standoff_nm * 1e-9


class AlertsSection(_Section):
    """Where alert events go besides the alert log."""

    hook: dict[Severity, Annotated[list[HookArgument], Field(min_length=1)]] = Field(
        default_factory=dict
    )
    hook_timeout_s: Seconds = 10.0
    stop_request_file: ResolvedPath | None = None
    console: bool = True


class LoggingSection(_Section):
    """The daemon's own log (see :func:`strayline.logs.configure_logging`)."""

    level: Literal["debug", "info", "warning", "error", "critical"] = "info"
    console: Literal["auto", "plain", "journald", "json", "off"] = "auto"
    json_file: ResolvedPath | None = None


class ServiceSection(_Section):
    """Behaviour of the long-running service."""

    watchdog: bool = True
    status_interval_s: Seconds = 60.0
    min_free_disk_mib: Annotated[float, Field(ge=0)] = 1024.0

    @property
    def min_free_disk_bytes(self) -> int:
        """Free space below which the service stops writing, bytes."""
        return int(self.min_free_disk_mib * MIB)


class ProfileRule(_Section):
    """Pick ``profile`` for scan folders whose name matches ``folder_glob`` (fnmatch)."""

    folder_glob: Annotated[str, Field(min_length=1)]
    profile: Annotated[str, Field(min_length=1)]


# --------------------------------------------------------------------------- the config


class Config(_Section):
    """The whole configuration, validated and frozen.

    Build it with :func:`load_config` (from a file) or :func:`config_from_mapping`.
    """

    paths: PathsSection
    watch: WatchSection = Field(default_factory=WatchSection)
    limits: LimitsSection = Field(default_factory=LimitsSection)
    fit: FitSection = Field(default_factory=FitSection)
    field: FieldSection = Field(default_factory=FieldSection)
    store: StoreSection = Field(default_factory=StoreSection)
    rules: list[dict[str, Any]] = Field(default_factory=list)
    rule_overrides: dict[str, dict[str, Any]] = Field(default_factory=dict)
    alerts: AlertsSection = Field(default_factory=AlertsSection)
    products: ProductsSection = Field(default_factory=ProductsSection)
    logging: LoggingSection = Field(default_factory=LoggingSection)
    service: ServiceSection = Field(default_factory=ServiceSection)
    profiles_dir: ResolvedPath = Field(default=Path("profiles"), validate_default=True)
    profile_rules: list[ProfileRule] = Field(default_factory=list)
    default_profile: Annotated[str, Field(min_length=1)] | None = None

    _source: Path | None = PrivateAttr(default=None)
    _profile: str | None = PrivateAttr(default=None)
    _base: Config | None = PrivateAttr(default=None)
    _profile_cache: dict[str, Config] = PrivateAttr(default_factory=dict)
    _rule_set: RulesConfig | None = PrivateAttr(default=None)

    @property
    def source(self) -> Path | None:
        """The file this config was read from (the profile file for a profiled config)."""
        return self._source

    @property
    def rule_set(self) -> RulesConfig:
        """The rule set: ``rules`` (or the built-in set) with ``rule_overrides`` applied,
        validated once when this config was built."""
        if self._rule_set is None:
            self._rule_set = load_rules(self)
        return self._rule_set

    @property
    def profile(self) -> str | None:
        """Name of the applied profile, or None for the base config."""
        return self._profile

    def __eq__(self, other: object) -> bool:
        """Equal when every setting is equal (where it was read from does not count)."""
        if not isinstance(other, Config):
            return NotImplemented
        return self.as_json_dict() == other.as_json_dict()

    def __hash__(self) -> int:
        return hash(config_digest(self))

    def as_json_dict(self) -> dict[str, Any]:
        """Plain JSON-ready values (paths as absolute strings), e.g. for store attributes.

        Feeding the result back to :func:`config_from_mapping` gives an equal config.
        """
        return self.model_dump(mode="json")

    def available_profiles(self) -> tuple[str, ...]:
        """Names of the profiles found in ``profiles_dir``, sorted."""
        try:
            entries = sorted(p.stem for p in self.profiles_dir.glob("*.yaml") if p.is_file())
        except OSError:
            return ()
        return tuple(name for name in entries if _PROFILE_NAME.fullmatch(name))

    def with_profile(self, name: str) -> Config:
        """This config with the profile ``name`` applied over its base (cached per name).

        Profiles never stack: on a profiled config this applies ``name`` over the same
        base config the first profile was applied to.

        Raises
        ------
        ConfigError
            The profile does not exist (the message lists the available ones), sets a
            daemon-wide key, or makes the merged config invalid (the message names the
            profile file).
        """
        base = self._base if self._base is not None else self
        cached = base._profile_cache.get(name)
        if cached is None:
            cached = _apply_profile(base, name)
            base._profile_cache[name] = cached
        return cached


def _build(
    data: Mapping[str, Any], *, base_dir: Path, source: Path | None
) -> tuple[Config | None, list[tuple[str, str]]]:
    try:
        config = Config.model_validate(data, context={"base_dir": base_dir})
    except ValidationError as exc:
        return None, translate_validation_error(Config, exc)
    config._source = source
    # The rule set (rules, rule_overrides) is data of its own schema: parsed here, once,
    # so a bad rule stops the start (or refuses a profile) like any other key.
    try:
        config._rule_set = load_rules(config)
    except ConfigError as error:
        return None, [(error.key_path, error.problem)]
    return config, []


def config_from_mapping(
    data: Mapping[str, Any],
    *,
    base_dir: str | os.PathLike[str],
    source: str | os.PathLike[str] | None = None,
) -> Config:
    """Validate an already-parsed mapping; relative paths resolve against ``base_dir``.

    ``source`` only names the origin in error messages and :attr:`Config.source`.
    Profile names are not checked against ``profiles_dir`` here (see :func:`load_config`).
    """
    source_path = Path(source) if source is not None else None
    config, problems = _build(data, base_dir=Path(base_dir), source=source_path)
    raise_problems(source_path, problems)
    assert config is not None
    return config


def load_config(path: str | os.PathLike[str]) -> Config:
    """Read and validate a YAML config file.

    Besides the schema, every profile named by ``default_profile`` or ``profile_rules``
    must exist in ``profiles_dir`` and apply cleanly, so a typo stops the daemon at start
    rather than in the middle of a scan.

    Raises
    ------
    ConfigError
        Anything wrong with the file or a profile it names.
    """
    path = Path(path)
    data = read_yaml_mapping(path)
    config = config_from_mapping(data, base_dir=path.parent.absolute(), source=path)
    named = [(f"profile_rules[{i}].profile", r.profile) for i, r in enumerate(config.profile_rules)]
    if config.default_profile is not None:
        named.append(("default_profile", config.default_profile))
    available = config.available_profiles()
    problems = [
        (key, _unknown_profile_problem(name, config.profiles_dir, available))
        for key, name in named
        if name not in available
    ]
    raise_problems(path, problems)
    for _, name in named:
        config.with_profile(name)
    return config


def _unknown_profile_problem(name: str, profiles_dir: Path, available: tuple[str, ...]) -> str:
    listing = ", ".join(available) if available else "none"
    return (
        f"unknown profile {name!r}{suggest(name, available)} "
        f"(expected one of the profiles in {profiles_dir}: {listing})"
    )


def _apply_profile(base: Config, name: str) -> Config:
    available = base.available_profiles()
    if not _PROFILE_NAME.fullmatch(name) or name not in available:
        raise ConfigError(
            base.profiles_dir,
            "profile",
            _unknown_profile_problem(name, base.profiles_dir, available),
        )
    profile_path = base.profiles_dir / f"{name}.yaml"
    overlay = read_yaml_mapping(profile_path)
    raise_problems(profile_path, _daemon_wide_keys(overlay))
    merged = deep_merge(base.as_json_dict(), overlay)
    config, problems = _build(merged, base_dir=profile_path.parent, source=profile_path)
    raise_problems(profile_path, problems)
    assert config is not None
    config._profile = name
    config._base = base
    return config


def _daemon_wide_keys(overlay: Mapping[str, Any]) -> list[tuple[str, str]]:
    allowed = ", ".join(PROFILE_SECTIONS)
    problems = []
    for key, value in overlay.items():
        if key not in PROFILE_SECTIONS:
            problems.append(
                (str(key), f"a profile may set only {allowed}; this key is daemon-wide")
            )
            continue
        keys = PROFILE_SECTIONS[key]
        if keys is not None and isinstance(value, Mapping):
            problems.extend(
                (
                    f"{key}.{sub}",
                    f"a profile may set only {', '.join(sorted(keys))} in {key}; "
                    "this key is daemon-wide",
                )
                for sub in value
                if sub not in keys
            )
    return problems


def select_profile(config: Config, scan_folder_name: str, file_profile: str | None) -> str | None:
    """Choose the profile for a scan.

    Order: the line file's own profile attribute (when non-empty), then the first
    ``profile_rules`` entry whose ``folder_glob`` matches ``scan_folder_name``
    (case-sensitive fnmatch), then ``default_profile``. Returns None for "no profile".
    The name is not checked here; :meth:`Config.with_profile` does that.
    """
    if file_profile is not None and file_profile.strip():
        return file_profile.strip()
    for rule in config.profile_rules:
        if fnmatch.fnmatchcase(scan_folder_name, rule.folder_glob):
            return rule.profile
    return config.default_profile


def config_digest(config: Config) -> str:
    """SHA-256 (hex) of the canonical JSON of ``config`` (sorted keys, no spaces).

    Equal configs give equal digests whatever the key order or number spelling
    (``1`` and ``1.0`` for a float key) in their YAML.
    """
    canonical = json.dumps(
        config.as_json_dict(),
        sort_keys=True,
        separators=(",", ":"),
        ensure_ascii=False,
        allow_nan=False,
    )
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()
