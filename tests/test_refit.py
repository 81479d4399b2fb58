"""``strayline refit``: archived scans fitted again from the raw spectra their stores kept,
into new stores; the sources are only read."""

from __future__ import annotations

import hashlib
import json
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml
import zarr

import demo_stream as ds
from strayline.cli import main
from strayline.config import Config, config_digest, config_from_mapping
from strayline.errors import StoreError
from strayline.pipeline import process_folder, refit_stores
from strayline.pipeline.refit import refit_config, source_stores
from strayline.store import MAP_NAMES
from tests._daemon import kill_midway

N_LINES, N_PIXELS = 6, 20


def _config_data(**changes: dict[str, object]) -> dict[str, object]:
    data: dict[str, object] = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "logging": {"console": "off"},
        "products": {"enabled": False},
        "alerts": {"console": False},
        "store": {"raw_spectra": True},
    }
    for section, values in changes.items():
        data[section] = {**data.get(section, {}), **values}  # type: ignore[dict-item]
    return data


def _config(root: Path, **changes: dict[str, object]) -> Config:
    return config_from_mapping(_config_data(**changes), base_dir=root)


def _archive(root: Path, n_scans: int = 2, n_lines: int = N_LINES) -> Path:
    """Demo scans (one with a fault, so that rules fire) processed into stores with raw
    spectra; returns the output folder."""
    for i in range(n_scans):
        scan = ds.DemoConfig(n_lines=n_lines, n_pixels=N_PIXELS, seed=i, scan_id=f"old{i}")
        if i == 1:
            fault = ds.parse_fault(f"fluorescence_lost@{n_lines // 2}")
            scan = ds.DemoConfig(**{**scan.__dict__, "faults": (fault,)})
        ds.run_scan(scan, root / "incoming", root / "truth", pace_s=0.0)
    process_folder(_config(root), root / "incoming", workers=1)
    return root / "output"


def _maps(store: Path) -> dict[str, np.ndarray]:
    group = zarr.open_group(store, mode="r")
    return {f"{d}/{n}": group[f"{d}/{n}"][:] for d in ("forward", "backward") for n in MAP_NAMES}


def _events(alert_log: Path) -> list[tuple[object, ...]]:
    if not alert_log.exists():
        return []
    records = map(json.loads, alert_log.read_text().splitlines())
    return sorted((r["scan_id"], r["rule"], r["state"], r["line_index"]) for r in records)


def _digest_tree(folder: Path) -> dict[str, str]:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


@pytest.mark.slow
def test_a_refit_with_the_same_config_gives_the_same_maps_and_alerts(tmp_path: Path) -> None:
    """Refitting with the config the stores were written with reproduces every map bit for
    bit and the same alert events (the fit depends on the spectra and the config alone);
    the source stores are not changed by a single byte; each new ledger commit names its
    source store line, keeps the original file's SHA-256 and records the software version
    and the refit's config digest."""
    output = _archive(tmp_path)
    before = _digest_tree(output)
    out = tmp_path / "refit"
    summary = refit_stores(_config(tmp_path), output, out, workers=1)
    assert (summary.scans, summary.files, summary.written) == (2, 2 * N_LINES, 2 * N_LINES)
    assert _digest_tree(output) == before
    for i in range(2):
        old, new = _maps(output / f"old{i}.zarr"), _maps(out / f"old{i}.zarr")
        for name, values in old.items():
            np.testing.assert_array_equal(new[name], values, err_msg=f"old{i} {name}")
    old_events = _events(tmp_path / "output" / "alerts.jsonl")
    assert old_events, "the fault scan raised nothing to compare"
    assert _events(out / "alerts.jsonl") == [e for e in old_events if e[1] != "bad_file"]
    digest = config_digest(refit_config(_config(tmp_path), out))
    old_ledger = (output / "old0.zarr/ledger/records.jsonl").read_text().splitlines()
    sha = {(r["line_index"], r["direction"]): r["sha256"] for r in map(json.loads, old_ledger)}
    records = (out / "old0.zarr/ledger/records.jsonl").read_text().splitlines()
    commits = [r for r in map(json.loads, records) if r["event"] == "commit"]
    assert len(commits) == N_LINES
    for record in commits:
        key = (record["line_index"], record["direction"])
        assert record["source"] == str(output / "old0.zarr/raw/forward" / str(key[0]))
        assert record["sha256"] == sha[key]
        assert record["config_digest"] == digest
        assert record["software_version"]


@pytest.mark.slow
def test_a_rerun_resumes_and_another_config_is_refused(tmp_path: Path) -> None:
    """A second refit into the same folder skips what is done; a refit with another config
    into that folder is refused (never mixed); into a new folder it applies: with the field
    sign flipped, B∥ comes out negated, pixel for pixel."""
    output = _archive(tmp_path, n_scans=1)
    out = tmp_path / "refit"
    refit_stores(_config(tmp_path), output, out)
    again = refit_stores(_config(tmp_path), output, out)
    assert (again.files, again.written, again.duplicates) == (N_LINES, 0, N_LINES)
    flipped = _config(tmp_path, field={"sign": -1})
    with pytest.raises(StoreError, match="another config"):
        refit_stores(flipped, output, out)
    refit_stores(flipped, output, tmp_path / "flipped")
    old = _maps(output / "old0.zarr")["forward/field_nv_t"]
    new = _maps(tmp_path / "flipped" / "old0.zarr")["forward/field_nv_t"]
    assert np.isfinite(old).sum() > N_LINES * N_PIXELS // 2
    np.testing.assert_array_equal(new, -old)


def test_a_refit_never_writes_into_its_source(tmp_path: Path) -> None:
    """``--out`` at the source's own folder is refused before anything is written."""
    output = _archive(tmp_path, n_scans=1)
    before = _digest_tree(output)
    with pytest.raises(StoreError, match="never overwrites its source"):
        refit_stores(_config(tmp_path), output / "old0.zarr", output)
    assert _digest_tree(output) == before


def test_a_store_without_raw_spectra_cannot_be_refitted(tmp_path: Path) -> None:
    """A store written with ``store.raw_spectra`` off says so, naming store and line."""
    scan = ds.DemoConfig(n_lines=2, n_pixels=N_PIXELS, seed=3, scan_id="bare")
    ds.run_scan(scan, tmp_path / "incoming", tmp_path / "truth", pace_s=0.0)
    process_folder(_config(tmp_path, store={"raw_spectra": False}), tmp_path / "incoming")
    with pytest.raises(StoreError, match=r"bare\.zarr: line 0 \(forward\) has no raw spectra"):
        refit_stores(_config(tmp_path), tmp_path / "output", tmp_path / "refit")


def test_source_stores_finds_stores_below_a_folder(tmp_path: Path) -> None:
    """A store is taken as it is; a folder gives every store below it, in path order, and
    a folder without one gives none."""
    output = _archive(tmp_path)
    assert source_stores(output / "old1.zarr") == [output / "old1.zarr"]
    assert source_stores(tmp_path) == [output / "old0.zarr", output / "old1.zarr"]
    assert source_stores(tmp_path / "incoming") == []
    with pytest.raises(FileNotFoundError):
        source_stores(tmp_path / "nowhere")


@pytest.mark.slow
def test_refit_command_names_the_new_stores(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``strayline refit SOURCE --out DIR -c CONFIG`` refits and says where the stores are;
    a source without stores is a one-line error, exit 1."""
    output = _archive(tmp_path, n_scans=1)
    config = tmp_path / "strayline.yaml"
    config.write_text(yaml.safe_dump(_config_data()), encoding="utf-8")
    out = tmp_path / "refit"
    code = main(["refit", str(output), "--out", str(out), "-c", str(config), "--workers", "1"])
    text = capsys.readouterr().out
    assert code == 0
    assert f"{N_LINES} lines: {N_LINES} written" in text
    assert str(out) in text
    assert (out / "old0.zarr" / "zarr.json").is_file()
    code = main(["refit", str(tmp_path / "truth"), "--out", str(out), "-c", str(config)])
    assert code == 1
    assert "no scan store" in capsys.readouterr().err


@pytest.mark.slow
def test_a_refit_killed_with_sigkill_is_finished_by_the_next(tmp_path: Path) -> None:
    """kill -9 of ``strayline refit --workers 2`` and its workers while lines are being
    committed loses nothing: a second run finishes, and every store equals its source bit
    for bit (the same config), as one worker in one process would have written it."""
    n_scans, n_lines = 3, 24
    output = _archive(tmp_path, n_scans=n_scans, n_lines=n_lines)
    config = tmp_path / "strayline.yaml"
    config.write_text(yaml.safe_dump(_config_data()), encoding="utf-8")
    out = tmp_path / "refit"
    command = [sys.executable, "-m", "strayline", "refit", str(output), "--out", str(out)]
    command += ["--config", str(config), "--workers", "2"]
    kill_midway(command, tmp_path, out, after=6, total=n_scans * n_lines)
    for i in range(n_scans):
        old, new = _maps(output / f"old{i}.zarr"), _maps(out / f"old{i}.zarr")
        for name, values in old.items():
            np.testing.assert_array_equal(new[name], values, err_msg=f"old{i} {name}")
