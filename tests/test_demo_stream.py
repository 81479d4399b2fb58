"""Tests of the synthetic instrument: tip model, faults, writer, truth and command line."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.constants
from hypothesis import given, settings
from hypothesis import strategies as st

from demo_stream.__main__ import build_parser, config_from_args, main
from demo_stream.faults import FAULT_KINDS, Fault, fault_mask, fault_to_spec, parse_fault
from demo_stream.presets import PRESETS
from demo_stream.scenes import calibration_stripe, labyrinth, make_scene, wire
from demo_stream.tip import (
    NV_100_PHI_RAD,
    NV_100_THETA_RAD,
    ScanRenderer,
    TipModel,
    render_field_t,
)
from demo_stream.truth import load_truth, truth_paths
from demo_stream.writer import DemoConfig, frequency_grid_hz, run_scan
from strayline.errors import LineFileError
from strayline.lines import line_file_name, read_line_file
from strayline.physics import GAMMA_NV_HZ_PER_T

MU0 = scipy.constants.mu_0
# γ_NV = g μB/h with g = 2.0028 (Loubser & van Wyk, Rep. Prog. Phys. 41, 1201 (1978),
# recalled [mem]) and μB/h from CODATA through scipy.constants.
GAMMA_HZ_PER_T = 2.0028 * scipy.constants.physical_constants["Bohr magneton in Hz/T"][0]


def small_config(**overrides: object) -> DemoConfig:
    """An 8-line × 32-pixel × 51-frequency scan."""
    values: dict[str, object] = {
        "scene": labyrinth(),
        "tip": TipModel(),
        "n_lines": 8,
        "n_pixels": 32,
        "pixel_m": 30e-9,
        "freq_hz": frequency_grid_hz(2.66e9, 3.08e9, 51),
        "seed": 4,
        "scan_id": "test-scan",
    }
    values.update(overrides)
    return DemoConfig(**values)  # type: ignore[arg-type]


class FakeTime:
    """A clock that advances only when slept on, and a log of every sleep."""

    def __init__(self) -> None:
        self.now = 0.0
        self.events: list[tuple[str, float]] = []

    def clock(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        self.events.append(("sleep", seconds))
        self.now += seconds


def run(config: DemoConfig, tmp_path: Path, **kwargs: object):  # type: ignore[no-untyped-def]
    return run_scan(config, tmp_path / "watch", tmp_path / "truth", **kwargs)  # type: ignore[arg-type]


def read(tmp_path: Path, scan_id: str, k: int, direction: str = "forward"):  # type: ignore[no-untyped-def]
    return read_line_file(tmp_path / "watch" / scan_id / line_file_name(k, direction))


def expected_counts(truth, direction: str = "forward") -> np.ndarray:  # type: ignore[no-untyped-def]
    """Two Lorentzian dips on the truth's baseline (the common-practice CW-ODMR model)."""
    f = truth.freq_hz
    base = truth.map("pl_rate_cps", direction) * TipModel().dwell_s
    c = truth.map("contrast", direction)
    out = np.ones((*base.shape, f.size))
    for name in ("f_lo_hz", "f_hi_hz"):
        f0 = truth.map(name, direction)[..., None]
        out -= c[..., None] / (1.0 + (2.0 * (f - f0) / 10e6) ** 2)
    return base[..., None] * out


# -- writer and files --------------------------------------------------------------------


def test_scan_writes_one_readable_file_per_line_and_truth_outside(tmp_path: Path) -> None:
    """Every line becomes one contract file with the asked metadata; truth lands outside."""
    config = small_config(profile="thin-film")
    record = run(config, tmp_path)
    scan_dir = tmp_path / "watch" / "test-scan"
    assert sorted(p.name for p in scan_dir.iterdir()) == [
        line_file_name(k, "forward") for k in range(8)
    ]
    for k in range(8):
        line = read(tmp_path, "test-scan", k)
        assert (line.scan_id, line.line_index, line.n_lines_planned) == ("test-scan", k, 8)
        assert (line.direction, line.profile, line.temperature_k) == ("forward", "thin-film", 295.0)
        assert line.counts.shape == (32, 51)
        assert line.nv_theta_rad == pytest.approx(NV_100_THETA_RAD)
        np.testing.assert_array_equal(line.x_m, record.x_m)
        assert line.y_m == record.y_m[k]
    npz, js = truth_paths(tmp_path / "truth", "test-scan")
    assert npz.exists()
    assert js.exists()
    assert record.complete
    assert json.loads(js.read_text())["complete"] is True
    assert not list((tmp_path / "watch").rglob("*.npz"))


def test_counts_are_poisson_around_the_truth_spectrum(tmp_path: Path) -> None:
    """Counts scatter around two Lorentzian dips on the true PL with Poisson variance."""
    # Poisson statistics (variance = mean) and the CW-ODMR line shape (common practice):
    # the mean of (n − μ)²/μ is 1 within ~1/√N = 0.2 % for N = 8·32·51 samples.
    config = small_config()
    record = run(config, tmp_path)
    counts = np.stack([read(tmp_path, "test-scan", k).counts for k in range(8)]).astype(float)
    mu = expected_counts(record)
    assert np.mean((counts - mu) ** 2 / mu) == pytest.approx(1.0, abs=0.03)
    assert counts.sum() / mu.sum() == pytest.approx(1.0, abs=5 / np.sqrt(mu.sum()))


def test_truth_frequencies_are_the_exact_spin_hamiltonian_transitions(tmp_path: Path) -> None:
    """True f_lo, f_hi solve H = D Sz² + γ B·S exactly (numpy's eigensolver), for the true B."""
    # Hamiltonian: Doherty et al., Phys. Rep. 528, 1 (2013), ground state, E = 0.
    record = run(small_config(n_lines=3), tmp_path)
    b = record.maps["field_xyz_t"][0].reshape(-1, 3)
    d = record.map("zfs_hz").ravel()
    u = np.array(
        [
            np.sin(NV_100_THETA_RAD) * np.cos(NV_100_PHI_RAD),
            np.sin(NV_100_THETA_RAD) * np.sin(NV_100_PHI_RAD),
            np.cos(NV_100_THETA_RAD),
        ]
    )
    e_theta = np.array(
        [
            np.cos(NV_100_THETA_RAD) * np.cos(NV_100_PHI_RAD),
            np.cos(NV_100_THETA_RAD) * np.sin(NV_100_PHI_RAD),
            -np.sin(NV_100_THETA_RAD),
        ]
    )
    e_phi = np.cross(u, e_theta)
    s = np.sqrt(0.5)
    sx = s * np.array([[0, 1, 0], [1, 0, 1], [0, 1, 0]], dtype=complex)
    sy = s * np.array([[0, -1j, 0], [1j, 0, -1j], [0, 1j, 0]])
    sz = np.diag([1.0, 0.0, -1.0]).astype(complex)
    for i in range(0, b.shape[0], 7):
        bx, by, bz = b[i] @ e_theta, b[i] @ e_phi, b[i] @ u
        h = d[i] * sz @ sz + GAMMA_HZ_PER_T * (bx * sx + by * sy + bz * sz)
        levels = np.linalg.eigvalsh(h)
        # Fields of a few mT: γB ≪ D, so the lowest level is the m_s = 0-like one and the
        # two lines are the gaps to the other two.
        lo, hi = levels[1] - levels[0], levels[2] - levels[0]
        assert record.map("f_lo_hz").ravel()[i] == pytest.approx(lo, abs=1.0)
        assert record.map("f_hi_hz").ravel()[i] == pytest.approx(hi, abs=1.0)
    np.testing.assert_allclose(record.map("field_nv_t").ravel(), b @ u, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(record.map("field_abs_t").ravel(), np.linalg.norm(b, axis=1))


def test_wire_truth_is_biot_savart_projected_on_the_nv_axis(tmp_path: Path) -> None:
    """Over a wire, the true B_NV equals u·(μ0 I/(2π r²)(d, 0, −x) + bias)."""
    # Biot–Savart for an infinite straight wire, |B| = μ0 I / (2π r) (Jackson, Classical
    # Electrodynamics, 3rd ed., eq. 5.10); for I along +y the field circulates about +y.
    current, d = 0.5e-3, 80e-9
    bias = (1e-3, -0.5e-3, 2e-3)
    tip = TipModel(standoff_m=d, bias_field_t=bias)
    record = run(small_config(scene=wire(current_a=current), tip=tip, n_lines=2), tmp_path)
    x = record.x_m
    r2 = x**2 + d**2
    b = np.stack(
        [MU0 * current / (2 * np.pi) * d / r2, 0 * x, -MU0 * current / (2 * np.pi) * x / r2]
    )
    b = b + np.array(bias)[:, None]
    u = np.array([np.sin(NV_100_THETA_RAD) / np.sqrt(2)] * 2 + [np.cos(NV_100_THETA_RAD)])
    for k in range(2):
        np.testing.assert_allclose(record.map("field_nv_t")[k], u @ b, rtol=1e-9)
        np.testing.assert_allclose(
            record.map("field_abs_t")[k], np.linalg.norm(b, axis=0), rtol=1e-9
        )


def test_default_bias_is_three_millitesla_along_the_nv_axis() -> None:
    """With no bias given, the tip adds 3 mT along its NV axis."""
    tip = TipModel()
    u = np.array([np.sin(NV_100_THETA_RAD) / np.sqrt(2)] * 2 + [np.cos(NV_100_THETA_RAD)])
    np.testing.assert_allclose(np.array(tip.bias_field_t), 3e-3 * u, rtol=1e-12)


def test_backward_rows_hold_the_spectrum_of_the_x_they_state(tmp_path: Path) -> None:
    """A backward file lists pixels as acquired (x decreasing), each row the spectrum at its x."""
    tip = TipModel(count_rate_cps=1e7, contrast=0.3, standoff_m=50e-9, pl_drift_per_hour=0.0)
    freq = frequency_grid_hz(2.55e9, 3.19e9, 129)
    config = small_config(
        scene=wire(current_a=2e-3), tip=tip, freq_hz=freq, n_lines=2, trace_retrace=True
    )
    record = run(config, tmp_path)
    assert [f.direction for f in record.files] == ["forward", "backward"] * 2
    line = read(tmp_path, "test-scan", 1, "backward")
    np.testing.assert_array_equal(line.x_m, record.x_m[::-1])
    step = freq[1] - freq[0]
    seen = freq[np.argmin(line.counts, axis=1)]  # deepest dip of each row
    lines_at = np.stack([record.map(n, "backward")[1] for n in ("f_lo_hz", "f_hi_hz")])
    columns = np.searchsorted(record.x_m, line.x_m)
    near = np.min(np.abs(lines_at[:, columns] - seen), axis=0)
    assert np.all(near <= 1.5 * step)
    mirrored = np.min(np.abs(lines_at[:, columns[::-1]] - seen), axis=0)
    assert np.any(mirrored > 5 * step)  # the check would catch rows in the wrong order


def test_hyperfine_splits_each_line_into_three_dips() -> None:
    """With resolved ¹⁴N hyperfine structure each transition shows three dips 2.16 MHz apart."""
    # ¹⁴N (I = 1) splits each line into three, spacing ≈ 2.14–2.16 MHz (Felton et al.,
    # Phys. Rev. B 79, 075203 (2009), recalled [mem]; PHYSICS.md §1).
    tip = TipModel(fwhm_hz=0.3e6, hyperfine="14N", pl_drift_per_hour=0.0)
    freq = np.linspace(2.70e9, 3.05e9, 70_001)  # 5 kHz steps
    renderer = ScanRenderer(
        wire(current_a=0.0), tip, n_lines=1, n_pixels=1, pixel_m=30e-9, freq_hz=freq
    )
    truth = renderer.truth(0, backward=False)
    spectrum = renderer.expected_counts(truth)[0]
    inner = spectrum[1:-1]
    minima = freq[1:-1][(inner < spectrum[:-2]) & (inner < spectrum[2:])]
    assert minima.size == 6
    for center, trio in zip(
        (truth.f_lo_hz[0], truth.f_hi_hz[0]), (minima[:3], minima[3:]), strict=True
    ):
        np.testing.assert_allclose(trio - center, [-2.16e6, 0.0, 2.16e6], atol=0.02e6)
    # Each of the three carries a third of the 15 % contrast (narrow lines: no overlap).
    assert spectrum.min() / spectrum.max() == pytest.approx(1 - 0.05, abs=0.002)


def test_same_seed_gives_the_same_counts_and_another_seed_does_not(tmp_path: Path) -> None:
    """Runs are reproducible from their seed."""
    a = [read_line_file(p).counts for p in _scan_files(small_config(seed=9), tmp_path / "a")]
    b = [read_line_file(p).counts for p in _scan_files(small_config(seed=9), tmp_path / "b")]
    c = [read_line_file(p).counts for p in _scan_files(small_config(seed=10), tmp_path / "c")]
    for x, y in zip(a, b, strict=True):
        np.testing.assert_array_equal(x, y)
    assert any(not np.array_equal(x, z) for x, z in zip(a, c, strict=True))


def _scan_files(config: DemoConfig, root: Path) -> list[Path]:
    run_scan(config, root / "watch", root / "truth")
    return sorted((root / "watch" / config.scan_id).glob("*.h5"))


def test_pl_drift_runs_on_the_instrument_clock(tmp_path: Path) -> None:
    """The true PL rate is R (1 + drift t/3600) with t counted in pixel sweeps of n_freq·dwell."""
    tip = TipModel(pl_drift_per_hour=0.5, count_rate_cps=1e5)
    record = run(small_config(tip=tip, n_lines=3, trace_retrace=True), tmp_path)
    pixel_s = 51 * tip.dwell_s
    for k in range(3):
        t_fwd = (2 * k * 32 + np.arange(32) + 0.5) * pixel_s
        t_bwd = ((2 * k + 1) * 32 + np.arange(32)[::-1] + 0.5) * pixel_s
        np.testing.assert_allclose(record.map("pl_rate_cps")[k], 1e5 * (1 + 0.5 * t_fwd / 3600))
        np.testing.assert_allclose(
            record.map("pl_rate_cps", "backward")[k], 1e5 * (1 + 0.5 * t_bwd / 3600)
        )


def test_truth_round_trips_through_its_files(tmp_path: Path) -> None:
    """load_truth gives back the maps, faults, files and parameters of the run."""
    faults = (parse_fault("tip_crash@5:3"), parse_fault("corrupt_file@2"))
    record = run(small_config(faults=faults), tmp_path)
    loaded = load_truth(tmp_path / "truth", "test-scan")
    assert loaded.faults == faults
    assert loaded.files == record.files
    assert loaded.params["scene"]["name"] == "labyrinth"
    assert loaded.params["tip"]["standoff_m"] == 60e-9
    for name, values in record.maps.items():
        np.testing.assert_array_equal(loaded.maps[name], values)
    meta = json.loads(truth_paths(tmp_path / "truth", "test-scan")[1].read_text())
    assert [f["spec"] for f in meta["faults"]] == ["tip_crash@5:3", "corrupt_file@2"]
    assert meta["faults"][0]["params"] == {"standoff_step_m": 20e-9, "pl_factor": 0.7}


def test_truth_folder_inside_the_watched_folder_is_refused(tmp_path: Path) -> None:
    """Writing the truth where the daemon watches is refused before anything is written."""
    with pytest.raises(ValueError, match="truth_dir must lie outside the watched folder"):
        run_scan(small_config(), tmp_path, tmp_path / "truth")
    assert not (tmp_path / "test-scan").exists()


def test_on_line_is_called_after_each_line_with_its_files(tmp_path: Path) -> None:
    """The callback sees every line once, after its files exist."""
    seen: list[tuple[int, list[str]]] = []

    def on_line(k: int, paths: tuple[Path, ...]) -> None:
        assert all(p.exists() for p in paths)
        seen.append((k, [p.name for p in paths]))

    run(small_config(n_lines=3, trace_retrace=True), tmp_path, on_line=on_line)
    assert seen == [
        (k, [line_file_name(k, "forward"), line_file_name(k, "backward")]) for k in range(3)
    ]


def test_pace_spaces_the_files_in_time(tmp_path: Path) -> None:
    """At pace p, the writer waits so that line k's file appears at (k + 1) p."""
    fake = FakeTime()
    stamps: list[float] = []
    run(
        small_config(n_lines=4),
        tmp_path,
        pace_s=2.0,
        sleep=fake.sleep,
        clock=fake.clock,
        on_line=lambda k, paths: stamps.append(fake.now),
    )
    assert stamps == pytest.approx([2.0, 4.0, 6.0, 8.0])


# -- faults ------------------------------------------------------------------------------


def test_fluorescence_lost_drops_counts_and_dips_on_the_asked_lines(tmp_path: Path) -> None:
    """Lines 3–4 fall to 5 % of the PL with no dips; the lines around them are normal."""
    config = small_config(faults=(parse_fault("fluorescence_lost@3-4"),))
    record = run(config, tmp_path)
    pl = record.map("pl_rate_cps")
    normal = small_config()
    ref = run(normal, tmp_path / "ref").map("pl_rate_cps")
    np.testing.assert_allclose(pl[3:5], 0.05 * ref[3:5])
    np.testing.assert_array_equal(pl[[0, 1, 2, 5, 6, 7]], ref[[0, 1, 2, 5, 6, 7]])
    assert np.all(record.map("contrast")[3:5] == 0)
    totals = [read(tmp_path, "test-scan", k).counts.sum() for k in range(8)]
    assert totals[3] / totals[2] == pytest.approx(0.05, rel=0.1)
    assert totals[5] / totals[2] == pytest.approx(1.0, rel=0.05)


def test_contrast_collapsed_keeps_pl_and_flattens_spectra(tmp_path: Path) -> None:
    """With the microwave off the PL is unchanged and the summed spectrum is flat."""
    tip = TipModel(count_rate_cps=2e6)
    config = small_config(tip=tip, faults=(parse_fault("contrast_collapsed@2-3"),))
    record = run(config, tmp_path)
    ref = run(small_config(tip=tip), tmp_path / "ref")
    assert np.all(record.map("contrast")[2:4] == 0)
    assert np.all(record.map("contrast")[[0, 1, 4]] == 0.15)
    np.testing.assert_array_equal(record.map("pl_rate_cps"), ref.map("pl_rate_cps"))

    def depth(k: int) -> np.ndarray:
        counts = read(tmp_path, "test-scan", k).counts.astype(float)
        return 1.0 - counts.min(axis=1) / counts.mean(axis=1)

    # ~2000 counts per sample: the lowest of 51 Poisson samples lies ~2.3σ ≈ 5 % below the
    # mean (3.5σ ≈ 8 % at worst), while a 15 % dip sampled every 8.4 MHz is at least 9 % deep.
    assert np.all(depth(2) < 0.1)
    assert np.median(depth(1)) > 0.1
    assert np.median(depth(4)) > 0.1


def test_tip_crash_changes_standoff_and_pl_from_the_asked_pixel_on(tmp_path: Path) -> None:
    """From line 4 pixel 10 on (and for good) the NV sits 20 nm higher and the PL drops 30 %."""
    tip = TipModel(pl_drift_per_hour=0.0)
    config = small_config(tip=tip, faults=(parse_fault("tip_crash@4:10"),), trace_retrace=True)
    record = run(config, tmp_path)
    standoff = record.map("standoff_m")
    crashed = np.zeros((8, 32), dtype=bool)
    crashed[4, 10:] = True
    crashed[5:] = True
    np.testing.assert_allclose(standoff[crashed], 80e-9)
    np.testing.assert_allclose(standoff[~crashed], 60e-9)
    assert np.all(record.map("standoff_m", "backward")[4:] == pytest.approx(80e-9))
    np.testing.assert_allclose(record.map("pl_rate_cps")[crashed], 0.7 * 2e5)
    np.testing.assert_allclose(record.map("pl_rate_cps")[~crashed], 2e5)
    # The true field at crashed pixels is the scene's field at the new stand-off.
    high = render_field_t(config.scene, record.x_m, record.y_m, 80e-9)
    low = render_field_t(config.scene, record.x_m, record.y_m, 60e-9)
    bias = np.array(tip.bias_field_t)
    field = record.maps["field_xyz_t"][0]
    np.testing.assert_allclose(field[crashed], high.transpose(1, 2, 0)[crashed] + bias, rtol=1e-12)
    np.testing.assert_allclose(field[~crashed], low.transpose(1, 2, 0)[~crashed] + bias, rtol=1e-12)
    assert not np.allclose(high, low)
    before = read(tmp_path, "test-scan", 3).counts[10:].sum()
    after = read(tmp_path, "test-scan", 4).counts[10:].sum()
    assert after / before == pytest.approx(0.7, rel=0.05)


def test_sample_touched_shifts_d_in_a_local_patch_then_returns(tmp_path: Path) -> None:
    """A touch shifts D (common mode) by 4 MHz on lines 2–3, pixels 5–10, and nowhere else."""
    config = small_config(faults=(parse_fault("sample_touched@2:5-3"),), trace_retrace=True)
    record = run(config, tmp_path)
    ref = run(small_config(trace_retrace=True), tmp_path / "ref")
    patch = np.zeros((8, 32), dtype=bool)
    patch[2:4, 5:11] = True
    for direction in ("forward", "backward"):
        shift = record.map("zfs_hz", direction) - ref.map("zfs_hz", direction)
        np.testing.assert_allclose(shift[patch], 4e6)
        np.testing.assert_array_equal(shift[~patch], 0.0)
        mid = (record.map("f_lo_hz", direction) + record.map("f_hi_hz", direction)) / 2
        mid_ref = (ref.map("f_lo_hz", direction) + ref.map("f_hi_hz", direction)) / 2
        # A D shift moves both lines together (PHYSICS.md §7, common mode); the transverse
        # field makes it not exactly 4 MHz, but within 1 %.
        np.testing.assert_allclose((mid - mid_ref)[patch], 4e6, rtol=0.01)
        split = record.map("f_hi_hz", direction) - record.map("f_lo_hz", direction)
        split_ref = ref.map("f_hi_hz", direction) - ref.map("f_lo_hz", direction)
        np.testing.assert_allclose(split[patch], split_ref[patch], rtol=1e-3)


def test_acquisition_stall_pauses_before_the_asked_line(tmp_path: Path) -> None:
    """The writer sleeps pause_s before line 3's file, and the truth lists the pause."""
    fake = FakeTime()
    faults = (parse_fault("acquisition_stalled@3,pause_s=42"),)
    record = run(
        small_config(faults=faults, n_lines=5),
        tmp_path,
        sleep=fake.sleep,
        clock=fake.clock,
        on_line=lambda k, paths: fake.events.append(("line", k)),
    )
    assert fake.events == [
        ("line", 0),
        ("line", 1),
        ("line", 2),
        ("sleep", 42.0),
        ("line", 3),
        ("line", 4),
    ]
    assert record.pauses == ((3, 42.0),)


def test_acquisition_stall_in_lines_scales_with_the_pace(tmp_path: Path) -> None:
    """A stall of 5 lines at pace 2 s delays line 2 and every later file by 10 s."""
    fake = FakeTime()
    stamps: list[float] = []
    run(
        small_config(faults=(parse_fault("acquisition_stalled@2,pause_lines=5"),), n_lines=4),
        tmp_path,
        pace_s=2.0,
        sleep=fake.sleep,
        clock=fake.clock,
        on_line=lambda k, paths: stamps.append(fake.now),
    )
    assert stamps == pytest.approx([2.0, 4.0, 16.0, 18.0])


def test_slow_in_place_write_grows_the_file_at_its_final_name(tmp_path: Path) -> None:
    """The file of line 2 appears at its final name and grows in chunks until it is whole."""
    fake = FakeTime()
    target = tmp_path / "watch" / "test-scan" / line_file_name(2, "forward")
    sizes: list[int] = []

    def sleep(seconds: float) -> None:
        fake.sleep(seconds)
        sizes.append(target.stat().st_size)

    faults = (parse_fault("slow_in_place_write@2,duration_s=2,n_chunks=4"),)
    record = run(small_config(faults=faults, n_lines=4), tmp_path, sleep=sleep, clock=fake.clock)
    assert fake.events == [("sleep", 0.5)] * 3
    final = target.stat().st_size
    assert sizes == sorted(sizes)
    assert 0 < sizes[0] < sizes[-1] < final
    assert read(tmp_path, "test-scan", 2).line_index == 2
    assert [f.how for f in record.files] == ["atomic", "atomic", "in_place", "atomic"]


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ("corrupt_file@1", "must be a complete, readable HDF5 file; found an unreadable one"),
        ("corrupt_file@1,mode=1", "must be an HDF5 file"),
        ("corrupt_file@1,keep_fraction=0", "must be a non-empty HDF5 file; found 0 bytes"),
    ],
)
def test_corrupt_file_is_rejected_by_the_reader(tmp_path: Path, spec: str, message: str) -> None:
    """A corrupted line file is refused with LineFileError naming it; the others are fine."""
    record = run(small_config(faults=(parse_fault(spec),), n_lines=3), tmp_path)
    with pytest.raises(LineFileError, match=message) as info:
        read(tmp_path, "test-scan", 1)
    assert str(info.value).startswith("line_00001_fwd.h5: file ")
    read(tmp_path, "test-scan", 0)
    read(tmp_path, "test-scan", 2)
    assert [f.how for f in record.files] == ["atomic", "corrupt", "atomic"]
    # The truth still knows what line 1 was.
    assert np.all(np.isfinite(record.map("field_nv_t")[1]))


def test_fault_mask_follows_acquisition_time() -> None:
    """A time-like fault covers the rest of its forward trace, the whole retrace and later lines."""
    crash = parse_fault("tip_crash@2:5")
    assert not fault_mask(crash, 1, True, 8).any()
    np.testing.assert_array_equal(fault_mask(crash, 2, False, 8), np.arange(8) >= 5)
    assert fault_mask(crash, 2, True, 8).all()
    assert fault_mask(crash, 100, False, 8).all()
    lost = parse_fault("fluorescence_lost@2-3")
    assert fault_mask(lost, 3, True, 8).all()
    assert not fault_mask(lost, 4, False, 8).any()


# -- fault specs -------------------------------------------------------------------------


@settings(max_examples=150, deadline=None)
@given(
    kind=st.sampled_from(sorted(FAULT_KINDS)),
    line=st.integers(0, 10_000),
    pixel=st.integers(0, 4096),
    length=st.none() | st.integers(0, 500),
    data=st.data(),
)
def test_fault_spec_round_trips(
    kind: str, line: int, pixel: int, length: int | None, data: st.DataObject
) -> None:
    """parse_fault(fault_to_spec(f)) gives back f for any valid fault."""
    params: dict[str, float] = {}
    if kind == "tip_crash":
        params["standoff_step_m"] = data.draw(st.floats(0, 1e-6))
        params["pl_factor"] = data.draw(st.floats(0, 1))
    elif kind == "sample_touched":
        params["zfs_shift_hz"] = data.draw(st.floats(-1e8, 1e8))
    elif kind == "acquisition_stalled":
        params["pause_s"] = data.draw(st.floats(0, 1e4))
    fault = Fault(
        kind=kind,
        start_line=line,
        start_pixel=pixel,
        end_line=None if length is None else line + length,
        params=params,
    )
    assert parse_fault(fault_to_spec(fault)) == fault


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ("tip_crash", r"must look like KIND@LINE\[:PIXEL\]\[-END_LINE\]"),
        ("tip_crash@x", r"must look like KIND@LINE"),
        ("meltdown@3", r"fault kind must be one of fluorescence_lost, .*; found 'meltdown'"),
        ("tip_crash@9-3", r"end line must be >= start line 9; found 3"),
        (
            "tip_crash@3,depth=2",
            r"parameters must be among standoff_step_m, pl_factor; found depth",
        ),
        ("tip_crash@3,pl_factor", r"parameter must be KEY=NUMBER; found 'pl_factor'"),
        ("tip_crash@3,pl_factor=1.5", r"pl_factor must be in \[0, 1\]; found 1.5"),
        ("corrupt_file@3,mode=2", r"mode must be 0 \(truncate\) or 1 \(garble\)"),
    ],
)
def test_bad_fault_specs_are_refused_with_the_reason(spec: str, message: str) -> None:
    """A malformed fault spec is refused with a message quoting it and saying what is wrong."""
    with pytest.raises(ValueError, match=message) as info:
        parse_fault(spec)
    assert spec in str(info.value)


def test_config_refuses_faults_outside_the_scan() -> None:
    """A fault that starts past the last line or pixel is refused."""
    with pytest.raises(
        ValueError, match="fault 'tip_crash' must start at a line < 8; found line 8"
    ):
        small_config(faults=(parse_fault("tip_crash@8"),))
    with pytest.raises(ValueError, match="must start at a pixel < 32; found pixel 40"):
        small_config(faults=(parse_fault("tip_crash@2:40"),))


# -- command line ------------------------------------------------------------------------


def test_cli_help_lists_the_options() -> None:
    """`python -m demo_stream --help` exits 0 and documents scene, faults, pace and folders."""
    text = _help_text()
    for option in ("--scene", "--fault", "--pace-s", "--truth", "--trace-retrace", "--bias-mt"):
        assert option in text


def _help_text() -> str:
    """What `python -m demo_stream --help` prints (it must exit 0)."""
    done = subprocess.run(
        [sys.executable, "-m", "demo_stream", "--help"],
        capture_output=True,
        text=True,
        check=False,
        timeout=60,
    )
    assert done.returncode == 0
    return done.stdout


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--scene", "maze"], "argument --scene: invalid choice: 'maze'"),
        (["--fault", "tip_crash@x"], "argument --fault: fault 'tip_crash@x' must look like"),
        (["--lines", "0"], "demo config: n_lines must be an integer >= 1; found 0"),
        (["--contrast", "0.9"], r"tip: contrast must be in \[0, 0.5\]; found 0.9"),
        (["--freq-ghz", "3.0", "2.8", "51"], "start and stop must be finite with 0 < start < stop"),
    ],
)
def test_cli_bad_option_exits_2_with_a_clear_message(
    argv: list[str], message: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A bad option stops the command with exit status 2 and says what was wrong."""
    with pytest.raises(SystemExit) as info:
        main([*argv, "--out", str(tmp_path / "w"), "--truth", str(tmp_path / "t")])
    assert info.value.code == 2
    import re

    assert re.search(message, capsys.readouterr().err)
    assert not (tmp_path / "w").exists()


def test_cli_runs_a_small_scan_and_prints_one_summary_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The command writes the files and truth asked for and prints a one-line summary."""
    code = main(
        [
            "--scene", "calibration_stripe", "--scene-param", "width_m=5e-7",
            "--lines", "4", "--pixels", "16", "--freq-ghz", "2.7", "3.05", "31",
            "--trace-retrace", "--fault", "tip_crash@2:4", "--profile", "stripe-cal",
            "--bias-along-nv-mt", "4", "--seed", "3", "--scan-id", "cli-scan",
            "--out", str(tmp_path / "w"), "--truth", str(tmp_path / "t"),
        ]
    )  # fmt: skip
    assert code == 0
    out = capsys.readouterr().out
    assert out.count("\n") == 1
    assert out.startswith("cli-scan: wrote 8 files (4 lines x 16 pixels x 31 frequencies")
    assert "faults: tip_crash@2:4" in out
    line = read_line_file(tmp_path / "w" / "cli-scan" / "line_00003_bwd.h5")
    assert line.profile == "stripe-cal"
    assert line.n_freq == 31
    truth = load_truth(tmp_path / "t", "cli-scan")
    assert truth.params["scene"]["params"]["width_m"] == 5e-7
    assert truth.params["tip"]["bias_field_t"] == pytest.approx(
        [4e-3 * np.sin(NV_100_THETA_RAD) / np.sqrt(2)] * 2 + [4e-3 * np.cos(NV_100_THETA_RAD)]
    )
    assert calibration_stripe().name == truth.params["scene"]["name"]


def test_the_fault_examples_of_the_help_run_with_the_default_scan_size() -> None:
    """Every example the demo instrument's help gives for --fault is accepted by a scan of
    its default size (an example that fails as printed teaches nothing)."""
    import re

    (line,) = [text for text in _help_text().splitlines() if text.strip().startswith("e.g.")]
    examples = re.findall(r"\S+@\S+", line)
    assert examples
    for example in examples:
        DemoConfig(faults=(parse_fault(example),))  # raises if it does not fit


@pytest.mark.parametrize("name", sorted(PRESETS))
def test_each_signal_preset_writes_the_signal_it_states(name: str, tmp_path: Path) -> None:
    """A scan with each signal preset has its sweep and, off resonance, a mean of
    count_rate × dwell counts per sample (Poisson: within 5 standard errors), and every
    pixel's two resonances (from the truth, about D at the preset's temperature) lie
    inside the sweep over the scene the preset suits."""
    preset = PRESETS[name]
    tip = TipModel(**preset.tip_values())  # type: ignore[arg-type]
    config = DemoConfig(
        n_lines=2,
        n_pixels=16,
        tip=tip,
        freq_hz=preset.freq_hz(),
        seed=5,
        scene=make_scene(preset.scene),
    )
    run_scan(config, tmp_path / "out", tmp_path / "truth")
    line = read_line_file(sorted((tmp_path / "out" / config.scan_id).glob("*.h5"))[0])
    np.testing.assert_array_equal(line.freq_hz, preset.freq_hz())
    b_nv = load_truth(tmp_path / "truth", config.scan_id).map("field_nv_t", "forward")
    shift = GAMMA_NV_HZ_PER_T * np.abs(b_nv[0])  # line 0, pixels in increasing x as written
    resonances = np.concatenate([preset.zfs_hz - shift, preset.zfs_hz + shift])
    gap = np.min(np.abs(line.freq_hz[:, None] - resonances[None, :]), axis=0)
    assert np.all(gap < 1e6), gap.max()  # every resonance has a sweep point within 1 MHz
    away = np.abs(line.freq_hz[None, :, None] - resonances.reshape(2, -1).T[:, None, :])
    off = np.all(away > 5 * preset.fwhm_hz, axis=2)  # (pixel, frequency) far from both dips
    samples = line.counts[off].astype(float)
    expected = preset.count_rate_cps * preset.dwell_s
    assert abs(samples.mean() - expected) < 5 * np.sqrt(expected / samples.size) + 0.05 * expected


def test_the_signal_option_sets_the_preset_and_single_options_override_it() -> None:
    """`--signal weak-wide` gives its 161-point sweep and 9 % dips; `--dwell-ms` still
    overrides the preset's dwell."""
    args = build_parser().parse_args(["--signal", "weak-wide", "--dwell-ms", "7"])
    config = config_from_args(args)
    assert config.freq_hz.size == 161
    assert config.tip.contrast == 0.09
    assert config.tip.dwell_s == pytest.approx(7e-3)


def test_the_instruments_help_states_each_default_once() -> None:
    """`python -m demo_stream --help` gives each option's default once: not a second
    "(default: …)" after a help text that states its own, and none for an option that
    has no default (argparse's ArgumentDefaultsHelpFormatter, which it builds on, would)."""
    import contextlib
    import io

    from demo_stream.__main__ import build_parser

    out = io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.suppress(SystemExit):
        build_parser().parse_args(["--help"])
    text = " ".join(out.getvalue().split())
    assert "(default: None)" not in text
    assert "sweep suits) (default" not in text  # --scene states its own default
    assert "lines (slow axis) (default: 64)" in text
