"""Tests of the scan store (strayline.store): layout, round trips, ledger, crash recovery."""

from __future__ import annotations

import contextlib
import dataclasses
import errno
import json
import os
import shutil
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import xarray as xr
import zarr
from hypothesis import given, settings
from hypothesis import strategies as st

import strayline
from strayline.errors import LineFileError, StoreError
from strayline.field import LineField
from strayline.fit import FitStatus, LineFit
from strayline.lines import ScanLine
from strayline.store import open_store_reader
from strayline.store._ledger import Ledger, format_time, parse_records, parse_time
from strayline.store.scan_store import MAP_NAMES, ScanStore, StoreMismatch, line_rows

N_LINES = 5
N_PIXELS = 6
X_M = np.linspace(0.0, 1.0e-6, N_PIXELS)  # 6 pixels over 1 µm
CONFIG = {"fit": {"model": "two_dip"}, "store": {"raw_spectra": False}}
DIGEST = "c0ffee01"
T0 = datetime(2031, 5, 4, 12, 0, tzinfo=UTC)


class StepClock:
    """A fake clock that advances one second per reading."""

    def __init__(self) -> None:
        self.now = T0

    def __call__(self) -> datetime:
        self.now += timedelta(seconds=1)
        return self.now


DISK_FULL = OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


class FailingMap:
    """Stands in for one map of an open store: every write raises ``error`` (the writer's
    seam is ``array.async_array.setitem``, :func:`strayline.store._layout.write_together`)."""

    def __init__(self, array: Any, error: BaseException | type[BaseException]) -> None:
        self.chunks = array.chunks
        self.async_array = self
        self._error = error

    async def setitem(self, key: Any, value: Any) -> None:
        raise self._error


def fail_map(store: ScanStore, direction: str, name: str, error: Any) -> None:
    """Make every write to one map of an open store raise ``error``."""
    maps = store._maps[direction]
    maps[name] = FailingMap(maps[name], error)


def make_records(
    index: int,
    direction: str = "forward",
    *,
    seed: int = 0,
    sha256: str | None = "a" * 64,
    n_pixels: int = N_PIXELS,
    n_freq: int = 11,
    scan_id: str = "scan7",
    n_lines: int = N_LINES,
    source: str | None = None,
) -> tuple[ScanLine, LineFit, LineField]:
    """A synthetic line with fit and field records filled from a seeded generator."""
    rng = np.random.default_rng(seed * 1000 + index * 2 + (direction == "backward"))
    n = n_pixels
    freq_hz = np.linspace(2.80e9, 2.94e9, n_freq)
    counts = rng.poisson(900.0, size=(n, n_freq)).astype(np.int32)
    line = ScanLine(
        source=Path(source or f"/data/scan7/line_{index:05d}_{direction[0]}.h5"),
        scan_id=scan_id,
        line_index=index,
        n_lines_planned=n_lines,
        direction=direction,  # type: ignore[arg-type]
        start_time=T0,
        end_time=T0 + timedelta(seconds=3),
        dwell_s=2.0e-3,
        nv_theta_rad=0.9553,
        nv_phi_rad=0.0,
        freq_hz=freq_hz,
        counts=counts,
        x_m=np.linspace(0.0, 1.0e-6, n),
        y_m=index * 5.0e-8,
        sha256=sha256,
    )
    lo = 2.85e9 + rng.normal(0.0, 2e6, n)
    hi = 2.89e9 + rng.normal(0.0, 2e6, n)
    fit = LineFit(
        center_hz=np.column_stack([lo, hi]),
        center_sigma_hz=rng.uniform(1e4, 5e4, (n, 2)),
        contrast=rng.uniform(0.05, 0.2, (n, 2)),
        contrast_sigma=rng.uniform(0.001, 0.01, (n, 2)),
        fwhm_hz=rng.uniform(5e6, 9e6, (n, 2)),
        fwhm_sigma_hz=rng.uniform(1e5, 3e5, (n, 2)),
        baseline=rng.uniform(800.0, 1000.0, n),
        baseline_sigma=rng.uniform(1.0, 3.0, n),
        slope=np.zeros(n),
        chi2_red=rng.uniform(0.8, 1.2, n),
        status=np.zeros(n, dtype=np.uint8),
        n_iter=np.full(n, 7, dtype=np.int32),
    )
    status = np.zeros(n, dtype=np.uint8)
    status[index % n] = FitStatus.NOT_CONVERGED
    field = LineField(
        field_nv_t=rng.normal(1e-3, 1e-4, n),
        field_nv_sigma_t=rng.uniform(1e-7, 3e-7, n),
        field_nv_bound_t=np.where(status == FitStatus.MERGED, 1e-4, np.nan),
        field_abs_t=rng.normal(2e-3, 1e-4, n),
        field_abs_sigma_t=rng.uniform(1e-7, 3e-7, n),
        angle_rad=rng.uniform(0.0, 1.0, n),
        angle_sigma_rad=rng.uniform(0.01, 0.02, n),
        center_mean_hz=(lo + hi) / 2,
        center_mean_sigma_hz=rng.uniform(1e4, 5e4, n),
        status=status,
    )
    return line, fit, field


def open_store(root: Path, **kwargs: Any) -> ScanStore:
    """Open the test scan's store with the module's defaults."""
    options: dict[str, Any] = {
        "n_lines_planned": N_LINES,
        "n_pixels": N_PIXELS,
        "x_m": X_M,
        "config_json": CONFIG,
        "config_digest": DIGEST,
    }
    options.update(kwargs)
    return ScanStore.open(root, "scan7", **options)


def simulate_crash(store: ScanStore) -> None:
    """Drop a store as a killed process would: the kernel closes its descriptors, nothing else."""
    os.close(store._ledger._fd)
    store._ledger._fd = -1


def assert_rows(store: ScanStore, direction: str, index: int, rows: dict[str, np.ndarray]) -> None:
    """Every map's row ``index`` equals ``rows`` exactly (NaN equal to NaN)."""
    for name in MAP_NAMES:
        np.testing.assert_array_equal(store.read_map(name, direction)[index], rows[name])


def assert_unwritten(store: ScanStore, direction: str, index: int) -> None:
    """Every map's row ``index`` holds the fill value (NaN, status 255)."""
    for name in MAP_NAMES:
        row = store.read_map(name, direction)[index]
        if name == "status":
            assert np.all(row == 255), name
        else:
            assert np.all(np.isnan(row)), name


# ---------------------------------------------------------------------------- line_rows


def test_line_rows_maps_each_record_field() -> None:
    """line_rows takes field maps from LineField, resonances by column from LineFit, PL as rate."""
    line, fit, field = make_records(2)
    rows = line_rows(line, fit, field)
    assert set(rows) == set(MAP_NAMES)
    np.testing.assert_array_equal(rows["field_nv_t"], field.field_nv_t)
    np.testing.assert_array_equal(rows["freq_lo_hz"], fit.center_hz[:, 0])
    np.testing.assert_array_equal(rows["freq_hi_sigma_hz"], fit.center_sigma_hz[:, 1])
    np.testing.assert_array_equal(rows["contrast_hi"], fit.contrast[:, 1])
    np.testing.assert_allclose(rows["fwhm_hz"], fit.fwhm_hz.mean(axis=1), rtol=1e-15)
    # baseline is counts per sample; dividing by the 2 ms dwell gives counts per second
    np.testing.assert_allclose(rows["pl_rate_cps"], fit.baseline / 2.0e-3, rtol=1e-15)
    assert rows["status"].dtype == np.uint8
    np.testing.assert_array_equal(rows["status"], field.status)
    assert all(rows[n].dtype == np.float64 for n in MAP_NAMES if n != "status")


def test_line_rows_fwhm_uses_the_dip_that_was_fitted() -> None:
    """fwhm_hz is the single finite dip width when the other is NaN, and NaN when none is."""
    line, fit, field = make_records(0)
    widths = fit.fwhm_hz.copy()
    widths[0, 1] = np.nan
    widths[1, :] = np.nan
    one_dip = LineFit(**{**fit.__dict__, "fwhm_hz": widths})
    rows = line_rows(line, one_dip, field)
    assert rows["fwhm_hz"][0] == widths[0, 0]
    assert np.isnan(rows["fwhm_hz"][1])
    assert rows["fwhm_hz"][2] == pytest.approx(widths[2].mean(), rel=1e-15)


def test_line_rows_rejects_records_of_another_size() -> None:
    """A LineFit whose pixel count differs from the line's is a caller bug: ValueError."""
    line, _, field = make_records(0)
    _, other_fit, _ = make_records(0, n_pixels=N_PIXELS + 1)
    with pytest.raises(ValueError, match=r"LineFit.center_hz must have shape \(6, 2\); found"):
        line_rows(line, other_fit, field)


def test_line_rows_rejects_the_not_written_status_code() -> None:
    """Status 255 is reserved for rows never written, so a record carrying it is refused."""
    line, fit, field = make_records(0)
    field.status[0] = 255
    with pytest.raises(ValueError, match="must not use 255"):
        line_rows(line, fit, field)


# ---------------------------------------------------------------------------- round trips


def test_lines_read_back_equal_after_reopen(tmp_path: Path) -> None:
    """Rows written before close read back bit for bit after reopening; others stay fill."""
    written = {}
    with open_store(tmp_path) as store:
        for index, direction in [(0, "forward"), (3, "forward"), (0, "backward")]:
            records = make_records(index, direction)
            store.write_line(*records)
            written[(index, direction)] = line_rows(*records)
    with open_store(tmp_path) as store:
        assert store.recovered_lines == []
        for (index, direction), rows in written.items():
            assert_rows(store, direction, index, rows)
        assert_unwritten(store, "forward", 1)
        assert_unwritten(store, "backward", 3)
        assert sorted(store.committed()) == [(0, "backward"), (0, "forward"), (3, "forward")]


def test_forward_and_backward_traces_are_kept_apart(tmp_path: Path) -> None:
    """The same line index in both directions lands in two groups without mixing."""
    with open_store(tmp_path) as store:
        fwd = make_records(1, "forward")
        bwd = make_records(1, "backward")
        store.write_line(*fwd)
        store.write_line(*bwd)
        a = store.read_map("field_nv_t", "forward")[1]
        b = store.read_map("field_nv_t", "backward")[1]
    np.testing.assert_array_equal(a, fwd[2].field_nv_t)
    np.testing.assert_array_equal(b, bwd[2].field_nv_t)
    assert not np.array_equal(a, b)


def test_xarray_opens_a_labelled_dataset_while_the_scan_runs(tmp_path: Path) -> None:
    """xarray.open_zarr on a trace group gives dims (y, x), coordinates in m and units."""
    with open_store(tmp_path) as store:
        lines = [make_records(i) for i in (0, 2)]
        for records in lines:
            store.write_line(*records)
        ds = xr.open_zarr(store.path, group="forward", consolidated=False)
        try:
            assert set(ds.data_vars) == set(MAP_NAMES)
            for name in MAP_NAMES:
                assert ds[name].dims == ("y", "x")
                assert "long_name" in ds[name].attrs
            assert ds["field_nv_t"].attrs["units"] == "T"
            assert ds["freq_lo_hz"].attrs["units"] == "Hz"
            assert ds["angle_rad"].attrs["units"] == "rad"
            assert ds["contrast_lo"].attrs["units"] == "1"
            assert ds["pl_rate_cps"].attrs["units"] == "counts/s"
            assert ds["status"].attrs["units"] == ""
            assert ds["status"].attrs["flag_values"][-1] == 255
            assert ds["status"].attrs["flag_meanings"].split()[-1] == "not_written"
            assert ds["x"].attrs["units"] == "m"
            assert ds["y"].attrs["units"] == "m"
            np.testing.assert_array_equal(ds["x"].values, X_M)
            y = ds["y"].values
            assert y[0] == 0.0
            assert y[2] == pytest.approx(1.0e-7)
            # lines 1, 3, 4 are not written: planned where the scan will put them
            np.testing.assert_allclose(y[[1, 3, 4]], [0.5e-7, 1.5e-7, 2.0e-7])
            assert (ds["status"].values[[1, 3, 4]] == 255).all()
            np.testing.assert_array_equal(
                ds["field_nv_t"].sel(y=1.0e-7).values, lines[1][2].field_nv_t
            )
            assert ds["status"].dtype == np.uint8
            assert (ds["status"].values[1] == 255).all()
        finally:
            ds.close()


def test_store_attributes_record_format_scan_config_and_version(tmp_path: Path) -> None:
    """The root attributes name the layout, the scan, the config, its digest and the version."""
    clock = StepClock()
    with open_store(tmp_path, clock=clock) as store:
        attrs = zarr.open_group(store.path, mode="r").attrs.asdict()
    assert attrs["store_format"] == "strayline-store"
    assert attrs["store_format_version"] == 1
    assert attrs["scan_id"] == "scan7"
    assert (attrs["n_lines_planned"], attrs["n_pixels"]) == (N_LINES, N_PIXELS)
    assert attrs["config"] == CONFIG
    assert attrs["config_digest"] == DIGEST
    assert attrs["software_version"] == strayline.__version__
    assert parse_time(attrs["created_time"]) == T0 + timedelta(seconds=1)


def test_reopening_with_another_config_keeps_both(tmp_path: Path) -> None:
    """A reopen under a new config records it beside the original in other_configs."""
    open_store(tmp_path).close()
    other = {"fit": {"model": "one_dip"}}
    with open_store(tmp_path, config_json=other, config_digest="beef0002") as store:
        store.write_line(*make_records(0))
        entry = store.committed()[(0, "forward")]
        attrs = zarr.open_group(store.path, mode="r").attrs.asdict()
    assert entry.config_digest == "beef0002"
    assert attrs["config_digest"] == DIGEST
    assert attrs["other_configs"] == {"beef0002": other}


def test_the_nv_axis_is_recorded_at_creation_and_added_to_an_older_store(
    tmp_path: Path,
) -> None:
    """A store opened with the scan's NV axis records θ and φ (rad) in its attributes; a
    store made without it gets them on its next open, and the reader hands them out."""
    with open_store(tmp_path / "new", nv_axis_rad=(0.9553, 0.7854)) as store:
        attrs = zarr.open_group(store.path, mode="r").attrs.asdict()
    assert (attrs["nv_theta_rad"], attrs["nv_phi_rad"]) == (0.9553, 0.7854)
    open_store(tmp_path / "old").close()
    path = tmp_path / "old" / "scan7.zarr"
    assert open_store_reader(path).nv_axis_rad() is None
    open_store(tmp_path / "old", nv_axis_rad=(0.5, 1.0)).close()
    assert open_store_reader(path).nv_axis_rad() == (0.5, 1.0)


def test_the_tip_is_recorded_at_creation_or_later_and_kept_with_raw_spectra(
    tmp_path: Path,
) -> None:
    """A store opened with the line files' tip_id records it (the reader's tip_id); one
    made without it gets it on a later open; raw spectra keep each line's tip."""
    with open_store(tmp_path / "new", tip_id="tip-A7", raw_spectra=True) as store:
        line, fit, field = make_records(0)
        store.write_line(dataclasses.replace(line, tip_id="tip-A7"), fit, field)
        raw = store.read_raw(0, "forward")
    assert open_store_reader(tmp_path / "new" / "scan7.zarr").tip_id == "tip-A7"
    assert raw is not None
    assert raw.tip_id == "tip-A7"
    assert raw.scan_line("scan7", N_LINES, tmp_path / "x").tip_id == "tip-A7"
    open_store(tmp_path / "old").close()
    assert open_store_reader(tmp_path / "old" / "scan7.zarr").tip_id is None
    open_store(tmp_path / "old", tip_id="tip-B").close()
    open_store(tmp_path / "old", tip_id="tip-C").close()  # the first one stays
    assert open_store_reader(tmp_path / "old" / "scan7.zarr").tip_id == "tip-B"


def merged_records(index: int) -> tuple[ScanLine, LineFit, LineField]:
    """make_records with pixels 1 and 4 merged (status MERGED, a bound on |B∥|, no B∥)."""
    line, fit, field = make_records(index)
    status = field.status.copy()
    status[[1, 4]] = FitStatus.MERGED
    bound = np.where(status == FitStatus.MERGED, [0, 1.1e-4, 0, 0, 2.3e-4, 0], np.nan)
    field_nv = np.where(status == FitStatus.MERGED, np.nan, field.field_nv_t)
    merged = dataclasses.replace(field, status=status, field_nv_bound_t=bound, field_nv_t=field_nv)
    return line, dataclasses.replace(fit, status=status), merged


def test_the_bound_on_merged_pixels_is_stored_with_its_units(tmp_path: Path) -> None:
    """field_nv_bound_t is a map like the field's: the LineField row read back bit for bit
    (NaN on every pixel that is not MERGED), in T, its long name stating the level."""
    records = merged_records(2)
    with open_store(tmp_path) as store:
        store.write_line(*records)
        row = store.read_map("field_nv_bound_t", "forward")[2]
        attrs = zarr.open_array(store.path / "forward" / "field_nv_bound_t", mode="r").attrs
    np.testing.assert_array_equal(row, records[2].field_nv_bound_t)
    assert np.isfinite(row).sum() == 2
    assert attrs["units"] == "T"
    assert str(attrs["long_name"]).startswith("upper bound (95 %, one-sided) on the magnitude")


def test_an_older_store_without_the_bound_map_is_read_and_reopened(tmp_path: Path) -> None:
    """A store written before field_nv_bound_t existed (the same layout without that map)
    reads as NaN there; reopening it for writing adds the map (NaN for the lines it holds,
    nothing reset) and new lines store their bounds. A map the store has always had is
    still required."""
    with open_store(tmp_path) as store:
        old = [make_records(0), make_records(1, "backward")]
        for records in old:
            store.write_line(*records)
        path = store.path
    for direction in ("forward", "backward"):
        shutil.rmtree(path / direction / "field_nv_bound_t")  # as an older version wrote it
    reader = open_store_reader(path)
    bound = reader.read_array("field_nv_bound_t", "forward")
    assert bound.shape == (N_LINES, N_PIXELS)
    assert bound.dtype == np.float64
    assert np.isnan(bound).all()
    np.testing.assert_array_equal(
        reader.read_array("field_nv_t", "forward")[0], old[0][2].field_nv_t
    )
    with open_store(tmp_path) as store:
        assert store.recovered_lines == []
        assert sorted(store.committed()) == [(0, "forward"), (1, "backward")]
        assert np.isnan(store.read_map("field_nv_bound_t", "backward")).all()
        assert_rows(store, "forward", 0, line_rows(*old[0]) | {"field_nv_bound_t": np.nan})
        new = merged_records(3)
        store.write_line(*new)
    attrs = zarr.open_array(path / "forward" / "field_nv_bound_t", mode="r").attrs
    assert attrs["units"] == "T"
    assert "lines committed before then" in str(attrs["comment"])
    with open_store(tmp_path) as store:
        assert store.recovered_lines == []
        assert_rows(store, "forward", 3, line_rows(*new))
    shutil.rmtree(path / "forward" / "chi2_red")
    with pytest.raises(StoreError, match=r"store layout incomplete: missing .*chi2_red"):
        open_store_reader(path).read_array("chi2_red", "forward")


# ---------------------------------------------------------------------------- validation


def test_reopen_with_other_pixel_count_is_refused(tmp_path: Path) -> None:
    """Reopening a store for a different n_pixels is a StoreMismatch naming store and values."""
    open_store(tmp_path).close()
    with pytest.raises(
        StoreMismatch,
        match=r"scan7\.zarr: attribute 'n_pixels' must be 6 \(as in the scan's store\); found 8",
    ):
        open_store(tmp_path, n_pixels=8, x_m=np.zeros(8))


def test_reopen_with_other_line_count_is_refused(tmp_path: Path) -> None:
    """Reopening a store for a different n_lines_planned is a StoreMismatch."""
    open_store(tmp_path).close()
    with pytest.raises(StoreMismatch, match=r"attribute 'n_lines_planned' must be 5 .*found 9"):
        open_store(tmp_path, n_lines_planned=9)


def test_directory_that_is_not_a_store_is_refused(tmp_path: Path) -> None:
    """A zarr group without the store_format attribute is not taken over."""
    zarr.open_group(tmp_path / "scan7.zarr", mode="w", zarr_format=3)
    with pytest.raises(StoreError, match=r"must be 'strayline-store', 1; found None, None"):
        open_store(tmp_path)


def test_a_second_writer_is_refused(tmp_path: Path) -> None:
    """While one ScanStore holds a store, opening it again raises StoreError."""
    with open_store(tmp_path), pytest.raises(StoreError, match="in use by another writer"):
        open_store(tmp_path)


def test_line_of_another_width_raises_store_mismatch(tmp_path: Path) -> None:
    """A line whose n_pixels differs is a StoreMismatch, a LineFileError naming file and field."""
    with open_store(tmp_path) as store:
        records = make_records(1, n_pixels=7, source="/data/scan7/line_00001.h5")
        with pytest.raises(StoreMismatch) as info:
            store.write_line(*records)
    assert isinstance(info.value, LineFileError)
    assert str(info.value) == "line_00001.h5: n_pixels must be 6 (as in store scan7.zarr); found 7"


def test_line_index_out_of_range_raises_store_mismatch(tmp_path: Path) -> None:
    """A line index beyond the planned lines is a StoreMismatch naming the allowed range."""
    with open_store(tmp_path) as store:
        records = make_records(5, source="/data/scan7/line_00005.h5")
        with pytest.raises(StoreMismatch) as info:
            store.write_line(*records)
    assert str(info.value) == (
        "line_00005.h5: line_index must be in 0..4 (store scan7.zarr plans 5 lines); found 5"
    )


def test_line_of_another_scan_raises_store_mismatch(tmp_path: Path) -> None:
    """A line whose scan_id differs from the store's is a StoreMismatch."""
    with open_store(tmp_path) as store:
        records = make_records(0, scan_id="scan8", source="/data/scan8/line_00000.h5")
        with pytest.raises(StoreMismatch, match=r"scan_id must be 'scan7'.*found 'scan8'"):
            store.write_line(*records)


def test_writing_to_a_closed_store_raises(tmp_path: Path) -> None:
    """write_line after close raises StoreError rather than writing unrecorded rows."""
    store = open_store(tmp_path)
    store.close()
    with pytest.raises(StoreError, match="the store is closed"):
        store.write_line(*make_records(0))


# ---------------------------------------------------------------------------- ledger


def test_decide_tells_new_duplicate_and_changed(tmp_path: Path) -> None:
    """decide: unseen -> new, same checksum -> duplicate, other checksum -> changed."""
    with open_store(tmp_path) as store:
        first = make_records(2, sha256="1" * 64)
        assert store.decide(first[0]) == "new"
        receipt = store.write_line(*first)
        assert receipt.superseded is False
        assert store.decide(first[0]) == "duplicate"
        assert store.decide(make_records(2, sha256="2" * 64)[0]) == "changed"
        assert store.decide(make_records(2, sha256=None)[0]) == "changed"
        assert store.decide(make_records(2, "backward", sha256="1" * 64)[0]) == "new"


def test_changed_file_keeps_both_versions_in_the_ledger(tmp_path: Path) -> None:
    """Rewriting a line with a new checksum replaces its rows and keeps the old version."""
    clock = StepClock()
    with open_store(tmp_path, clock=clock) as store:
        store.write_line(*make_records(2, sha256="1" * 64, source="/d/line_a.h5"))
        second = make_records(2, seed=9, sha256="2" * 64, source="/d/line_b.h5")
        receipt = store.write_line(*second)
        assert receipt.superseded is True
        assert_rows(store, "forward", 2, line_rows(*second))
    with open_store(tmp_path, clock=clock) as store:
        entry = store.committed()[(2, "forward")]
        assert (entry.sha256, entry.source) == ("2" * 64, "/d/line_b.h5")
        assert [(v.sha256, v.source) for v in entry.superseded] == [("1" * 64, "/d/line_a.h5")]
        assert entry.superseded[0].processed_time < entry.processed_time
        assert_rows(store, "forward", 2, line_rows(*second))


def test_ledger_entry_records_source_checksum_time_version_and_config(tmp_path: Path) -> None:
    """A commit records the file, its checksum, the clock's time, the version and config digest."""
    clock = StepClock()
    with open_store(tmp_path, clock=clock) as store:
        store.write_line(*make_records(4, "backward", source="/d/l4.h5", sha256="e" * 64))
        entry = store.committed()[(4, "backward")]
    assert entry.source == "/d/l4.h5"
    assert entry.sha256 == "e" * 64
    # clock readings: 1 open, 2 begin, 3 commit
    assert entry.processed_time == T0 + timedelta(seconds=3)
    assert entry.software_version == strayline.__version__
    assert entry.config_digest == DIGEST
    records = (tmp_path / "scan7.zarr/ledger/records.jsonl").read_text().splitlines()
    assert [json.loads(r)["event"] for r in records] == ["begin", "commit"]
    assert json.loads(records[1])["processed_time"] == "2031-05-04T12:00:03.000000Z"


def test_statistics_count_lines_and_failed_fits(tmp_path: Path) -> None:
    """statistics() counts lines per direction and non-OK status pixels, also after reopen."""
    clock = StepClock()
    with open_store(tmp_path, clock=clock) as store:
        for index, direction in [(0, "forward"), (1, "forward"), (1, "backward")]:
            store.write_line(*make_records(index, direction))
        stats = store.statistics()
    # make_records marks exactly one pixel per line NOT_CONVERGED
    assert (stats.committed_forward, stats.committed_backward) == (2, 1)
    assert stats.fit_failures == 3
    assert stats.n_lines_planned == N_LINES
    assert stats.last_commit_time == clock.now
    with open_store(tmp_path) as store:
        assert store.statistics() == stats


@given(
    moments=st.lists(
        st.datetimes(
            min_value=datetime(1970, 1, 2),
            max_value=datetime(9998, 12, 31),
            timezones=st.just(UTC),
        ),
        min_size=1,
        max_size=5,
    )
)
def test_ledger_time_text_round_trips(moments: list[datetime]) -> None:
    """format_time then parse_time returns the same instant, in ISO 8601 UTC with Z."""
    for moment in moments:
        text = format_time(moment)
        assert text.endswith("Z")
        assert parse_time(text) == moment


_RECORD = st.builds(
    lambda event, index, direction: {
        "event": event,
        "line_index": index,
        "direction": direction,
        "time": "2031-05-04T12:00:00.000000Z",
    },
    st.sampled_from(["begin", "reset"]),
    st.integers(0, 10_000),
    st.sampled_from(["forward", "backward"]),
)


@settings(max_examples=150)
@given(records=st.lists(_RECORD, max_size=6), cut=st.integers(0, 10_000))
def test_parse_records_drops_only_a_torn_tail(records: list[dict[str, Any]], cut: int) -> None:
    """Cutting a ledger anywhere yields exactly the records whose lines are complete."""
    lines = [json.dumps(r).encode() + b"\n" for r in records]
    data = b"".join(lines)
    cut = min(cut, len(data))
    parsed, good_length = parse_records(data[:cut], "records.jsonl")
    ends = np.cumsum([len(line) for line in lines]).tolist()
    complete = [e for e in ends if e <= cut]
    assert parsed == records[: len(complete)]
    assert good_length == (complete[-1] if complete else 0)


def test_parse_records_refuses_damage_before_valid_records() -> None:
    """An invalid ledger line followed by a valid one is corruption: StoreError with line number."""
    good = b'{"event":"reset","line_index":1,"direction":"forward"}\n'
    with pytest.raises(StoreError, match="ledger line 2 must be a JSON record"):
        parse_records(good + b"garbage\n" + good, "s.zarr/ledger/records.jsonl")


# ---------------------------------------------------------------------------- crash safety


def test_crash_between_rows_and_commit_resets_the_line(tmp_path: Path, monkeypatch) -> None:
    """Rows written but never committed are reset to fill at reopen and the line is reported."""
    store = open_store(tmp_path)
    kept = make_records(0)
    store.write_line(*kept)
    real_append = Ledger.append

    def append_until_commit(self: Ledger, records: Any) -> None:
        batch = list(records)
        if batch[0]["event"] == "commit":
            raise KeyboardInterrupt("killed before the commit record")
        real_append(self, batch)

    monkeypatch.setattr(Ledger, "append", append_until_commit)
    with pytest.raises(KeyboardInterrupt):
        store.write_line(*make_records(1))
    monkeypatch.undo()
    assert not np.isnan(store.read_map("field_nv_t", "forward")[1]).any()  # rows did land
    simulate_crash(store)
    with open_store(tmp_path) as store:
        assert store.recovered_lines == [(1, "forward")]
        assert_unwritten(store, "forward", 1)
        assert np.isnan(store.read_map("field_nv_t", "forward")[1]).all()
        assert_rows(store, "forward", 0, line_rows(*kept))
        assert sorted(store.committed()) == [(0, "forward")]
        assert store.decide(make_records(1)[0]) == "new"
    with open_store(tmp_path) as store:
        assert store.recovered_lines == []


def test_crash_while_rewriting_a_changed_line_resets_it(tmp_path: Path) -> None:
    """A rewrite cut off mid-rows resets the line; its old version stays in the ledger history."""
    store = open_store(tmp_path, chunk_lines=2)
    store.write_line(*make_records(2, sha256="1" * 64))
    neighbour = make_records(3)
    store.write_line(*neighbour)

    class Killed(Exception):
        pass

    fail_map(store, "forward", "contrast_lo", Killed)
    with pytest.raises(Killed):
        store.write_line(*make_records(2, seed=5, sha256="2" * 64))
    simulate_crash(store)
    with open_store(tmp_path) as store:
        assert store.recovered_lines == [(2, "forward")]
        assert_unwritten(store, "forward", 2)
        assert_rows(store, "forward", 3, line_rows(*neighbour))  # shares row 2's chunk
        assert (2, "forward") not in store.committed()
        store.write_line(*make_records(2, seed=5, sha256="2" * 64))
        entry = store.committed()[(2, "forward")]
        assert [v.sha256 for v in entry.superseded] == ["1" * 64]


def test_crash_right_after_the_begin_record_reports_the_line(tmp_path: Path) -> None:
    """A line whose begin record is durable but no row was written is still reported at reopen."""

    class Killed(Exception):
        pass

    store = open_store(tmp_path)
    fail_map(store, "backward", "field_nv_t", Killed)  # the first map written
    with pytest.raises(Killed):
        store.write_line(*make_records(3, "backward"))
    simulate_crash(store)
    with open_store(tmp_path) as store:
        assert store.recovered_lines == [(3, "backward")]
        assert store.committed() == {}
    records = (tmp_path / "scan7.zarr/ledger/records.jsonl").read_text().splitlines()
    assert [json.loads(r)["event"] for r in records] == ["begin", "reset"]


def test_rows_written_without_a_ledger_entry_are_reset(tmp_path: Path) -> None:
    """Rows found in the maps for a line the ledger never committed are reset and reported;
    the slow-axis coordinate then holds planned positions only."""
    open_store(tmp_path, chunk_lines=2).close()
    group = zarr.open_group(tmp_path / "scan7.zarr", mode="r+")
    group["backward/chi2_red"][4, :] = 1.5
    group["forward/status"][1, 2] = 0
    with open_store(tmp_path) as store:
        assert store.recovered_lines == [(1, "forward"), (4, "backward")]
        assert_unwritten(store, "backward", 4)
        assert_unwritten(store, "forward", 1)
        assert np.isnan(store.read_map("chi2_red", "backward")).all()
        ds = xr.open_zarr(store.path, group="forward", consolidated=False)
        y = ds["y"].values  # nothing written: planned, one fast-axis pitch per line
        np.testing.assert_allclose(y, np.arange(N_LINES) * (X_M[1] - X_M[0]))
        ds.close()


def test_torn_last_ledger_line_is_tolerated_and_cut(tmp_path: Path) -> None:
    """A half-written final ledger record is ignored and truncated; later commits append cleanly."""
    with open_store(tmp_path) as store:
        store.write_line(*make_records(0))
    ledger = tmp_path / "scan7.zarr/ledger/records.jsonl"
    good_size = ledger.stat().st_size
    with ledger.open("ab") as f:
        f.write(b'{"event":"commit","line_index":1,"dire')
    with open_store(tmp_path) as store:
        assert ledger.stat().st_size == good_size
        assert sorted(store.committed()) == [(0, "forward")]
        assert store.recovered_lines == []
        store.write_line(*make_records(1))
    with open_store(tmp_path) as store:
        assert sorted(store.committed()) == [(0, "forward"), (1, "forward")]


def test_leftover_temporary_files_are_removed_at_open(tmp_path: Path) -> None:
    """zarr's *.partial chunk files and half-built creation directories are deleted at open."""
    open_store(tmp_path).close()
    partial = (
        tmp_path / "scan7.zarr/forward/field_nv_t/c/0/0.0123456789abcdef0123456789abcdef.partial"
    )
    partial.parent.mkdir(parents=True)
    partial.write_bytes(b"half a chunk")
    creating = tmp_path / ".scan7.zarr.creating-feedface"
    (creating / "forward").mkdir(parents=True)
    with open_store(tmp_path) as store:
        assert not partial.exists()
        assert not creating.exists()
        assert store.recovered_lines == []


def test_disk_failure_during_rows_raises_store_error(tmp_path: Path) -> None:
    """An OSError while writing rows becomes a StoreError naming the store and the operation."""

    with open_store(tmp_path) as store:
        fail_map(store, "forward", "chi2_red", DISK_FULL)
        with pytest.raises(StoreError, match=r"scan7\.zarr: writing line 2 \(forward\) failed"):
            store.write_line(*make_records(2))
        assert (2, "forward") not in store.committed()


def test_failed_rewrite_uncommits_the_old_version(tmp_path: Path) -> None:
    """After a failed rewrite the line counts as uncommitted: its old rows were partly replaced."""

    with open_store(tmp_path) as store:
        store.write_line(*make_records(2, sha256="1" * 64))
        fail_map(store, "forward", "fwhm_hz", DISK_FULL)
        with pytest.raises(StoreError, match="No space left on device"):
            store.write_line(*make_records(2, seed=3, sha256="2" * 64))
        assert store.committed() == {}
        assert store.decide(make_records(2, sha256="1" * 64)[0]) == "new"
    with open_store(tmp_path) as store:
        assert store.recovered_lines == [(2, "forward")]
        assert_unwritten(store, "forward", 2)


# ---------------------------------------------------------------------------- raw spectra


def test_raw_spectra_round_trip_with_a_changing_frequency_count(tmp_path: Path) -> None:
    """Raw counts, frequencies and dwell read back exactly, also when n_freq changes by line."""
    with open_store(tmp_path, raw_spectra=True) as store:
        first = make_records(0, n_freq=11)
        second_line, fit, field = make_records(1, n_freq=17)
        reference = np.full((N_PIXELS, 17), 40, dtype=np.int32)
        second_line = ScanLine(
            **{
                **second_line.__dict__,
                "reference_counts": reference,
                "temperature_k": 4.2,
                "profile": "cryogenic-2d-magnet",
                "aux": {"height": np.linspace(1.0, 2.0, N_PIXELS)},
                "aux_units": {"height": "nm"},
            }
        )
        store.write_line(*first)
        store.write_line(second_line, fit, field)
        store.write_line(*make_records(2))
    with open_store(tmp_path) as store:
        raw0 = store.read_raw(0, "forward")
        raw1 = store.read_raw(1, "forward")
        assert store.read_raw(3, "forward") is None
    assert raw0 is not None
    assert raw1 is not None
    np.testing.assert_array_equal(raw0.counts, first[0].counts)
    assert raw0.counts.dtype == np.int32
    assert raw0.reference_counts is None
    np.testing.assert_array_equal(raw0.freq_hz, first[0].freq_hz)
    assert raw1.counts.shape == (N_PIXELS, 17)
    np.testing.assert_array_equal(raw1.counts, second_line.counts)
    np.testing.assert_array_equal(raw1.freq_hz, second_line.freq_hz)
    np.testing.assert_array_equal(raw1.reference_counts, reference)
    assert raw1.dwell_s == 2.0e-3
    assert raw1.y_m == second_line.y_m
    assert raw1.start_time == T0
    assert raw1.sha256 == second_line.sha256
    # what a refit needs beyond the spectra: the temperature (D) and the profile
    assert (raw1.temperature_k, raw1.profile) == (4.2, "cryogenic-2d-magnet")
    assert (raw0.temperature_k, raw0.profile) == (None, None)
    # and the auxiliary channels the rules may read
    np.testing.assert_array_equal(raw1.aux["height"], np.linspace(1.0, 2.0, N_PIXELS))
    assert dict(raw1.aux_units) == {"height": "nm"}
    assert not raw0.aux
    again = raw1.scan_line("scan7", store.n_lines_planned, tmp_path / "elsewhere")
    assert again.sha256 == second_line.sha256
    assert again.source == tmp_path / "elsewhere"
    np.testing.assert_array_equal(again.counts, second_line.counts)
    np.testing.assert_array_equal(again.aux["height"], second_line.aux["height"])


def test_raw_spectra_are_compressed(tmp_path: Path) -> None:
    """Raw counts are stored through the Blosc-Zstd codec chain."""
    with open_store(tmp_path, raw_spectra=True) as store:
        store.write_line(*make_records(0))
    counts = zarr.open_array(tmp_path / "scan7.zarr/raw/forward/0/counts", mode="r")
    assert [type(c).__name__ for c in counts.compressors] == ["BloscCodec"]
    assert counts.compressors[0].cname.value == "zstd"


def test_rewritten_line_without_raw_drops_stale_raw_spectra(tmp_path: Path) -> None:
    """A line rewritten with raw storage off does not keep the previous version's spectra."""
    with open_store(tmp_path, raw_spectra=True) as store:
        store.write_line(*make_records(0, sha256="1" * 64))
    with open_store(tmp_path, raw_spectra=False) as store:
        store.write_line(*make_records(0, sha256="2" * 64))
        assert store.read_raw(0, "forward") is None


def test_a_backward_trace_is_stored_in_increasing_x(tmp_path: Path) -> None:
    """A trace acquired in decreasing x (its x_m says so) lands in the maps in increasing
    x, so both traces share the store's x coordinate (common practice for trace/retrace)."""
    line, fit, field = make_records(0, "backward")
    reversed_line = dataclasses.replace(line, x_m=line.x_m[::-1].copy())
    with open_store(tmp_path, x_m=X_M[::-1].copy()) as store:
        store.write_line(reversed_line, fit, field)
        rows = line_rows(reversed_line, fit, field)
        for name in MAP_NAMES:
            np.testing.assert_array_equal(
                store.read_map(name, "backward")[0], rows[name][::-1], err_msg=name
            )
    x = np.asarray(zarr.open_group(tmp_path / "scan7.zarr", mode="r")["backward/x"][:])
    np.testing.assert_array_equal(x, np.sort(X_M))


def test_a_store_deleted_while_open_refuses_to_commit(tmp_path: Path) -> None:
    """If the store's folder is removed while it is open, the next write raises StoreError
    instead of committing into a deleted ledger nobody will read (common practice)."""
    import shutil

    store = open_store(tmp_path)
    try:
        store.write_line(*make_records(0))
        shutil.rmtree(store.path)
        with pytest.raises(StoreError, match="ledger"):
            store.write_line(*make_records(1))
    finally:
        with contextlib.suppress(StoreError):
            store.close()


def test_the_reader_tells_a_store_from_a_folder_that_is_not_one(tmp_path: Path) -> None:
    """The read-only reader refuses a folder without group metadata and a zarr group of
    another format (NotAScanStore, naming the folder); a folder of chunks with neither
    metadata nor ledger is an orphan, a store is not."""
    from strayline.store import NotAScanStore, is_orphaned_store, store_metadata_present

    chunks = tmp_path / "gone.zarr" / "forward" / "field_nv_t" / "c" / "0"
    chunks.mkdir(parents=True)
    with pytest.raises(NotAScanStore, match=r"gone\.zarr: cannot open as a scan store"):
        open_store_reader(tmp_path / "gone.zarr")
    assert is_orphaned_store(tmp_path / "gone.zarr")
    zarr.open_group(tmp_path / "other.zarr", mode="w").attrs["store_format"] = "elsewhere"
    with pytest.raises(NotAScanStore, match=r"store_format must be 'strayline-store'"):
        open_store_reader(tmp_path / "other.zarr")
    with open_store(tmp_path) as store:
        store.write_line(*make_records(0))
        assert store_metadata_present(store.path)
        assert not is_orphaned_store(store.path)
        reader = open_store_reader(store.path)
    assert reader.scan_id == "scan7"
    assert reader.committed_lines("forward") == [0]
    assert reader.read_array("status", "forward").shape == (N_LINES, N_PIXELS)


def test_the_readme_snippet_opens_and_plots_a_scan_while_it_runs(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The README's xarray snippet, run as printed on a store with two of five lines
    written (the others planned), opens the trace and plots the field map: the slow-axis
    coordinate of a running scan is monotonic."""
    import re

    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    (snippet,) = [
        block
        for block in re.findall(r"```python\n(.*?)```", readme, flags=re.S)
        if "open_zarr" in block
    ]
    snippet = "\n".join(line.strip() for line in snippet.splitlines())
    with open_store(tmp_path / "output") as store:
        for index in (0, 1):
            store.write_line(*make_records(index))
        (tmp_path / "output" / "scan7.zarr").rename(tmp_path / "output" / "my-scan.zarr")
    monkeypatch.chdir(tmp_path)
    namespace: dict[str, object] = {}
    try:
        exec(snippet, namespace)  # the snippet as the README prints it
    finally:
        plt.close("all")
    ds = namespace["ds"]
    assert ds.field_nv_t.shape == (N_LINES, N_PIXELS)  # type: ignore[attr-defined]


# ---------------------------------------------------------------------------- group commits


def test_commits_without_a_group_number_are_groups_of_one() -> None:
    """A ledger written before group commits (no ``group`` in its commit records) replays
    with each commit as a group of its own; consecutive commits sharing a number form one
    group, in order."""
    from strayline.store._ledger import LedgerState

    def commit(index: int, group: int | None = None) -> dict[str, Any]:
        record = {
            "event": "commit",
            "line_index": index,
            "direction": "forward",
            "source": f"line_{index}.h5",
            "sha256": None,
            "processed_time": "2026-03-01T22:00:00.000000Z",
            "software_version": "0",
            "config_digest": "0",
        }
        return record if group is None else record | {"group": group}

    state = LedgerState()
    for record in (commit(0), commit(1)):
        state.apply(record)
    assert state.last_group == ((1, "forward"),)
    for record in (commit(2, group=2), commit(3, group=2), commit(4, group=2)):
        state.apply(record)
    assert state.last_group == ((2, "forward"), (3, "forward"), (4, "forward"))
    state.apply(commit(5, group=5))
    assert state.last_group == ((5, "forward"),)


def test_folders_to_flush_are_those_whose_entries_change(tmp_path: Path) -> None:
    """Writing a file flushes its own folder; a folder still missing adds the folder that
    receives it, up to the first that exists, and never above the store's root (rename
    durability: fsync(2) of the containing directory, common practice)."""
    from strayline.store._layout import dirs_to_flush

    root = tmp_path / "store"
    (root / "a" / "c" / "0").mkdir(parents=True)
    existing = root / "a" / "c" / "0" / "0"
    assert dirs_to_flush([existing], root) == {root / "a" / "c" / "0"}
    fresh = root / "a" / "c" / "7" / "0"
    assert dirs_to_flush([fresh], root) == {root / "a" / "c" / "7", root / "a" / "c"}
    deep = root / "b" / "c" / "0" / "0"
    assert dirs_to_flush([deep], root) == {
        root / "b" / "c" / "0",
        root / "b" / "c",
        root / "b",
        root,
    }


def test_a_group_writes_a_shared_chunk_once_and_reads_back_each_line(tmp_path: Path) -> None:
    """Lines committed as one group into chunks of several lines read back exactly as
    written, each committed, the group known to the ledger in order; a line given twice in
    one group is a caller's bug."""
    store = open_store(tmp_path, chunk_lines=2)
    lines = (0, 1, 2, 4)  # chunks [0, 1] whole, [2, 3] and [4] in part
    try:
        items = [make_records(i, seed=i) for i in lines]
        receipts = store.write_lines(items)
        assert [(r.line_index, r.superseded) for r in receipts] == [(i, False) for i in lines]
        for i, records in zip(lines, items, strict=True):
            assert_rows(store, "forward", i, line_rows(*records))
        assert_unwritten(store, "forward", 3)
        assert store.last_group()[0] == tuple((i, "forward") for i in lines)
        with pytest.raises(ValueError, match="appears twice"):
            store.write_lines([make_records(3), make_records(3)])
        assert (3, "forward") not in store.committed()
    finally:
        store.close()


def test_merged_pixels_are_measurements_not_failed_fits() -> None:
    """A merged pixel carries a bound on its field: counted as measured, not failed, by the
    store, the status command and the pipeline's log alike (one definition)."""
    from strayline.fit import MEASURED, FitStatus, failed_fits
    from strayline.store._rows import count_failures

    status = np.array([int(s) for s in FitStatus] + [255], dtype=np.uint8)
    failed = failed_fits(status[:-1])
    assert {FitStatus(int(s)) for s, f in zip(status[:-1], failed, strict=True) if not f} == set(
        MEASURED
    )
    assert count_failures(status) == len(FitStatus) - len(MEASURED)
