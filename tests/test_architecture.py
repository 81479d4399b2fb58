"""Tests of the package's architecture: rooms with public faces, private modules kept in
their room, imports flowing one way (the contracts in pyproject.toml)."""

from __future__ import annotations

import importlib
import pkgutil
import tomllib
from pathlib import Path

import pytest
from importlinter.cli import lint_imports

import strayline

REPO = Path(__file__).resolve().parents[1]
PACKAGE = Path(strayline.__file__).parent


def _contracts() -> list[dict]:
    data = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    return data["tool"]["importlinter"]["contracts"]


def _rooms() -> list[str]:
    """The subpackages of ``strayline`` (one per stage)."""
    return sorted(m.name for m in pkgutil.iter_modules([str(PACKAGE)]) if m.ispkg)


def test_import_contracts_are_kept() -> None:
    """Every import-linter contract holds on the package as it stands (the CI gate)."""
    assert lint_imports(config_filename=str(REPO / "pyproject.toml"), no_cache=True) == 0


def test_every_room_and_module_has_a_layer() -> None:
    """The one-way layering names every subpackage and every top-level module, so a new
    room cannot escape the contract by being left out of it."""
    (layers,) = [c for c in _contracts() if c["type"] == "layers"]
    named = {name.strip() for layer in layers["layers"] for name in layer.split("|")}
    modules = {m.name for m in pkgutil.iter_modules([str(PACKAGE)]) if m.name not in ("__main__",)}
    assert modules - named == set()
    assert named - modules == set()


@pytest.mark.parametrize("room", _rooms())
def test_each_room_has_a_public_face(room: str) -> None:
    """A room's ``__init__`` names its public face in ``__all__``, every name resolves,
    and none of them is private."""
    module = importlib.import_module(f"strayline.{room}")
    names = getattr(module, "__all__", None)
    assert names, f"strayline.{room} has no __all__"
    for name in names:
        assert not name.startswith("_"), f"strayline.{room} exports private {name}"
        assert hasattr(module, name), f"strayline.{room}.__all__ names missing {name}"
