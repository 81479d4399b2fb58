"""Private helpers of :mod:`strayline.config`: YAML reading, overlays, error wording.

Nothing here knows the config schema; the root model class is passed in where the schema
is needed (to suggest the nearest valid key).
"""

from __future__ import annotations

import difflib
import os
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, get_args, get_origin

import yaml
from pydantic import BaseModel, ValidationError

from strayline.errors import ConfigError

__all__ = [
    "Problems",
    "deep_merge",
    "describe",
    "format_key_path",
    "raise_problems",
    "read_yaml_mapping",
    "suggest",
    "translate_validation_error",
]


class Problems(ValueError):
    """Cross-field problems found by a model validator, each keyed relative to that model.

    Pydantic wraps a ValueError raised in a validator into its ValidationError with the
    model's location; :func:`translate_validation_error` unpacks the list again so every
    problem keeps its own dotted key path.
    """

    def __init__(self, problems: Sequence[tuple[str, str]]) -> None:
        self.problems = list(problems)
        super().__init__("; ".join(f"{key}: {text}" for key, text in self.problems))


# --------------------------------------------------------------------------- YAML


class _StrictLoader(yaml.SafeLoader):
    """yaml.SafeLoader that refuses a key given twice in one mapping (PyYAML keeps the last)."""


def _construct_mapping(loader: _StrictLoader, node: yaml.MappingNode) -> dict[Any, Any]:
    loader.flatten_mapping(node)
    seen: dict[Any, int] = {}
    for key_node, _ in node.value:
        key = loader.construct_object(key_node)  # type: ignore[no-untyped-call]
        if isinstance(key, str | int | float | bool) and key in seen:
            raise yaml.constructor.ConstructorError(
                "while reading a mapping",
                node.start_mark,
                f"key {key!r} given twice (first on line {seen[key] + 1})",
                key_node.start_mark,
            )
        if isinstance(key, str | int | float | bool):
            seen[key] = key_node.start_mark.line
    return loader.construct_mapping(node)


_StrictLoader.add_constructor(
    yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG,
    _construct_mapping,  # type: ignore[arg-type]
)


def read_yaml_mapping(path: Path) -> dict[str, Any]:
    """Read a YAML file that must hold a mapping (an empty file is an empty mapping).

    Raises
    ------
    ConfigError
        The file cannot be read, is not valid YAML (the message gives line and column),
        repeats a key, or its top level is not a mapping.
    """
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(path, "(file)", f"cannot read the file: {exc}") from exc
    try:
        data = yaml.load(text, Loader=_StrictLoader)  # a SafeLoader subclass: safe
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f"line {mark.line + 1}, column {mark.column + 1}" if mark else "(file)"
        problem = exc.problem or exc.context or "unreadable"
        raise ConfigError(path, where, f"invalid YAML: {problem}") from exc
    except yaml.YAMLError as exc:
        raise ConfigError(path, "(file)", f"invalid YAML: {exc}") from exc
    if data is None:
        return {}
    if not isinstance(data, dict):
        raise ConfigError(
            path, "(top level)", f"expected a mapping of sections; found {describe(data)}"
        )
    return data


def deep_merge(base: Mapping[str, Any], overlay: Mapping[str, Any]) -> dict[str, Any]:
    """Return ``base`` with ``overlay`` merged in: mappings merge key by key, recursively;
    any other overlay value (scalar, list, null) replaces the base value whole."""
    merged = dict(base)
    for key, value in overlay.items():
        old = merged.get(key)
        if isinstance(old, Mapping) and isinstance(value, Mapping):
            merged[key] = deep_merge(old, value)
        else:
            merged[key] = value
    return merged


# --------------------------------------------------------------------------- wording


def format_key_path(loc: Sequence[str | int]) -> str:
    """Dotted key path from a location tuple: ``('alerts', 'hook', 'critical', 0)`` ->
    ``alerts.hook.critical[0]``."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else str(part)
    return out or "(top level)"


def describe(value: object) -> str:
    """Say what a YAML value is, for the 'found ...' half of a message."""
    if value is None or isinstance(value, bool):
        text = {None: "null", True: "true", False: "false"}[value]
    elif isinstance(value, int | float):
        text = f"the number {value!r}"
    elif isinstance(value, str):
        text = f"the text {value!r}"
    elif isinstance(value, Mapping):
        keys = ", ".join(map(str, list(value)[:5]))
        text = f"a mapping (keys: {keys})" if keys else "an empty mapping"
    elif isinstance(value, list | tuple):
        text = f"a list of {len(value)} item{'s' if len(value) != 1 else ''}"
    else:
        text = f"a {type(value).__name__}"
    return text


def suggest(word: str, choices: Sequence[str]) -> str:
    """``"; did you mean 'x'?"`` when one of ``choices`` is close to ``word``, else ''."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f"; did you mean {close[0]!r}?" if close else ""


def _model_at(root: type[BaseModel], loc: Sequence[str | int]) -> type[BaseModel] | None:
    """The model class that owns the keys at ``loc`` (None when ``loc`` is not a model)."""
    current: type[BaseModel] = root
    for part in loc:
        if isinstance(part, int):
            continue
        field = current.model_fields.get(part)
        if field is None:
            return None
        found = _find_model(field.annotation)
        if found is None:
            return None
        current = found
    return current


def _find_model(annotation: object) -> type[BaseModel] | None:
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    if get_origin(annotation) in (dict,):
        return None
    for arg in get_args(annotation):
        found = _find_model(arg)
        if found is not None:
            return found
    return None


_EXPECTED = {
    "float_type": "a number",
    "float_parsing": "a number",
    "finite_number": "a finite number",
    "int_type": "a whole number",
    "int_parsing": "a whole number",
    "int_from_float": "a whole number",
    "bool_type": "true or false",
    "bool_parsing": "true or false",
    "string_type": "text",
    "path_type": "a path (text)",
    "list_type": "a list",
    "dict_type": "a mapping",
    "model_type": "a mapping",
    "model_attributes_type": "a mapping",
}

_BOUNDS = {
    "greater_than": ("gt", "a value above {}"),
    "greater_than_equal": ("ge", "a value of at least {}"),
    "less_than": ("lt", "a value below {}"),
    "less_than_equal": ("le", "a value of at most {}"),
    "string_too_short": ("min_length", "text of at least {} character(s)"),
    "too_short": ("min_length", "at least {} item(s)"),
    "too_long": ("max_length", "at most {} item(s)"),
}

_QUOTED = re.compile(r"'([^']*)'")


def _one_error(root: type[BaseModel], err: Mapping[str, Any]) -> list[tuple[str, str]]:
    loc = tuple(err["loc"])
    kind = err["type"]
    ctx = err.get("ctx") or {}
    if kind == "value_error" and isinstance(ctx.get("error"), Problems):
        return [
            (format_key_path((*loc, *key.split("."))), text) for key, text in ctx["error"].problems
        ]
    if loc and loc[-1] == "[key]":
        loc = loc[:-1]
    return [(format_key_path(loc), _problem(root, err, loc))]


def _problem(root: type[BaseModel], err: Mapping[str, Any], loc: tuple[str | int, ...]) -> str:
    kind = err["type"]
    ctx = err.get("ctx") or {}
    value = err.get("input")
    found = describe(value)
    if kind == "extra_forbidden":
        owner = _model_at(root, loc[:-1])
        text = f"unknown key{suggest(str(loc[-1]), list(owner.model_fields) if owner else [])}"
    elif tuple(err["loc"])[-1:] == ("[key]",):
        hint = suggest(str(value), _QUOTED.findall(str(ctx.get("expected", ""))))
        text = f"unknown key {value!r}; expected one of {ctx.get('expected')}{hint}"
    elif kind == "missing":
        text = "required key is missing"
    elif kind == "value_error":
        text = f"{ctx.get('error')}; found {found}"
    elif kind == "literal_error":
        hint = suggest(str(value), _QUOTED.findall(str(ctx.get("expected", ""))))
        text = f"expected one of {ctx.get('expected')}; found {found}{hint}"
    elif kind in _BOUNDS:
        ctx_key, wording = _BOUNDS[kind]
        text = f"expected {wording.format(ctx.get(ctx_key))}; found {found}"
    else:
        expected = _EXPECTED.get(kind, str(err.get("msg", "a valid value")).lower())
        text = f"expected {expected}; found {found}"
    return text


def translate_validation_error(
    root: type[BaseModel], error: ValidationError
) -> list[tuple[str, str]]:
    """Turn a pydantic ValidationError into (dotted key path, problem) pairs, in order."""
    problems: list[tuple[str, str]] = []
    for err in error.errors(include_url=False):
        problems.extend(_one_error(root, err))
    return problems


def raise_problems(
    path: str | os.PathLike[str] | None, problems: Sequence[tuple[str, str]]
) -> None:
    """Raise one :class:`ConfigError` for all ``problems`` (no-op when there are none).

    The error's ``key_path`` and first message line are the first problem; each further
    problem follows on its own line in the same ``file: key: problem`` form.
    """
    if not problems:
        return
    (key, text), rest = problems[0], problems[1:]
    if rest:
        where = f"{path}: " if path is not None else ""
        more = "".join(f"\n{where}{k}: {t}" for k, t in rest)
        text = f"{text}{more}"
    raise ConfigError(path, key, text)
