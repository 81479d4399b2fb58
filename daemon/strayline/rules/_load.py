"""Loading rule sets: from YAML files, from the daemon's config, with per-profile overrides.

Every problem becomes a :class:`~strayline.errors.ConfigError` naming the file, the dotted
key path (``rules[2].z_above``, ``rule_overrides.resonance_jump.hold_fraction``) and what
was found. Re-exported by :mod:`strayline.rules`.
"""

from __future__ import annotations

import difflib
from collections.abc import Callable, Mapping
from os import PathLike
from pathlib import Path
from typing import Any, Protocol

import yaml
from pydantic import TypeAdapter, ValidationError

from strayline.errors import ConfigError
from strayline.rules.spec import (
    RULE_KINDS,
    AcquisitionStalledSpec,
    AnyRuleSpec,
    ContrastCollapsedSpec,
    FitFailuresRisingSpec,
    FluorescenceLostSpec,
    ResonanceJumpSpec,
    RulesConfig,
    ThresholdSpec,
    ZfsDriftSpec,
)

__all__ = ["apply_overrides", "default_rules", "load_rules", "rules_from_data"]


def default_rules() -> RulesConfig:
    """The built-in rule set (the same as ``config/rules.yaml``)."""
    return RulesConfig(
        rules=[
            FluorescenceLostSpec(),
            ContrastCollapsedSpec(),
            ResonanceJumpSpec(),
            FitFailuresRisingSpec(),
            AcquisitionStalledSpec(),
            ZfsDriftSpec(),
        ]
    )


def _key_path(loc: tuple[int | str, ...]) -> str:
    parts: list[str] = []
    prev_index = False
    for item in loc:
        if isinstance(item, int):
            parts.append(f"[{item}]")
            prev_index = True
            continue
        if prev_index and item in RULE_KINDS:  # the discriminator's own level
            prev_index = False
            continue
        prev_index = False
        parts.append(("." if parts else "") + str(item))
    return "".join(parts) or "<root>"


_SPEC_BY_KIND: dict[str, type[Any]] = {
    cls.model_fields["kind"].default: cls
    for cls in (
        FluorescenceLostSpec,
        ContrastCollapsedSpec,
        ResonanceJumpSpec,
        FitFailuresRisingSpec,
        AcquisitionStalledSpec,
        ZfsDriftSpec,
        ThresholdSpec,
    )
}


def _spec_keys(loc: tuple[Any, ...], spec: type[Any] | None = None) -> list[str]:
    """The keys a rule of the kind named in ``loc`` (or ``spec``) takes; none if unknown."""
    if spec is None:
        kinds = [item for item in loc if isinstance(item, str) and item in _SPEC_BY_KIND]
        spec = _SPEC_BY_KIND[kinds[-1]] if kinds else None
    return list(spec.model_fields) if spec is not None else []


def _problem(
    errors: list[Any], spec: type[Any] | None = None, where: Callable[[Any], str] | None = None
) -> str:
    """The first pydantic error in our wording, the others' key paths after it.

    An unknown key of a rule comes with the nearest key and the rule's keys; a message
    that already shows what it found is not followed by a second "found". ``where`` gives
    an error's key path (default: :func:`_key_path` of its location).
    """
    path_of = where if where is not None else (lambda e: _key_path(tuple(e["loc"])))
    first = errors[0]
    problem = str(first["msg"]).removeprefix("Value error, ")
    if first["type"] == "extra_forbidden":
        key = str(first["loc"][-1]) if first["loc"] else ""
        known = _spec_keys(tuple(first["loc"]), spec)
        close = difflib.get_close_matches(key, known, n=1)
        problem = "unknown key" + (f" (did you mean {close[0]!r}?)" if close else "")
        if known:
            problem += f"; the keys of this rule are {', '.join(known)}"
    elif first["type"] == "union_tag_invalid":
        problem = f"kind must be one of {', '.join(RULE_KINDS)}; found {first['input']!r}"
    elif "input" in first and first["type"] not in ("missing",) and first["loc"]:
        # (a whole-set check at the root names what it found in its own message)
        found = repr(first["input"])
        if found not in problem:
            problem += f"; found {found}"
    if len(errors) > 1:
        others = ", ".join(path_of(e) for e in errors[1:4])
        more = " …" if len(errors) > 4 else ""
        problem += f" (and {len(errors) - 1} more problem(s): {others}{more})"
    return problem


def rules_from_data(
    data: Mapping[str, Any] | list[Any] | None, path: str | PathLike[str] | None = None
) -> RulesConfig:
    """Validate a rule set given as data (a mapping, or a bare list of rules).

    Raises
    ------
    ConfigError
        Naming the file, the dotted key path of the first problem and what was found;
        further problems are counted in the message.
    """
    if data is None:
        data = {}
    if isinstance(data, list):
        data = {"rules": data}
    try:
        return RulesConfig.model_validate(data)
    except ValidationError as exc:
        errors = exc.errors()
        first = errors[0]
        raise ConfigError(path, _key_path(tuple(first["loc"])), _problem(errors)) from None


_ONE_RULE: TypeAdapter[Any] = TypeAdapter(AnyRuleSpec)


def apply_overrides(
    rules: RulesConfig,
    overrides: Mapping[str, Any] | None,
    path: str | PathLike[str] | None = None,
) -> RulesConfig:
    """``rules`` with some settings of some rules changed: ``{rule name: {key: value}}``.

    This is how a sample-type profile tunes a threshold or two without restating the
    whole rule set (config key ``rule_overrides``; a profile's overrides merge key by key
    over the base config's).

    Raises
    ------
    ConfigError
        Naming the file and ``rule_overrides.<rule>[.<key>]``: an unknown rule (with the
        nearest name), an unknown key, a bad value, or a change of a rule's name or kind.
    """
    if not overrides:
        return rules
    if not isinstance(overrides, Mapping):
        raise ConfigError(
            path, "rule_overrides", f"expected a mapping of rule names; found {overrides!r}"
        )
    specs = {r.name: r for r in rules.rules}
    for name, keys in overrides.items():
        where = f"rule_overrides.{name}"
        spec = specs.get(name)
        if spec is None:
            close = difflib.get_close_matches(str(name), list(specs), n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise ConfigError(
                path, where, f"no rule of this name{hint}; the rules are {', '.join(specs)}"
            )
        if not isinstance(keys, Mapping):
            raise ConfigError(path, where, f"expected a mapping of settings; found {keys!r}")
        for fixed in ("name", "kind"):
            if fixed in keys and keys[fixed] != getattr(spec, fixed):
                raise ConfigError(
                    path,
                    f"{where}.{fixed}",
                    f"an override cannot change a rule's {fixed}; found {keys[fixed]!r}",
                )
        data = {**spec.model_dump(exclude_unset=True), "name": spec.name, "kind": spec.kind}
        try:
            specs[name] = _ONE_RULE.validate_python({**data, **keys})
        except ValidationError as exc:
            errors = exc.errors()

            def key_path(error: Any, where: str = where, kind: str = spec.kind) -> str:
                loc = [str(v) for v in error["loc"]]
                if loc and loc[0] == kind:  # the discriminator's own level
                    loc = loc[1:]
                return ".".join([where, *loc])

            raise ConfigError(
                path, key_path(errors[0]), _problem(errors, type(spec), key_path)
            ) from None
    try:
        return RulesConfig(version=rules.version, baseline=rules.baseline, rules=[*specs.values()])
    except ValidationError as exc:
        errors = exc.errors()
        raise ConfigError(path, "rule_overrides", _problem(errors)) from None


class _HasRules(Protocol):
    @property
    def rules(self) -> Any: ...


def load_rules(source: str | PathLike[str] | _HasRules) -> RulesConfig:
    """Read and validate a rule set from a YAML file or from a daemon config.

    Parameters
    ----------
    source : path or config
        A rules YAML file (like ``config/rules.yaml``), or an object with a ``rules``
        attribute holding the rules as data (the daemon's ``Config``: a list of rule
        mappings, or a mapping with ``baseline`` and ``rules``); its ``source`` attribute,
        if any, names the file in errors. Empty or missing rules mean the built-in set,
        :func:`default_rules` (to run without a rule, list it with ``enabled: false``).
        A ``rule_overrides`` attribute, if any, then changes single settings
        (:func:`apply_overrides`).

    Raises
    ------
    ConfigError
        If the file cannot be read, is not YAML, or does not validate.
    """
    if not isinstance(source, str | PathLike):
        where = getattr(source, "source", None)
        data = source.rules
        rules = rules_from_data(data, where) if data else default_rules()
        return apply_overrides(rules, getattr(source, "rule_overrides", None), where)
    p = Path(source)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(p, "<file>", f"cannot be read: {exc.strerror}") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}" if mark is not None else "unknown line"
        raise ConfigError(p, "<yaml>", f"is not valid YAML at {where}") from None
    if data is not None and not isinstance(data, Mapping | list):
        raise ConfigError(p, "<root>", f"must be a mapping; found {type(data).__name__}")
    return rules_from_data(data, p)
