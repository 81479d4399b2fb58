"""Group commits: files ready together go through the pipeline as one batch.

The store and the alerts must not depend on how lines were grouped, and a crash between a
group's commit and its evaluation must leave exactly the group's unevaluated lines to be
evaluated when their files come again.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from strayline.lines import BAD_FILE_RULE, ScanLine
from strayline.pipeline import LinePipeline
from strayline.pipeline.line_pipeline import LinePipeline as _Pipeline
from strayline.rules import RuleEngine
from strayline.store import MAP_NAMES, open_store_reader
from tests.test_pipeline import N_LINES, SCAN, _config, _copy_scan, _files, scan_files

__all__ = ["scan_files"]  # the module-scoped fixture, shared with test_pipeline


class SimulatedCrash(Exception):
    """Stands for the process dying at the point it is raised."""


def _ledger(tmp_path: Path) -> list[dict[str, Any]]:
    path = tmp_path / "output" / f"{SCAN}.zarr" / "ledger" / "records.jsonl"
    return [json.loads(r) for r in path.read_text().splitlines()]


def _maps(tmp_path: Path) -> dict[str, np.ndarray]:
    reader = open_store_reader(tmp_path / "output" / f"{SCAN}.zarr")
    return {name: reader.read_array(name, "forward") for name in MAP_NAMES}


def _judged(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """Record the line index of every line the rules judge from now on."""
    seen: list[int] = []
    real = _Pipeline._judge

    def spy(self: _Pipeline, line: ScanLine, *args: Any) -> Any:
        seen.append(line.line_index)
        return real(self, line, *args)

    monkeypatch.setattr(_Pipeline, "_judge", spy)
    return seen


def test_a_batch_is_one_group_and_stores_what_one_by_one_stores(
    scan_files: Path, tmp_path: Path
) -> None:
    """A scan's lines processed as one batch are committed as one group (one group number
    in the ledger) and give the same maps, bit for bit, and the same alert events as the
    same files processed one at a time."""
    grouped_dir, single_dir = tmp_path / "grouped", tmp_path / "single"
    results = {}
    for work, batch in ((grouped_dir, True), (single_dir, False)):
        folder = _copy_scan(scan_files, work)
        pipeline = LinePipeline(_config(work))
        try:
            files = _files(folder)
            outcomes = (
                pipeline.process_many(files) if batch else [pipeline.process(p) for p in files]
            )
        finally:
            pipeline.close()
        assert [o.kind for o in outcomes] == ["written"] * N_LINES
        events = [(e.rule, e.state, e.line_index) for o in outcomes for e in o.events]
        results[batch] = (_maps(work), events, _ledger(work))
    (grouped_maps, grouped_events, grouped_ledger) = results[True]
    (single_maps, single_events, single_ledger) = results[False]
    for name in MAP_NAMES:
        np.testing.assert_array_equal(grouped_maps[name], single_maps[name], err_msg=name)
    assert grouped_events == single_events
    grouped_commits = [r for r in grouped_ledger if r["event"] == "commit"]
    assert {r["group"] for r in grouped_commits} == {0}
    assert [r["line_index"] for r in grouped_commits] == list(range(N_LINES))
    single_groups = [r["group"] for r in single_ledger if r["event"] == "commit"]
    assert single_groups == list(range(N_LINES))  # each line alone: a group of its own


def test_a_crash_between_a_group_commit_and_its_evaluation_is_caught_up(
    scan_files: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """If the process dies after a group's commit but before the rule state is saved,
    the group's lines are evaluated when their files come again: first the part of the
    group given, then only the rest; lines evaluated before the crash's group are not."""
    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    config = _config(tmp_path)
    state = config.paths.state_dir / "rules_state.json"
    first = LinePipeline(config)
    first.process_many(files[:2])  # committed and evaluated: a group of its own
    with monkeypatch.context() as patch:

        def die(*args: object) -> None:
            raise SimulatedCrash

        patch.setattr(RuleEngine, "save", die)
        with pytest.raises(SimulatedCrash):
            first.process_many(files[2:])
    # the process is gone: its stores' locks go with it
    for scan in first._scans.values():
        scan.store.close()
    judged = _judged(monkeypatch)

    again = LinePipeline(config)
    try:
        part = again.process_many(files[:5])
        assert judged == [2, 3, 4]  # 0 and 1 were evaluated before the crash
        assert [o.kind for o in part] == ["duplicate"] * 5
        rest = again.process_many(files)
        assert judged == [2, 3, 4, 5, 6, 7]
        assert [o.kind for o in rest] == ["duplicate"] * N_LINES
    finally:
        again.close()
    index, direction, _sha = RuleEngine.restore(config.rule_set, state).last_evaluated(SCAN)
    assert (index, direction) == (N_LINES - 1, "forward")
    judged.clear()
    final = LinePipeline(config)
    try:
        assert [o.kind for o in final.process_many(files)] == ["duplicate"] * N_LINES
    finally:
        final.close()
    assert judged == []


def test_a_bad_file_inside_a_batch_is_quarantined_alone(scan_files: Path, tmp_path: Path) -> None:
    """A damaged file in the middle of a batch is quarantined with its alert; the lines
    around it are committed together."""
    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    files[3].write_bytes(b"not an HDF5 file")
    pipeline = LinePipeline(_config(tmp_path))
    try:
        outcomes = pipeline.process_many(files)
    finally:
        pipeline.close()
    kinds = [o.kind for o in outcomes]
    assert kinds == ["written"] * 3 + ["quarantined"] + ["written"] * (N_LINES - 4)
    assert [e.rule for e in outcomes[3].events] == [BAD_FILE_RULE]
    commits = [r for r in _ledger(tmp_path) if r["event"] == "commit"]
    assert len({r["group"] for r in commits}) == 1
    assert [r["line_index"] for r in commits] == [i for i in range(N_LINES) if i != 3]


def test_an_unreadable_file_inside_a_batch_is_left_for_later(
    scan_files: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A file that exists but cannot be read (an OSError other than its absence) gets an
    "unreadable" outcome naming the problem and stays where it is; the rest are written.
    ``process`` (one file) raises it instead, as before."""
    import strayline.lines.line_file_reader as module

    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    real = module.read_line_file

    def flaky(path: Path, **kw: Any) -> ScanLine:
        if path == files[2]:
            raise PermissionError(13, "Permission denied", str(path))
        return real(path, **kw)

    monkeypatch.setattr(module, "read_line_file", flaky)
    pipeline = LinePipeline(_config(tmp_path))
    try:
        outcomes = pipeline.process_many(files)
        with pytest.raises(PermissionError):
            pipeline.process(files[2])
    finally:
        pipeline.close()
    assert outcomes[2].kind == "unreadable"
    assert "Permission denied" in outcomes[2].problem
    assert files[2].exists()
    assert [o.kind for i, o in enumerate(outcomes) if i != 2] == ["written"] * (N_LINES - 1)
