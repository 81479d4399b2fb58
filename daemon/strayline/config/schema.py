"""The daemon's configuration: a validated, frozen :class:`Config` read from YAML, its
profiles and its digest (the sections themselves are in :mod:`strayline.config._sections`).

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

import fnmatch
import hashlib
import json
import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any

from pydantic import (
    Field,
    PrivateAttr,
    ValidationError,
)

from strayline.config._load import (
    deep_merge,
    raise_problems,
    read_yaml_mapping,
    suggest,
    translate_validation_error,
)
from strayline.config._sections import (
    AlertsSection,
    FieldSection,
    FitSection,
    LimitsSection,
    LoggingSection,
    PathsSection,
    ProductsSection,
    ProfileRule,
    ReadersSection,
    ResolvedPath,
    Section,
    ServiceSection,
    StoreSection,
    WatchSection,
)
from strayline.errors import ConfigError
from strayline.lines import LINE_FILE_READER, ReaderChoice, installed_readers
from strayline.rules import RulesConfig, load_rules

__all__ = [
    "PROFILE_SECTIONS",
    "Config",
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
    "products": frozenset({"enabled", "standoff_nm", "calibration", "images"}),
}

_PROFILE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")


# --------------------------------------------------------------------------- the config


class Config(Section):
    """The whole configuration, validated and frozen.

    Build it with :func:`load_config` (from a file) or :func:`config_from_mapping`.
    """

    paths: PathsSection
    watch: WatchSection = Field(default_factory=WatchSection)
    readers: ReadersSection = Field(default_factory=ReadersSection)
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
    _reader_choice: ReaderChoice | None = PrivateAttr(default=None)

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
    def reader_choice(self) -> ReaderChoice:
        """The reader of each scan folder (``readers``, names checked against the installed
        readers when this config was built; ``watch.pattern`` is the file-name pattern of
        the contract-v1 reader)."""
        if self._reader_choice is None:
            choice, problems = _reader_choice(self)
            if choice is None:
                raise ConfigError(self._source, problems[0][0], problems[0][1])
            self._reader_choice = choice
        return self._reader_choice

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

    @property
    def profiles_folder(self) -> Path:
        """Where the profiles are read from: ``profiles_dir``; or, when a config file names
        a ``profiles_dir`` that holds no profile (a copy of ``default.yaml`` moved away
        from its ``profiles/``), the profiles shipped with strayline, if present."""
        named_but_empty = "profiles_dir" in self.model_fields_set and not _profile_names(
            self.profiles_dir
        )
        if named_but_empty and _profile_names(SHIPPED_PROFILES):
            return SHIPPED_PROFILES
        return self.profiles_dir

    def available_profiles(self) -> tuple[str, ...]:
        """Names of the profiles found in :attr:`profiles_folder`, sorted."""
        return _profile_names(self.profiles_folder)

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
    config._reader_choice, problems = _reader_choice(config)
    if problems:
        return None, problems
    return config, []


def _reader_choice(config: Config) -> tuple[ReaderChoice | None, list[tuple[str, str]]]:
    """The reader of each scan folder, or the keys that name no installed reader."""
    installed = installed_readers()
    section = config.readers
    named = [("readers.default", section.default)] + [
        (f"readers.rules[{i}].reader", rule.reader) for i, rule in enumerate(section.rules)
    ]
    problems = [
        (
            key,
            f"unknown reader {name!r}{suggest(name, installed.names)} (expected one of the "
            f"installed readers: {', '.join(installed.names)})",
        )
        for key, name in named
        if name not in installed.readers
    ]
    if problems:
        return None, problems
    rules = tuple((rule.folder_glob, installed.readers[rule.reader]) for rule in section.rules)
    patterns = {LINE_FILE_READER.name: (config.watch.pattern,)}
    return ReaderChoice(rules, installed.readers[section.default], patterns), []


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
        (key, _unknown_profile_problem(name, config.profiles_folder, available))
        for key, name in named
        if name not in available
    ]
    raise_problems(path, problems)
    for _, name in named:
        config.with_profile(name)
    return config


#: The sample-type profiles that come with strayline: ``config/profiles`` of the checkout
#: it runs from (absent from an installation without that folder).
SHIPPED_PROFILES = Path(__file__).resolve().parents[3] / "config" / "profiles"


def _profile_names(folder: Path) -> tuple[str, ...]:
    """Names of the profiles in ``folder``, sorted (none where it cannot be listed)."""
    try:
        entries = sorted(p.stem for p in folder.glob("*.yaml") if p.is_file())
    except OSError:
        return ()
    return tuple(name for name in entries if _PROFILE_NAME.fullmatch(name))


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
            base.profiles_folder,
            "profile",
            _unknown_profile_problem(name, base.profiles_folder, available),
        )
    profile_path = base.profiles_folder / f"{name}.yaml"
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
