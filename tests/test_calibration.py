"""Tests of strayline.products.calibration and its use: tip calibrations fitted on a scan
store, kept as records, found again, and taken by the products; ``strayline calibrate``."""

from __future__ import annotations

import json
import math
import shutil
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import zarr

from strayline.cli import main
from strayline.config import config_from_mapping
from strayline.errors import CalibrationError, ConfigError
from strayline.physics.structure_field import StraightStructure, structure_field_nv_t
from strayline.products import (
    REPORT_JSON,
    REPORT_MD,
    VECTOR_ZARR,
    CalibrationUse,
    calibrate_store,
    find_calibration,
    keep_calibration,
    make_products,
    read_calibration,
    remake_products,
    use_calibration,
)
from tests._stores import write_map_store

THETA = math.acos(1 / math.sqrt(3))  # (100) tip, PHYSICS.md §6
PHI = math.pi / 4
PITCH_M = 30e-9
X = (np.arange(64) - 31.5) * PITCH_M
Y = (np.arange(24) - 11.5) * PITCH_M
EDGE = StraightStructure("film-edge", 55e-9, 1.1e-3, 30e-9, 1.2)
TIP = "tip-A7"
WHEN = datetime(2031, 5, 4, 12, 0, 0, tzinfo=UTC)


def _edge_map(seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    gx, gy = np.meshgrid(X, Y)
    rng = np.random.default_rng(seed)
    sigma = np.full(gx.shape, 20e-6)
    b = structure_field_nv_t(EDGE, gx, gy, THETA, PHI) + 2e-3 + rng.normal(size=gx.shape) * sigma
    b[5, 7] = np.nan  # a failed pixel
    return b, sigma


def _config_json(root: Path, **products: Any) -> dict[str, Any]:
    return {"paths": {"state_dir": str(root / "state")}, "products": products}


def _copy(template: Path, tmp_path: Path, tip: str = TIP, **products: Any) -> Path:
    """A copy of a template store in tmp_path/out, taken by ``tip``, whose recorded daemon
    had its state in tmp_path/state and asked for ``products`` (writing stores is the slow
    part)."""
    copy = tmp_path / "out" / template.name
    shutil.copytree(template, copy)
    attrs = zarr.open_group(copy, mode="r+").attrs
    attrs["config"] = _config_json(tmp_path, **products)
    attrs["tip_id"] = tip
    return copy


@pytest.fixture(scope="module")
def templates(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """The calibration scan of EDGE and a sample scan (a sharp stripe) by tip TIP."""
    root = tmp_path_factory.mktemp("templates")
    b, sigma = _edge_map()
    stripe = StraightStructure("stripe", 55e-9, 0.4e-3, 0.0, math.pi / 2, width_m=600e-9)
    gx, gy = np.meshgrid(X, Y)
    rng = np.random.default_rng(3)
    sample = structure_field_nv_t(stripe, gx, gy, THETA, PHI) + rng.normal(size=gx.shape) * sigma
    args = {"x_m": X, "y_m": Y, "nv_axis_rad": (THETA, PHI)}
    return {
        "edge": write_map_store(root / "a", "cal-01", b, sigma, tip_id=TIP, **args),
        "sample": write_map_store(root / "b", "sample-01", sample, sigma, tip_id=TIP, **args),
    }


@pytest.fixture
def edge_store(templates: dict[str, Path], tmp_path: Path) -> Path:
    """The calibration scan, written by a daemon with its state in tmp_path/state."""
    return _copy(templates["edge"], tmp_path)


def test_calibration_recovers_the_edge_and_is_kept_under_the_tip(
    edge_store: Path, tmp_path: Path
) -> None:
    """calibrate_store fits d and M_s t within 3σ, keyed by the store's tip_id, and
    keep_calibration writes <state>/calibrations/<tip>/<UTC time>.json with its figure."""
    made = calibrate_store(edge_store, model="film-edge", clock=lambda: WHEN)
    record, figure = keep_calibration(made)
    assert record.name == TIP
    assert record.record_id == "20310504T120000Z"
    assert record.path == tmp_path / "state" / "calibrations" / TIP / "20310504T120000Z.json"
    assert figure is not None
    assert figure.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert abs(record.standoff_m - 55e-9) < 3 * record.standoff_sigma_m
    strength = record.values["sheet_moment_a"]
    assert abs(strength - 1.1e-3) < 3 * record.sigmas["sheet_moment_a"]
    assert record.fit["n_pixels"] == X.size * Y.size - 1
    data = json.loads(record.path.read_text(encoding="utf-8"))
    assert data["format"] == "strayline-calibration"
    assert data["format_version"] == 1
    assert data["units"]["standoff_m"] == "m"
    assert data["source_store"] == str(edge_store)
    assert datetime.fromisoformat(data["made_time"]) == WHEN
    assert set(data["fitted"]) == {
        "standoff_m",
        "sheet_moment_a",
        "position_m",
        "angle_rad",
        "offset_t",
    }
    assert "thin film" in data["caution"]
    assert read_calibration(record.path) == record


def test_records_are_found_by_latest_name_and_id(edge_store: Path, tmp_path: Path) -> None:
    """Two calibrations made in one second get distinct ids (-2); ``latest`` of the tip
    and the bare name give the newest, NAME/RECORD and a file path give that one."""
    state = tmp_path / "state"
    first, _ = keep_calibration(
        calibrate_store(edge_store, model="film-edge", clock=lambda: WHEN), figure=False
    )
    second, _ = keep_calibration(
        calibrate_store(edge_store, model="film-edge", clock=lambda: WHEN), figure=False
    )
    assert second.record_id == "20310504T120000Z-2"
    assert find_calibration(state, "latest", TIP) == second
    assert find_calibration(state, TIP) == second
    assert find_calibration(state, f"{TIP}/20310504T120000Z") == first
    assert find_calibration(state, str(first.path)) == first


@pytest.mark.parametrize(
    ("setting", "tip", "message"),
    [
        ("latest", None, "calibration 'latest' needs the scan's tip, and the scan names none"),
        ("tip-B", None, "calibration 'tip-B': no record of 'tip-B' in"),
        ("tip-B/20310504T120000Z", None, "calibration 'tip-B/20310504T120000Z': no record"),
        ("latest", "tip-C", "calibration 'latest': no record of 'tip-C'"),
        ("../elsewhere", None, r"calibration '../elsewhere': expected latest, NAME or NAME/"),
    ],
)
def test_missing_calibrations_are_named_errors(
    tmp_path: Path, setting: str, tip: str | None, message: str
) -> None:
    """A calibration that is not there raises CalibrationError saying where it looked;
    use_calibration turns it into a reason."""
    with pytest.raises(CalibrationError, match=message):
        find_calibration(tmp_path, setting, tip)
    use = use_calibration(tmp_path, setting, tip)
    assert use.record is None
    assert use.problem is not None
    assert message.split(":", maxsplit=1)[0] in use.problem


def test_a_damaged_record_is_a_named_error(tmp_path: Path) -> None:
    """A record that is not JSON, of another format or incomplete raises CalibrationError
    naming the file."""
    folder = tmp_path / "calibrations" / "t"
    folder.mkdir(parents=True)
    bad = folder / "20310504T120000Z.json"
    for text, message in (
        ("{not json", "cannot read the calibration"),
        ('{"format": "other"}', "format must be 'strayline-calibration'"),
        ('{"format": "strayline-calibration", "format_version": 1}', "not a complete"),
    ):
        bad.write_text(text, encoding="utf-8")
        with pytest.raises(CalibrationError, match=message):
            find_calibration(tmp_path, "t")


def test_a_scan_without_tip_needs_a_name(edge_store: Path) -> None:
    """A store that names no tip cannot be calibrated without --name."""
    store = edge_store
    del zarr.open_group(store, mode="r+").attrs["tip_id"]
    with pytest.raises(CalibrationError, match="the scan names no tip"):
        calibrate_store(store, model="film-edge")
    assert calibrate_store(store, model="film-edge", name="bench-tip").record.name == "bench-tip"


def test_products_take_the_standoff_and_its_sigma_from_the_calibration(
    edge_store: Path, templates: dict[str, Path], tmp_path: Path
) -> None:
    """With products.calibration: latest, the remade products use the tip's newest
    calibration: its d and σ_d in the report and zarr, the σ_d carried into m_z's σ map,
    the round trip reported, and the report naming the calibration."""
    record, _ = keep_calibration(calibrate_store(edge_store, model="film-edge"), figure=False)
    sample = _copy(templates["sample"], tmp_path, calibration="latest")
    out = tmp_path / "products"
    remake_products(sample, out_dir=out, images=False)
    report = json.loads((out / REPORT_JSON).read_text(encoding="utf-8"))
    assert report["standoff_m"] == pytest.approx(record.standoff_m)
    assert report["standoff_sigma_m"] == pytest.approx(record.standoff_sigma_m)
    assert report["calibration"]["used"] == record.label
    assert report["calibration"]["setting"] == "latest"
    vector = report["traces"]["forward"]["vector"]
    assert vector["m_z_sigma_a"]["median"] > 0
    assert vector["m_z_sigma_standoff_a_median"] > 0
    assert vector["round_trip"]["residual_rms_t"] > 0
    group = zarr.open_group(out / VECTOR_ZARR, mode="r")
    assert group.attrs["calibration"] == record.label
    forward = group["forward"]
    for name, unit in (
        ("m_z_a", "A"),
        ("m_z_sigma_a", "A"),
        ("m_z_sigma_standoff_a", "A"),
        ("residual_nv_t", "T"),
    ):
        assert forward[name].attrs["units"] == unit
    sigma = np.asarray(forward["m_z_sigma_a"][:])
    part = np.asarray(forward["m_z_sigma_standoff_a"][:])
    assert np.all(sigma >= part)
    markdown = (out / REPORT_MD).read_text(encoding="utf-8")
    assert f"tip calibration {record.label}" in markdown
    assert "round trip to B_NV" in markdown


def test_a_fitted_nv_axis_is_taken_from_the_calibration(
    edge_store: Path, templates: dict[str, Path], tmp_path: Path
) -> None:
    """A calibration that fitted φ gives the products its NV axis, not the store's."""
    made = calibrate_store(edge_store, model="film-edge", fit_phi=True, strength_a=1.1e-3)
    record, _ = keep_calibration(made, figure=False)
    assert record.nv_axis_fitted
    sample = _copy(templates["sample"], tmp_path)
    out = tmp_path / "products"
    make_products(
        sample,
        standoff_m=None,
        nv_theta_rad=THETA,
        nv_phi_rad=0.0,
        out_dir=out,
        images=False,
        calibration=CalibrationUse(record.label, record),
    )
    report = json.loads((out / REPORT_JSON).read_text(encoding="utf-8"))
    assert report["nv_axis"]["phi_rad"] == pytest.approx(record.values["nv_phi_rad"])
    assert report["calibration"]["nv_axis_from_calibration"] is True


def test_a_missing_recorded_calibration_skips_the_sheet_moment_saying_why(
    templates: dict[str, Path], tmp_path: Path
) -> None:
    """products.calibration naming a tip with no record: the products are made, the sheet
    moment is skipped with the reason, and the report says the calibration was not used."""
    sample = _copy(templates["sample"], tmp_path, tip="tip-B", calibration="latest")
    report = remake_products(sample, out_dir=tmp_path / "p", images=False)
    reasons = {s.product: s.reason for s in report.skipped}
    assert reasons["sheet moment (forward trace)"].startswith(
        "no tip calibration: calibration 'latest': no record of 'tip-B'"
    )
    data = json.loads((tmp_path / "p" / REPORT_JSON).read_text(encoding="utf-8"))
    assert data["calibration"]["used"] is None
    assert "not used" in (tmp_path / "p" / REPORT_MD).read_text(encoding="utf-8")


def test_an_asked_for_calibration_must_exist_and_excludes_a_standoff(
    templates: dict[str, Path], tmp_path: Path
) -> None:
    """A calibration given to remake_products must be found; giving a standoff too, or
    both to make_products, is a ValueError."""
    sample = _copy(templates["sample"], tmp_path)
    with pytest.raises(CalibrationError, match="no record of 'nobody'"):
        remake_products(sample, calibration="nobody")
    with pytest.raises(ValueError, match="give a standoff or a calibration, not both"):
        remake_products(sample, calibration="nobody", standoff_m=5e-8)
    with pytest.raises(ValueError, match="give standoff_m or calibration, not both"):
        make_products(
            sample,
            standoff_m=5e-8,
            nv_theta_rad=THETA,
            nv_phi_rad=PHI,
            out_dir=tmp_path / "p",
            calibration=CalibrationUse("x", None, "none"),
        )


def test_products_calibration_setting_is_validated(tmp_path: Path) -> None:
    """products.calibration takes latest, NAME or NAME/RECORD, and not with standoff_nm."""
    base = {"paths": {"watch_root": "in", "output_root": "out"}}
    config = config_from_mapping(
        base | {"products": {"calibration": "tip-A7/x1"}}, base_dir=tmp_path
    )
    assert config.products.calibration == "tip-A7/x1"
    with pytest.raises(
        ConfigError, match=r"products\.calibration: expected 'latest', a calibration"
    ):
        config_from_mapping(base | {"products": {"calibration": "a/b/c"}}, base_dir=tmp_path)
    with pytest.raises(ConfigError, match=r"products\.calibration: takes the stand-off from a tip"):
        config_from_mapping(
            base | {"products": {"calibration": "latest", "standoff_nm": 60}}, base_dir=tmp_path
        )


def test_cli_calibrate_writes_the_record_and_products_use_it(
    edge_store: Path,
    templates: dict[str, Path],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """`strayline calibrate STORE --model film-edge` prints d ± σ and where the record and
    figure are; `strayline products --calibration NAME` then uses it."""
    assert main(["calibrate", str(edge_store), "--model", "film-edge"]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"{TIP}/")
    assert "film-edge, d = 5" in out
    record_path = Path(out.split("record ")[1].split()[0])
    assert record_path.is_file()
    assert record_path.with_suffix(".png").is_file()
    sample = _copy(templates["sample"], tmp_path)
    assert main(["products", str(sample), "--calibration", TIP, "--no-images"]) == 0
    report = json.loads(
        (tmp_path / "out" / "sample-01.products" / REPORT_JSON).read_text(encoding="utf-8")
    )
    assert report["calibration"]["path"] == str(record_path)


def test_cli_calibrate_json_and_errors(
    edge_store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--json prints the record as written; three free amplitudes or a missing store exit
    1 with the reason."""
    state = tmp_path / "elsewhere"
    assert (
        main(["calibrate", str(edge_store), "--model", "wire", "--json", "--state-dir", str(state)])
        == 0
    )
    data = json.loads(capsys.readouterr().out)
    assert data["model"] == "wire"
    assert (state / "calibrations" / TIP / f"{data['record_id']}.json").is_file()
    assert (
        main(["calibrate", str(edge_store), "--model", "stripe", "--fit-theta", "--fit-phi"]) == 1
    )
    assert "determines two of its strength and the NV angles" in capsys.readouterr().err
    assert main(["calibrate", str(tmp_path / "none.zarr"), "--model", "wire"]) == 1
    assert "none.zarr" in capsys.readouterr().err
