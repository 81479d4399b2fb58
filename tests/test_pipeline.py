"""Tests of the line pipeline (strayline.pipeline): one file through every stage."""

from __future__ import annotations

import dataclasses
import json
import math
import shutil
import time
from collections.abc import Mapping
from dataclasses import replace
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import demo_stream as ds
from strayline.alerts import AlertEvent, read_alert_log
from strayline.config import Config, config_from_mapping
from strayline.errors import ConfigError, StoreError
from strayline.field import field_from_fit
from strayline.fit import fit_line
from strayline.lines import ScanLine, read_line_file
from strayline.physics import D_ROOM_HZ, zfs_hz
from strayline.pipeline import (
    PROFILE_RULE,
    LinePipeline,
    fit_model_from_config,
    profile_event,
    zfs_rule,
)
from strayline.pipeline._reseed import center_mean_sigma_from_maps, seed_tracker
from strayline.rules import ROW_KEYS, LineMetrics, MetricsTracker, comparison_rows
from strayline.store import ScanStore

SCAN = "pipe-scan"
N_LINES = 8
N_PIXELS = 32


@pytest.fixture(scope="module")
def scan_files(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small demo scan (8 lines x 32 px, fixed seed), written once for the module."""
    root = tmp_path_factory.mktemp("demo")
    scan = ds.DemoConfig(
        scene=ds.labyrinth(), n_lines=N_LINES, n_pixels=N_PIXELS, seed=11, scan_id=SCAN
    )
    ds.run_scan(scan, root / "incoming", root / "truth")
    return root / "incoming" / SCAN


def _files(folder: Path) -> list[Path]:
    return sorted(folder.glob("line_*.h5"))


def _config(tmp_path: Path, **sections: Any) -> Config:
    data: dict[str, Any] = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "logging": {"console": "off"},
        "alerts": {"console": False},
        "products": {"images": False},  # images cost seconds and are tested in test_products
    }
    for key, value in sections.items():
        if isinstance(value, dict):
            data.setdefault(key, {}).update(value)
        else:
            data[key] = value
    return config_from_mapping(data, base_dir=tmp_path)


def _copy_scan(scan_files: Path, tmp_path: Path) -> Path:
    folder = tmp_path / "incoming" / SCAN
    shutil.copytree(scan_files, folder)
    return folder


def _zfs_hz(line: ScanLine) -> float:
    """D as the pipeline takes it with no field settings: from the file's temperature."""
    return D_ROOM_HZ if line.temperature_k is None else float(zfs_hz(line.temperature_k))


def _event(state: str = "raised", rule: str = "disk_low", scan_id: str = "*") -> AlertEvent:
    return AlertEvent(
        time="2026-03-01T22:00:00.000+00:00",
        scan_id=scan_id,
        rule=rule,
        severity="critical",
        state=state,  # type: ignore[arg-type]
        line_index=None,
        direction=None,
        pixel_range=None,
        seen_value=120.0,
        seen_unit="MiB",
        baseline_value=None,
        baseline_spread=None,
        confidence_z=None,
        message="free disk below the limit",
        advice="free some space",
    )


# -- the happy path ---------------------------------------------------------------------


def test_every_good_line_is_written_and_counted(scan_files: Path, tmp_path: Path) -> None:
    """Each line of a clean demo scan is written once, and statistics count what was done."""
    folder = _copy_scan(scan_files, tmp_path)
    pipeline = LinePipeline(_config(tmp_path))
    try:
        outcomes = [pipeline.process(p) for p in _files(folder)]
        stats = pipeline.statistics()
        progress = pipeline.scan_progress()
    finally:
        pipeline.close()
    assert [o.kind for o in outcomes] == ["written"] * N_LINES
    assert [o.line_index for o in outcomes] == list(range(N_LINES))
    assert all(o.scan_id == SCAN and o.direction == "forward" for o in outcomes)
    assert stats.lines_written == N_LINES
    assert stats.pixels_failed == sum(o.failures for o in outcomes)
    assert (stats.last_scan_id, stats.last_line_index) == (SCAN, N_LINES - 1)
    assert progress == {SCAN: (N_LINES, N_LINES)}


def test_a_second_pass_finds_only_duplicates(scan_files: Path, tmp_path: Path) -> None:
    """A restarted pipeline skips lines whose identical file is already committed."""
    folder = _copy_scan(scan_files, tmp_path)
    config = _config(tmp_path)
    first = LinePipeline(config)
    try:
        for path in _files(folder):
            first.process(path)
    finally:
        first.close()
    second = LinePipeline(config)
    try:
        kinds = [second.process(p).kind for p in _files(folder)]
        assert second.statistics().duplicates == N_LINES
    finally:
        second.close()
    assert kinds == ["duplicate"] * N_LINES


def test_a_vanished_file_is_reported_not_raised(tmp_path: Path) -> None:
    """A file that disappears before it is read gives the outcome "vanished"."""
    pipeline = LinePipeline(_config(tmp_path))
    try:
        outcome = pipeline.process(tmp_path / "incoming" / "gone" / "line_00001_fwd.h5")
    finally:
        pipeline.close()
    assert outcome.kind == "vanished"
    assert not (tmp_path / "incoming" / "gone" / "_quarantine").exists()


# -- quarantine -------------------------------------------------------------------------


def test_a_bad_file_is_quarantined_with_an_alert_naming_its_line(tmp_path: Path) -> None:
    """A file that is not HDF5 moves to _quarantine and raises a bad_file warning carrying
    the line index and direction its name reveals."""
    folder = tmp_path / "incoming" / "broken-scan"
    folder.mkdir(parents=True)
    bad = folder / "line_00042_bwd.h5"
    bad.write_bytes(b"not an HDF5 file at all")
    config = _config(tmp_path)
    pipeline = LinePipeline(config, clock=lambda: 1_780_000_000.0)
    try:
        outcome = pipeline.process(bad)
        assert pipeline.statistics().quarantined == 1
    finally:
        pipeline.close()
    assert outcome.kind == "quarantined"
    assert (outcome.scan_id, outcome.line_index, outcome.direction) == (
        "broken-scan",
        42,
        "backward",
    )
    assert (folder / "_quarantine" / "line_00042_bwd.h5").exists()
    (event,) = outcome.events
    assert event.rule == "bad_file"
    assert event.message.startswith("line file quarantined: line_00042_bwd.h5: ")
    assert event.time == datetime.fromtimestamp(1_780_000_000.0, UTC).isoformat(
        timespec="milliseconds"
    )
    assert read_alert_log(config.paths.alert_log) == [event]


def test_give_up_quarantines_with_the_watchers_reason(tmp_path: Path) -> None:
    """A file the watcher gave up on is quarantined; the alert quotes the reason."""
    folder = tmp_path / "incoming" / "slow-scan"
    folder.mkdir(parents=True)
    stuck = folder / "line_00003_fwd.h5"
    stuck.write_bytes(b"\x89HDF")
    pipeline = LinePipeline(_config(tmp_path))
    try:
        outcome = pipeline.give_up(stuck, "still growing after 600 s")
    finally:
        pipeline.close()
    assert outcome.kind == "quarantined"
    assert outcome.events[0].message == (
        "line file quarantined: line_00003_fwd.h5: file must be complete and readable in "
        "time; found still growing after 600 s"
    )
    sidecar = json.loads((folder / "_quarantine" / "line_00003_fwd.h5.error.json").read_text())
    assert sidecar["found"] == "still growing after 600 s"


# -- raw spectra on/off -----------------------------------------------------------------


def test_set_raw_spectra_switches_open_and_future_scans(scan_files: Path, tmp_path: Path) -> None:
    """Raw spectra follow set_raw_spectra from the next line on, in open and new scans."""
    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    config = _config(tmp_path, store={"raw_spectra": False})
    pipeline = LinePipeline(config)
    try:
        pipeline.process(files[0])
        pipeline.set_raw_spectra(True)
        pipeline.process(files[1])
        pipeline.set_raw_spectra(False)
        pipeline.process(files[2])
        pipeline.set_raw_spectra(True)
    finally:
        pipeline.close()
    with ScanStore.open(
        config.paths.output_root,
        SCAN,
        n_lines_planned=N_LINES,
        n_pixels=N_PIXELS,
        x_m=np.zeros(N_PIXELS),
        config_json={},
        config_digest="test",
    ) as store:
        stored = [store.read_raw(i, "forward") is not None for i in range(3)]
        raw = store.read_raw(1, "forward")
    assert stored == [False, True, False]
    assert raw is not None
    np.testing.assert_array_equal(raw.counts, read_line_file(files[1]).counts)


def test_raw_spectra_override_applies_to_a_scan_opened_later(
    scan_files: Path, tmp_path: Path
) -> None:
    """A scan opened after set_raw_spectra(True) stores raw spectra although its config
    says not to."""
    folder = _copy_scan(scan_files, tmp_path)
    config = _config(tmp_path, store={"raw_spectra": False})
    pipeline = LinePipeline(config)
    try:
        pipeline.set_raw_spectra(True)
        pipeline.process(_files(folder)[0])
    finally:
        pipeline.close()
    assert (config.paths.output_root / f"{SCAN}.zarr" / "raw" / "forward" / "0").is_dir()


def test_a_store_that_cannot_be_reopened_is_dropped_and_reopened_later(
    scan_files: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """If switching raw spectra cannot reopen a store, set_raw_spectra raises StoreError,
    the scan is dropped, and its next line reopens it with the new setting."""
    import strayline.store.scan_store as store_module

    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    config = _config(tmp_path, store={"raw_spectra": False})
    pipeline = LinePipeline(config)
    try:
        pipeline.process(files[0])

        def refuse(path: Path, *args: object) -> None:
            raise StoreError(f"{path}: cannot open as a zarr 3 group: disk gone")

        with monkeypatch.context() as patch:
            patch.setattr(store_module, "_open_root", refuse)
            with pytest.raises(StoreError, match="disk gone"):
                pipeline.set_raw_spectra(True)
        assert pipeline.statistics().scans_open == 0
        assert pipeline.process(files[1]).kind == "written"
    finally:
        pipeline.close()
    assert (config.paths.output_root / f"{SCAN}.zarr" / "raw" / "forward" / "1").is_dir()


# -- events from outside the rule engine -------------------------------------------------


def test_deliver_logs_counts_and_remembers_an_outside_alert(tmp_path: Path) -> None:
    """deliver() appends the event to the alert log and counts it as active until its
    cleared event, across a restart."""
    config = _config(tmp_path)
    pipeline = LinePipeline(config)
    try:
        pipeline.deliver(_event("raised"))
        assert pipeline.statistics().active_alerts == 1
    finally:
        pipeline.close()
    restarted = LinePipeline(config)
    try:
        assert restarted.active_alerts() == (_event("raised"),)
        restarted.deliver(_event("cleared"))
        assert restarted.statistics().active_alerts == 0
    finally:
        restarted.close()
    assert LinePipeline(config).active_alerts() == ()
    assert [e.state for e in read_alert_log(config.paths.alert_log)] == ["raised", "cleared"]


def test_deliver_reports_an_unsavable_state_as_a_store_error(tmp_path: Path) -> None:
    """When the remembered alerts cannot be saved, deliver() still logs the event and then
    raises StoreError naming the state file."""
    config = _config(tmp_path)
    pipeline = LinePipeline(config)
    try:
        (config.paths.state_dir / "delivered_alerts.json").mkdir(parents=True)  # in the way
        with pytest.raises(StoreError, match=r"delivered_alerts\.json: delivered alerts could"):
            pipeline.deliver(_event("raised"))
    finally:
        pipeline.close()
    assert len(read_alert_log(config.paths.alert_log)) == 1


# -- fit model from config --------------------------------------------------------------


@pytest.mark.parametrize(
    ("fit", "expected"),
    [
        ({}, None),
        ({"center_min_mhz": 2800.0, "center_max_mhz": 2950.0}, (2.8e9, 2.95e9)),
        ({"center_min_mhz": 2870.0}, (2.87e9, math.inf)),
        ({"center_max_mhz": 2870.0}, (-math.inf, 2.87e9)),
    ],
)
def test_centre_window_keeps_a_one_sided_bound(
    tmp_path: Path, fit: dict[str, float], expected: tuple[float, float] | None
) -> None:
    """A one-sided centre window keeps its side and leaves the other open (the fitter
    closes it at each line's grid edge)."""
    model = fit_model_from_config(_config(tmp_path, fit=fit))
    assert model.center_bounds_hz == expected


def test_a_one_sided_centre_window_bounds_the_fitted_resonances(
    scan_files: Path, tmp_path: Path
) -> None:
    """With only fit.center_min_mhz set to D, every fitted resonance lies at or above D
    (D = 2.87 GHz at room temperature, PHYSICS.md; the demo's lower resonance lies below
    it wherever the field is not zero)."""
    line = read_line_file(_files(scan_files)[3])
    free = fit_line(line.freq_hz, line.counts, fit_model_from_config(_config(tmp_path)))
    assert np.nanmin(free.center_hz) < D_ROOM_HZ - 5e6  # the window does bite
    model = fit_model_from_config(_config(tmp_path, fit={"center_min_mhz": D_ROOM_HZ / 1e6}))
    bounded = fit_line(line.freq_hz, line.counts, model)
    centres = bounded.center_hz[np.isfinite(bounded.center_hz)]
    assert centres.size > 0
    assert centres.min() >= D_ROOM_HZ - 1.0  # 1 Hz: float rounding of the scaled bound
    assert centres.max() <= line.freq_hz.max()


def test_zfs_rule_is_settled_from_the_field_section(scan_files: Path, tmp_path: Path) -> None:
    """D comes from field.zfs_mhz, else field.temperature_k, else the file's temperature;
    10 K warmer lowers D by 0.742 MHz (dD/dT = −74.2 kHz/K near 300 K, Acosta et al.,
    PRL 104, 070801 (2010), as listed in PHYSICS.md)."""
    line = read_line_file(_files(scan_files)[0])
    fixed = zfs_rule(_config(tmp_path, field={"zfs_mhz": 2871.5}))
    assert fixed(line) == pytest.approx(2.8715e9)
    at_295 = zfs_rule(_config(tmp_path, field={"temperature_k": 295.0}))(line)
    at_305 = zfs_rule(_config(tmp_path, field={"temperature_k": 305.0}))(line)
    assert at_295 - at_305 == pytest.approx(742e3, rel=0.05)
    from_file = zfs_rule(_config(tmp_path))
    assert from_file(line) == _zfs_hz(line)
    assert from_file(replace(line, temperature_k=None)) == D_ROOM_HZ


# -- profiles ---------------------------------------------------------------------------


def _labyrinth_scan(
    tmp_path: Path, scan_id: str, profile: str | None, n_lines: int, *faults: str
) -> None:
    """A small demo labyrinth scan (16 pixels, seed 5) naming ``profile``, in incoming/."""
    ds.run_scan(
        ds.DemoConfig(
            scene=ds.labyrinth(),
            n_lines=n_lines,
            n_pixels=16,
            seed=5,
            scan_id=scan_id,
            profile=profile,
            faults=tuple(ds.parse_fault(f) for f in faults),
        ),
        tmp_path / "incoming",
        tmp_path / "truth",
    )


def _profiles(tmp_path: Path) -> Path:
    folder = tmp_path / "profiles"
    folder.mkdir()
    (folder / "thin-film.yaml").write_text("fit:\n  fit_slope: true\n", encoding="utf-8")
    (folder / "broken.yaml").write_text("fit:\n  fwhm_min_mhz: -3\n", encoding="utf-8")
    return folder


@pytest.mark.parametrize("profile", ["no-such-sample", "broken"])
def test_an_unusable_profile_falls_back_to_the_base_config_with_one_warning(
    tmp_path: Path, profile: str
) -> None:
    """A scan naming an unknown or invalid profile is processed with the base config and
    raises one warning that names the profile and the available ones."""
    profiles = _profiles(tmp_path)
    _labyrinth_scan(tmp_path, "prof-scan", profile, 3)
    config = _config(tmp_path, profiles_dir=str(profiles))
    pipeline = LinePipeline(config)
    try:
        outcomes = [pipeline.process(p) for p in _files(tmp_path / "incoming" / "prof-scan")]
    finally:
        pipeline.close()
    assert [o.kind for o in outcomes] == ["written"] * 3
    warnings = [e for o in outcomes for e in o.events if e.rule == PROFILE_RULE]
    assert len(warnings) == 1
    assert warnings[0].severity == "warning"
    assert f"profile {profile!r} cannot be used" in warnings[0].message
    assert warnings[0].message.endswith("available profiles: broken, thin-film")
    logged = read_alert_log(config.paths.alert_log, scan_id="prof-scan")
    assert [e.rule for e in logged].count(PROFILE_RULE) == 1
    attrs = json.loads((config.paths.output_root / "prof-scan.zarr" / "zarr.json").read_text())
    assert attrs["attributes"]["config"]["_profile"] is None


def test_a_usable_profile_is_applied_without_warning(tmp_path: Path) -> None:
    """A scan naming an existing, valid profile gets it, recorded in the store."""
    profiles = _profiles(tmp_path)
    _labyrinth_scan(tmp_path, "film-scan", "thin-film", 2)
    config = _config(tmp_path, profiles_dir=str(profiles))
    pipeline = LinePipeline(config)
    try:
        outcomes = [pipeline.process(p) for p in _files(tmp_path / "incoming" / "film-scan")]
    finally:
        pipeline.close()
    assert all(o.kind == "written" and o.events == () for o in outcomes)
    attrs = json.loads((config.paths.output_root / "film-scan.zarr" / "zarr.json").read_text())
    assert attrs["attributes"]["config"]["_profile"] == "thin-film"
    assert attrs["attributes"]["config"]["fit"]["fit_slope"] is True


def test_profile_event_text(tmp_path: Path) -> None:
    """profile_event names the scan, line, profile, problem and available profiles."""
    ds.run_scan(
        ds.DemoConfig(scene=ds.labyrinth(), n_lines=1, n_pixels=8, seed=1, scan_id="one"),
        tmp_path / "incoming",
        tmp_path / "truth",
    )
    first = read_line_file(_files(tmp_path / "incoming" / "one")[0])
    error = ConfigError(tmp_path / "profiles", "profile", "unknown profile 'x'")
    event = profile_event(first, "x", error, (), datetime(2026, 3, 1, 22, 0, tzinfo=UTC))
    assert (event.scan_id, event.line_index, event.direction) == ("one", 0, "forward")
    assert event.time == "2026-03-01T22:00:00.000+00:00"
    assert event.message == (
        f"profile 'x' cannot be used ({tmp_path / 'profiles'}: profile: unknown profile 'x'); "
        "the scan is processed with the base config; available profiles: none"
    )


# -- restart: the metrics memory ---------------------------------------------------------


def test_centre_mean_sigma_is_rebuilt_exactly_from_the_stored_maps(
    scan_files: Path, tmp_path: Path
) -> None:
    """The centre-mean σ rebuilt from the stored resonance σ maps equals the field
    stage's own σ for every pixel of a stored line (½√(σ₋²+σ₊²), Gaussian error
    propagation, common practice)."""
    folder = _copy_scan(scan_files, tmp_path)
    config = _config(tmp_path)
    pipeline = LinePipeline(config)
    try:
        for path in _files(folder)[:4]:
            pipeline.process(path)
    finally:
        pipeline.close()
    line = read_line_file(_files(folder)[3])
    fit = fit_line(line.freq_hz, line.counts, fit_model_from_config(config))
    want = field_from_fit(fit, zfs_hz=D_ROOM_HZ, sign=1.0, branch="upper").center_mean_sigma_hz
    with ScanStore.open(
        config.paths.output_root,
        SCAN,
        n_lines_planned=N_LINES,
        n_pixels=N_PIXELS,
        x_m=line.x_m,
        config_json={},
        config_digest="test",
    ) as store:
        got = center_mean_sigma_from_maps(
            *(store.read_map(n, "forward")[3] for n in ("center_mean_hz", "freq_hi_hz")),
            *(store.read_map(n, "forward")[3] for n in ("freq_lo_sigma_hz", "freq_hi_sigma_hz")),
        )
    assert np.isfinite(want).sum() > N_PIXELS // 2
    np.testing.assert_array_equal(got, want)


def test_centre_mean_sigma_of_merged_and_missing_pixels() -> None:
    """A merged pixel's centre-mean σ is its one centre's σ; a pixel without a mean has
    NaN (the field stage's convention)."""
    nan = math.nan
    got = center_mean_sigma_from_maps(
        np.array([2.87e9, 2.87e9, nan]),
        np.array([2.9e9, nan, nan]),
        np.array([3e3, 5e3, 7e3]),
        np.array([4e3, nan, nan]),
    )
    np.testing.assert_array_equal(got, [2.5e3, 5e3, nan])


def test_metrics_after_a_restart_equal_those_of_an_uninterrupted_run(
    scan_files: Path, tmp_path: Path
) -> None:
    """The line-to-line metrics of the first line after a restart equal those of an
    uninterrupted run (the memory is rebuilt from the store; common practice)."""
    folder = _copy_scan(scan_files, tmp_path)
    config = _config(tmp_path)
    model = fit_model_from_config(config)
    continuous = MetricsTracker()
    expected = None
    rows3: dict[str, np.ndarray] = {}
    for path in _files(folder)[:5]:
        line = read_line_file(path)
        fit = fit_line(line.freq_hz, line.counts, model)
        fld = field_from_fit(fit, zfs_hz=_zfs_hz(line), sign=1.0, branch="upper")
        if line.line_index == 3:
            rows3 = comparison_rows(line, fit, fld)
        expected = continuous.update(line, fit, fld)
    assert expected is not None

    first = LinePipeline(config)
    try:
        for path in _files(folder)[:4]:
            first.process(path)
    finally:
        first.close()
    line4 = read_line_file(_files(folder)[4])
    fit4 = fit_line(line4.freq_hz, line4.counts, model)
    field4 = field_from_fit(fit4, zfs_hz=_zfs_hz(line4), sign=1.0, branch="upper")
    seeded = _RecordingTracker()
    with ScanStore.open(
        config.paths.output_root,
        SCAN,
        n_lines_planned=N_LINES,
        n_pixels=N_PIXELS,
        x_m=line4.x_m,
        config_json={},
        config_digest="test",
    ) as store:
        seed_tracker(seeded, store, line4)
    for key in ROW_KEYS:
        if key == "pl_sigma_per_s":  # not kept by the store (see the report)
            assert np.isnan(seeded.seeded["forward"][key]).all()
            continue
        np.testing.assert_array_equal(seeded.seeded["forward"][key], rows3[key], err_msg=key)
    got = seeded.update(line4, fit4, field4)
    want = expected.numeric()
    for name, value in got.numeric().items():
        if name == "time_since_previous_s":  # needs the previous metrics, not stored
            continue
        assert value == pytest.approx(want[name], nan_ok=True), name
    assert math.isfinite(got.field_change_median_t)
    assert got.field_step_range == expected.field_step_range


class _RecordingTracker(MetricsTracker):
    """A tracker that keeps the rows it was seeded with, for inspection."""

    def __init__(self) -> None:
        super().__init__()
        self.seeded: dict[str, dict[str, np.ndarray]] = {}

    def seed(
        self, direction: str, rows: Mapping[str, np.ndarray], previous: LineMetrics | None = None
    ) -> None:
        self.seeded[direction] = {k: np.asarray(v) for k, v in rows.items()}
        super().seed(direction, rows, previous)


# -- no half state ----------------------------------------------------------------------


def test_a_failure_while_opening_a_scan_leaves_no_half_built_scan(
    scan_files: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """If building a scan context fails after its store was opened, the store is closed
    again and the next line opens the scan afresh."""
    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    config = _config(tmp_path)
    seed_first = LinePipeline(config)
    try:
        seed_first.process(files[0])
    finally:
        seed_first.close()
    import strayline.pipeline.line_pipeline as pipeline_module

    def broken_seed(*args: object) -> None:
        raise RuntimeError("our own bug")

    pipeline = LinePipeline(config)
    try:
        with monkeypatch.context() as patch:
            patch.setattr(pipeline_module, "seed_tracker", broken_seed)
            with pytest.raises(RuntimeError, match="our own bug"):
                pipeline.process(files[1])
        assert pipeline.statistics().scans_open == 0
        assert pipeline.process(files[1]).kind == "written"  # the lock was released
    finally:
        pipeline.close()


def test_a_failure_after_the_commit_still_counts_the_line(
    scan_files: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """If the metrics stage fails after a line was committed, the line is counted as
    written and the same file is a duplicate afterwards."""
    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    pipeline = LinePipeline(_config(tmp_path))
    try:
        pipeline.process(files[0])
        with monkeypatch.context() as patch:
            patch.setattr(MetricsTracker, "update", _raise_bug)
            with pytest.raises(RuntimeError):
                pipeline.process(files[1])
        assert pipeline.statistics().lines_written == 2
        assert pipeline.process(files[1]).kind == "duplicate"
    finally:
        pipeline.close()


def _raise_bug(*args: object) -> None:
    raise RuntimeError("our own bug")


def test_a_store_mismatch_is_quarantined(scan_files: Path, tmp_path: Path) -> None:
    """A line whose pixel count differs from its scan's store is quarantined naming
    n_pixels, and the scan carries on."""
    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    other = tmp_path / "other"
    ds.run_scan(
        ds.DemoConfig(scene=ds.labyrinth(), n_lines=N_LINES, n_pixels=16, seed=2, scan_id=SCAN),
        other,
        tmp_path / "truth",
    )
    odd = folder / "line_00005_fwd.h5"
    odd.unlink()
    shutil.copy(other / SCAN / "line_00005_fwd.h5", odd)
    pipeline = LinePipeline(_config(tmp_path))
    try:
        outcomes = [pipeline.process(p) for p in files]
    finally:
        pipeline.close()
    kinds = [o.kind for o in outcomes]
    assert kinds == ["written"] * 5 + ["quarantined"] + ["written"] * 2
    assert "n_pixels must be 32 (as in store pipe-scan.zarr); found 16" in (
        outcomes[5].events[0].message
    )


def test_seeded_rows_of_a_backward_trace_follow_its_acquisition_order(
    tmp_path: Path,
) -> None:
    """After a restart, the remembered backward row is in the backward trace's own pixel
    order (decreasing x), as metrics.comparison_rows made it, although the store keeps maps in
    increasing x (common practice for trace/retrace scans)."""
    root = tmp_path / "demo"
    scan = ds.DemoConfig(
        scene=ds.labyrinth(), n_lines=4, n_pixels=16, seed=5, scan_id=SCAN, trace_retrace=True
    )
    ds.run_scan(scan, root / "incoming", root / "truth")
    folder = root / "incoming" / SCAN
    config = _config(tmp_path)
    model = fit_model_from_config(config)
    backward2 = read_line_file(folder / "line_00002_bwd.h5")
    fit = fit_line(backward2.freq_hz, backward2.counts, model)
    expected = comparison_rows(backward2, fit, field_from_fit(fit, zfs_hz=_zfs_hz(backward2)))
    first = LinePipeline(config)
    try:
        for index in range(3):
            for tag in ("fwd", "bwd"):
                first.process(folder / f"line_{index:05d}_{tag}.h5")
    finally:
        first.close()
    forward3 = read_line_file(folder / "line_00003_fwd.h5")
    seeded = _RecordingTracker()
    with ScanStore.open(
        config.paths.output_root,
        SCAN,
        n_lines_planned=4,
        n_pixels=16,
        x_m=forward3.x_m,
        config_json={},
        config_digest="test",
    ) as store:
        seed_tracker(seeded, store, forward3)
    for key in ("field_nv_t", "center_mean_hz", "pl_per_s", "x_m"):
        np.testing.assert_array_equal(seeded.seeded["backward"][key], expected[key], err_msg=key)


def test_only_a_few_scans_stay_open(scan_files: Path, tmp_path: Path) -> None:
    """Lines of more scans than MAX_OPEN_SCANS close the least recently used stores (no
    descriptor per scan for the daemon's lifetime), and progress of closed scans is kept."""
    from strayline.pipeline._setup import MAX_OPEN_SCANS

    config = _config(tmp_path)
    pipeline = LinePipeline(config)
    n_scans = MAX_OPEN_SCANS + 2
    try:
        for k in range(n_scans):
            folder = tmp_path / "incoming" / f"scan-{k}"
            ds.run_scan(
                ds.DemoConfig(scene=ds.labyrinth(), n_lines=2, n_pixels=16, scan_id=f"scan-{k}"),
                tmp_path / "incoming",
                tmp_path / f"truth-{k}",
            )
            assert pipeline.process(folder / "line_00000_fwd.h5").kind == "written"
        assert pipeline.statistics().scans_open == MAX_OPEN_SCANS
        progress = pipeline.scan_progress()
        assert progress == {f"scan-{k}": (1, 2) for k in range(n_scans)}
        # A late line of the first (closed) scan reopens it.
        late = tmp_path / "incoming" / "scan-0" / "line_00001_fwd.h5"
        assert pipeline.process(late).kind == "written"
        assert pipeline.scan_progress()["scan-0"] == (2, 2)
    finally:
        pipeline.close()


def test_a_profile_rule_override_applies_to_its_scans_only(tmp_path: Path) -> None:
    """Two scans lose their fluorescence the same way; the one whose profile turns
    fluorescence_lost off (rule_overrides) does not raise it (the rules it used to
    explain speak instead), the other raises it alone."""
    profiles = tmp_path / "profiles"
    profiles.mkdir()
    (profiles / "dim-sample.yaml").write_text(
        "rule_overrides:\n  fluorescence_lost: {enabled: false}\n", encoding="utf-8"
    )
    for scan_id, profile in (("plain-scan", None), ("dim-scan", "dim-sample")):
        _labyrinth_scan(tmp_path, scan_id, profile, 12, "fluorescence_lost@9:0")
    config = _config(tmp_path, profiles_dir=str(profiles))
    pipeline = LinePipeline(config)
    try:
        for scan_id in ("plain-scan", "dim-scan"):
            for path in _files(tmp_path / "incoming" / scan_id):
                pipeline.process(path)
    finally:
        pipeline.close()
    raised = {
        scan_id: {
            e.rule
            for e in read_alert_log(config.paths.alert_log, scan_id=scan_id)
            if e.state == "raised"
        }
        for scan_id in ("plain-scan", "dim-scan")
    }
    assert raised["plain-scan"] == {"fluorescence_lost"}
    assert raised["dim-scan"]
    assert "fluorescence_lost" not in raised["dim-scan"]


def test_an_unexpected_error_on_a_line_sets_the_file_aside_with_a_note_and_an_alert(
    scan_files: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A line the reader accepts but the daemon fails on (a fault of ours) is neither
    dropped in silence nor retried forever: `process` moves it to the quarantine with a
    sidecar naming the error and raises a bad_file warning, and the pass carries on."""
    import strayline.pipeline.line_pipeline as pipeline_module
    from strayline.pipeline import process_folder

    folder = _copy_scan(scan_files, tmp_path)
    config = _config(tmp_path)
    real_fit = pipeline_module.fit_line

    calls: list[int] = []

    def fails_on_line_2(freq_hz: Any, counts: Any, model: Any, **options: Any) -> Any:
        calls.append(1)
        if len(calls) == 3:
            raise IndexError("index 3 is out of bounds")
        return real_fit(freq_hz, counts, model, **options)

    monkeypatch.setattr(pipeline_module, "fit_line", fails_on_line_2)
    summary = process_folder(config, folder)
    assert (summary.files, summary.written, summary.quarantined) == (N_LINES, N_LINES - 1, 1)
    (aside,) = (folder / "_quarantine").glob("*.h5")
    note = json.loads(aside.with_name(aside.name + ".error.json").read_text())
    assert note["field"] == "processing"
    assert note["found"] == (
        "IndexError: index 3 is out of bounds (a fault of strayline; please report it)"
    )
    events = read_alert_log(config.paths.alert_log)
    assert [(e.rule, e.severity) for e in events if e.rule == "bad_file"] == [
        ("bad_file", "warning")
    ]


def test_a_process_pass_takes_lines_in_acquisition_order(tmp_path: Path) -> None:
    """`process` takes a scan's files as the instrument wrote them (by line index, the
    forward trace before the backward one), not in name order, where line_00002_bwd
    sorts before line_00002_fwd; so the pass and the live daemon see the same sequence."""
    from strayline.pipeline import process_folder
    from strayline.pipeline.folder import acquisition_order
    from strayline.store._ledger import read_ledger_state

    names = ["notes.h5", "line_00010_fwd.h5", "line_00002_bwd.h5", "line_00002_fwd.h5"]
    ordered = sorted((tmp_path / "s" / n for n in names), key=acquisition_order)
    assert [p.name for p in ordered] == [
        "line_00002_fwd.h5",
        "line_00002_bwd.h5",
        "line_00010_fwd.h5",
        "notes.h5",
    ]
    scan = ds.DemoConfig(
        scene=ds.labyrinth(), n_lines=3, n_pixels=16, seed=4, scan_id="both", trace_retrace=True
    )
    ds.run_scan(scan, tmp_path / "incoming", tmp_path / "truth")
    config = _config(tmp_path)
    process_folder(config, tmp_path / "incoming")
    state = read_ledger_state(config.paths.output_root / "both.zarr")
    assert list(state.committed) == [(i, d) for i in range(3) for d in ("forward", "backward")]


def test_a_link_out_of_the_watch_root_is_quarantined_and_one_inside_is_read(
    scan_files: Path, tmp_path: Path
) -> None:
    """A line file that is a symbolic link to a file outside the watch root is refused
    with a message naming the target (and the link, not the target, is set aside); a
    link to a file inside the watch root is read like the file."""
    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    files[0].rename(outside / files[0].name)
    files[0].symlink_to(outside / files[0].name)
    kept = tmp_path / "incoming" / "kept"
    kept.mkdir()
    files[1].rename(kept / files[1].name)
    files[1].symlink_to(kept / files[1].name)
    config = _config(tmp_path)
    pipeline = LinePipeline(config)
    try:
        refused = pipeline.process(files[0])
        read = pipeline.process(files[1])
    finally:
        pipeline.close()
    assert refused.kind == "quarantined"
    (event,) = refused.events
    assert event.message.endswith(
        f"file must be a line file inside {(tmp_path / 'incoming').resolve()} (a link may "
        f"point only there); found a symbolic link to {(outside / files[0].name).resolve()}"
    )
    assert (outside / files[0].name).is_file()  # the target is left alone
    assert (folder / "_quarantine" / files[0].name).is_symlink()
    assert read.kind == "written"


def test_a_second_file_for_a_committed_line_is_written_with_a_warning(
    scan_files: Path, tmp_path: Path
) -> None:
    """A different file for a line already committed replaces it (the newer data wins)
    and says so: a line_superseded warning naming the new file and the one it replaces."""
    from structlog.testing import capture_logs

    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    pipeline = LinePipeline(_config(tmp_path))
    try:
        pipeline.process(files[0])
        line = read_line_file(files[0])
        again = dataclasses.replace(line, counts=line.counts + 1, source=folder / "again.h5")
        other = _write_line(again)
        with capture_logs() as logs:
            outcome = pipeline.process(other)
    finally:
        pipeline.close()
    assert outcome.kind == "written"
    (warning,) = [r for r in logs if r["event"] == "line_superseded"]
    assert warning["log_level"] == "warning"
    assert warning["file"] == str(other)
    assert warning["replaces"] == str(files[0])


def _write_line(line: ScanLine) -> Path:
    """Write ``line`` to its own source path with the contract's writer."""
    from strayline.lines import write_line_file

    return write_line_file(line)


@pytest.mark.slow
def test_a_scan_planned_at_the_contracts_limit_opens_and_finishes_within_a_watchdog_period(
    tmp_path: Path,
) -> None:
    """A line within the contract with n_lines_planned = 65,536 and line_index = 65,535 (so
    the scan is complete at once) is written, its products made, and its store reopened,
    each well within the unit's WatchdogSec = 90 s (it took minutes when opening read every
    planned chunk): the cost follows what was written, not what is planned."""
    rng = np.random.default_rng(3)
    t0 = datetime(2026, 1, 1, tzinfo=UTC)
    folder = tmp_path / "incoming" / "vast"
    folder.mkdir(parents=True)
    line = ScanLine(
        source=folder / "line_65535_fwd.h5",
        scan_id="vast",
        line_index=65535,
        n_lines_planned=65536,
        direction="forward",
        start_time=t0,
        end_time=t0 + timedelta(seconds=1),
        dwell_s=1e-3,
        nv_theta_rad=0.9,
        nv_phi_rad=0.0,
        freq_hz=np.linspace(2.82e9, 2.92e9, 61),
        counts=rng.poisson(500.0, (32, 61)).astype(np.float64),
        x_m=np.arange(32) * 1e-8,
        y_m=1e-8,
    )
    path = _write_line(line)
    config = _config(tmp_path)
    for expected in ("written", "duplicate"):
        started = time.monotonic()
        pipeline = LinePipeline(config)
        try:
            assert pipeline.process(path).kind == expected
        finally:
            pipeline.close()
        assert time.monotonic() - started < 45.0  # half the watchdog period
    assert (tmp_path / "output" / "vast.products" / "report.json").is_file()


def test_background_jobs_run_in_order_survive_a_failure_and_close_within_a_bound() -> None:
    """The products worker runs jobs one after the other on its own thread, logs a job
    that fails and goes on, and closing waits for queued jobs but never longer than asked."""
    import threading

    from structlog.testing import capture_logs

    from strayline.pipeline._background import BackgroundWorker

    done: list[int] = []
    with capture_logs() as logs:
        worker = BackgroundWorker("test-worker")
        worker.submit(lambda: done.append(1))
        worker.submit(lambda: 1 / 0)  # type: ignore[func-returns-value]
        worker.submit(lambda: done.append(3))
        assert worker.close(timeout_s=10.0)
    assert done == [1, 3]
    assert [r["event"] for r in logs] == ["background_job_failed"]
    release = threading.Event()
    slow = BackgroundWorker("test-slow")
    slow.submit(lambda: release.wait(10))  # type: ignore[func-returns-value]
    started = time.monotonic()
    assert not slow.close(timeout_s=0.2)
    assert time.monotonic() - started < 5.0
    release.set()


def test_products_name_missing_lines_and_are_remade_when_a_late_line_arrives(
    scan_files: Path, tmp_path: Path
) -> None:
    """Products made when the last planned line lands while line 3 is missing (held back,
    or quarantined) say so in the report; when line 3 arrives late they are made again,
    with no line missing."""
    folder = _copy_scan(scan_files, tmp_path)
    files = _files(folder)
    config = _config(tmp_path)
    report = tmp_path / "output" / f"{SCAN}.products" / "report.json"
    pipeline = LinePipeline(config)
    try:
        for path in files[:3] + files[4:]:
            pipeline.process(path)
        first = json.loads(report.read_text(encoding="utf-8"))
        assert first["missing_lines"] == {"forward": {"count": 1, "first": [3]}}
        assert "- 1 planned lines missing: 3" in report.with_name("report.md").read_text()
        pipeline.process(files[3])
        again = json.loads(report.read_text(encoding="utf-8"))
    finally:
        pipeline.close()
    assert again["missing_lines"] == {"forward": {"count": 0, "first": []}}
    assert again["traces"]["forward"]["lines_committed"] == N_LINES
