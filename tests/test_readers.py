"""Tests for the reader registry and the choice of reader per scan folder
(strayline.lines.readers), their config keys and their listing by ``check-config``."""

from __future__ import annotations

from importlib.metadata import EntryPoint
from pathlib import Path, PurePosixPath

import pytest
import yaml

import strayline.lines.readers as readers_module
from strayline.cli import main
from strayline.config import config_from_mapping
from strayline.errors import ConfigError
from strayline.lines import (
    GROWING_FILE_READER,
    LINE_FILE_READER,
    PLAIN_ARRAYS_READER,
    LineReader,
    ReaderChoice,
    installed_readers,
)
from strayline.watch import LineNames

#: A reader object other packages would register (here: this module's own).
PLUGGED = LINE_FILE_READER.__class__(name="plugged", patterns=("*.plug",), summary="a test")


@pytest.fixture
def fresh_registry():  # type: ignore[no-untyped-def]
    """Forget the readers found so far, before and after the test."""
    installed_readers.cache_clear()
    yield
    installed_readers.cache_clear()


def test_the_built_in_readers_are_always_installed(fresh_registry: None) -> None:
    """The three built-in readers are found, satisfy the interface and say so."""
    found = installed_readers()
    assert found.names == ("growing-file", "line-file", "plain-arrays")
    assert all(isinstance(r, LineReader) for r in found.readers.values())
    assert set(found.origins.values()) == {"built in"}
    assert found.problems == ()


def test_entry_points_add_readers_and_bad_ones_are_named(
    fresh_registry: None, monkeypatch: pytest.MonkeyPatch
) -> None:
    """An entry point naming a reader adds it; one that does not load, is no reader, or
    takes a built-in name is left out with a message saying which and why."""
    group = readers_module.READER_GROUP
    points = [
        EntryPoint("plugged", f"{__name__}:PLUGGED", group),
        EntryPoint("broken", "no_such_module_anywhere:READER", group),
        EntryPoint("notareader", "builtins:len", group),
        EntryPoint("line-file", f"{__name__}:PLUGGED", group),
        EntryPoint("growing-file", "strayline.lines.growing_file:GROWING_FILE_READER", group),
    ]
    monkeypatch.setattr(readers_module, "entry_points", lambda group: points)
    found = installed_readers()
    assert found.readers["plugged"] is PLUGGED
    assert found.readers["line-file"] is LINE_FILE_READER
    problems = "\n".join(found.problems)
    assert "reader 'broken' of an unknown package (no_such_module_anywhere:READER) does not " in (
        problems
    )
    assert "entry point 'notareader' of an unknown package (builtins:len) is not a reader" in (
        problems
    )
    assert "reader 'line-file' of an unknown package is ignored: the name is taken" in problems
    assert len(found.problems) == 3  # the built-in's own registration is no problem


def test_the_first_matching_rule_picks_the_reader() -> None:
    """Folder globs are tried in order; unmatched folders get the default reader, and a
    file is served only when its name matches its reader's patterns."""
    choice = ReaderChoice(
        (("live-*", GROWING_FILE_READER), ("arr-*", PLAIN_ARRAYS_READER)),
        LINE_FILE_READER,
        {"line-file": ("line_*.h5",)},
    )
    assert choice.for_folder("live-7") is GROWING_FILE_READER
    assert choice.for_folder("arr-1") is PLAIN_ARRAYS_READER
    assert choice.for_folder("other") is LINE_FILE_READER
    assert choice.serving(PurePosixPath("arr-1/line_00001_fwd.npz")) is PLAIN_ARRAYS_READER
    assert choice.serving(PurePosixPath("arr-1/line_00001_fwd.h5")) is None
    assert choice.serving(PurePosixPath("other/line_00001_fwd.h5")) is LINE_FILE_READER
    assert choice.serving(PurePosixPath("other/notes.h5")) is None  # watch.pattern narrows
    assert [r.name for r in choice.readers()] == ["line-file", "growing-file", "plain-arrays"]


def test_line_names_follow_each_folders_reader(tmp_path: Path) -> None:
    """The watcher's name rules ask the folder's reader: .npz lines in an arrays folder,
    a growing file in a live folder, never a sidecar."""
    choice = ReaderChoice(
        (("live-*", GROWING_FILE_READER), ("arr-*", PLAIN_ARRAYS_READER)), LINE_FILE_READER, {}
    )
    names = LineNames(tmp_path, readers=choice)
    assert names.is_line(tmp_path / "arr-1" / "line_00000_fwd.npz")
    assert not names.is_line(tmp_path / "arr-1" / "scan.json")
    assert names.is_growing(tmp_path / "live-2" / "scan.h5")
    assert not names.is_growing(tmp_path / "plain" / "line_00000_fwd.h5")


def _config_data(**readers: object) -> dict[str, object]:
    return {"paths": {"watch_root": "in", "output_root": "out"}, "readers": readers}


def test_an_unknown_reader_is_a_config_error_listing_the_installed_ones(tmp_path: Path) -> None:
    """A reader name nobody installed stops the config, naming the key path, the nearest
    name and every installed reader."""
    data = _config_data(rules=[{"folder_glob": "x-*", "reader": "growing-fil"}])
    with pytest.raises(ConfigError) as caught:
        config_from_mapping(data, base_dir=tmp_path)
    assert caught.value.key_path == "readers.rules[0].reader"
    assert caught.value.problem == (
        "unknown reader 'growing-fil'; did you mean 'growing-file'? (expected one of the "
        "installed readers: growing-file, line-file, plain-arrays)"
    )


def test_the_config_gives_the_reader_choice(tmp_path: Path) -> None:
    """readers.default and readers.rules become the choice; watch.pattern narrows the
    contract-v1 reader's files."""
    data = _config_data(
        default="plain-arrays", rules=[{"folder_glob": "g*", "reader": "line-file"}]
    )
    data["watch"] = {"pattern": "line_*.h5"}
    choice = config_from_mapping(data, base_dir=tmp_path).reader_choice
    assert choice.default is PLAIN_ARRAYS_READER
    assert choice.for_folder("g1") is LINE_FILE_READER
    assert choice.patterns_of(LINE_FILE_READER) == ("line_*.h5",)


def test_check_config_lists_readers_and_what_each_folder_gets(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """check-config prints every installed reader with its patterns, then which reader
    reads which scan folders."""
    path = tmp_path / "strayline.yaml"
    data = _config_data(rules=[{"folder_glob": "live-*", "reader": "growing-file"}])
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    assert main(["check-config", str(path)]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[1] == "readers (entry-point group strayline.readers):"
    assert out[2].startswith("  growing-file  *.h5  one HDF5 file per scan")
    assert out[4].startswith("  plain-arrays  *.npz *.npy  per-line NumPy")
    assert out[-2] == "scan folders matching 'live-*': growing-file reads *.h5"
    assert out[-1] == "other scan folders: line-file reads *.h5"
