"""Tests of ``strayline demo`` (strayline.demo): the demo instrument and the daemon together."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import demo_stream as ds
from strayline.alerts import read_alert_log
from strayline.cli import main
from strayline.config import config_from_mapping
from strayline.demo import _accounted, default_fault, demo_config, truth_agreement
from strayline.pipeline import LinePipeline


def _run_demo(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    """`strayline demo` in a child process (it configures logging and signal handlers)."""
    env = {k: v for k, v in os.environ.items() if k != "NOTIFY_SOCKET"}
    return subprocess.run(
        [sys.executable, "-m", "strayline", "demo", *args],
        cwd=cwd,
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


def _value(out: str, label: str) -> str:
    """The text after a summary label such as ``store``."""
    for line in out.splitlines():
        if line.startswith(f"{label} ") and line[len(label) :].startswith(" "):
            return line[len(label) :].strip()
    raise AssertionError(f"no {label!r} line in:\n{out}")


@pytest.mark.slow
def test_a_small_demo_prints_where_everything_is_and_alerts_on_its_fault(
    tmp_path: Path,
) -> None:
    """A small demo (8 lines x 32 px, no pacing) exits 0, calibrates its tip first (the
    stand-off within 3σ of the demo tip's 60 nm), prints the live picture, store, log and
    alert log locations inside its folder and a summary with the sheet moment from that
    calibration (the live picture drawn by then), and the injected tip crash raises a
    critical alert at or after the crash line."""
    folder = tmp_path / "demo"
    result = _run_demo(
        "--lines", "8", "--pixels", "32", "--pace", "0", "--folder", str(folder), cwd=tmp_path
    )
    assert result.returncode == 0, result.stderr[-3000:]
    out = result.stdout
    assert out.splitlines()[0] == (
        f"strayline demo: 8 lines x 32 pixels, fault tip_crash@5:16, in {folder}"
    )
    calibration = _value(out, "calibration")
    assert calibration.startswith("demo-tip/")
    d_nm, sigma_nm = (float(v) for v in calibration.split("d = ")[1].split(" nm")[0].split(" ± "))
    assert abs(d_nm - 60.0) < 3 * sigma_nm
    assert "truth d = 60.00 nm" in out
    assert "(calibration demo-tip/" in _value(out, "sheet moment")
    live = Path(_value(out, "live picture").split(" (redrawn every 8 lines")[0])
    assert live == folder / "output" / "demo-labyrinth.products" / "live_forward.png"
    assert live.is_file()
    store = Path(_value(out, "store"))
    log = Path(_value(out, "log"))
    alert_log = Path(_value(out, "alert log"))
    assert store == folder / "output" / "demo-labyrinth.zarr"
    assert store.is_dir()
    assert log.is_file()
    assert alert_log.is_file()
    assert _value(out, "lines") == "8 written"
    agreement = float(_value(out, "vs truth").split("%")[0]) / 100
    assert agreement > 0.9  # the crash lines move off the truth; the rest lie within 3σ
    raised = [e for e in read_alert_log(alert_log) if e.state == "raised"]
    assert any(e.severity == "critical" and (e.line_index or 0) >= 5 for e in raised)
    assert _value(out, "alerts") == f"{len(raised)} raised"


@pytest.mark.slow
def test_a_folder_holding_a_demo_run_is_refused(tmp_path: Path) -> None:
    """A second demo in a folder that already holds a demo store exits 2 and changes
    nothing."""
    store = tmp_path / "output" / "demo-labyrinth.zarr"
    store.mkdir(parents=True)
    result = _run_demo("--lines", "2", "--pixels", "8", "--folder", str(tmp_path), cwd=tmp_path)
    assert result.returncode == 2
    assert "already holds a demo run" in result.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["output"]


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--fault", "meteor@3"], "argument --fault: fault 'meteor@3'"),
        (["--fault", "tip_crash"], "must look like KIND@LINE"),
        (["--lines", "0"], "argument --lines: must be at least 1; found 0"),
        (["--pixels", "many"], "argument --pixels: must be a whole number; found 'many'"),
        (["--pace", "-1"], "argument --pace: must be a finite number >= 0; found -1"),
    ],
)
def test_bad_demo_arguments_are_usage_errors(
    args: list[str], message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    """A fault the demo instrument cannot parse, or a scan size below 1, exits 2 naming
    the argument before anything runs."""
    with pytest.raises(SystemExit) as stop:
        main(["demo", *args])
    assert stop.value.code == 2
    assert message in capsys.readouterr().err


def test_default_fault_is_a_tip_crash_two_thirds_in() -> None:
    """The default fault parses and sits two thirds down the scan at the middle pixel."""
    fault = ds.parse_fault(default_fault(48, 128))
    assert (fault.kind, fault.start_line, fault.start_pixel) == ("tip_crash", 32, 64)


def test_demo_config_keeps_everything_inside_the_folder(tmp_path: Path) -> None:
    """The demo's daemon watches <folder>/incoming and writes below <folder>/output."""
    config = demo_config(tmp_path)
    assert config.paths.watch_root == tmp_path / "incoming"
    assert config.paths.output_root == tmp_path / "output"
    assert config.paths.alert_log.is_relative_to(tmp_path / "output")
    assert config.logging.json_file is not None
    assert config.logging.json_file.is_relative_to(tmp_path / "output")


def test_truth_agreement_counts_pixels_within_k_sigma() -> None:
    """truth_agreement is the fraction of finite pixels with |B − truth| ≤ kσ."""
    field_t = np.array([[1.0, 2.0, 3.0, np.nan]])
    sigma_t = np.array([[0.1, 0.1, 0.1, 0.1]])
    truth_t = np.array([[1.2, 2.5, 3.0, 0.0]])
    assert truth_agreement(field_t, sigma_t, truth_t) == pytest.approx(2 / 3)
    assert truth_agreement(field_t, sigma_t, truth_t, k=1.0) == pytest.approx(1 / 3)
    assert np.isnan(truth_agreement(field_t * np.nan, sigma_t, truth_t))


@pytest.mark.slow
def test_a_quarantined_line_counts_as_accounted_for(tmp_path: Path) -> None:
    """The demo stops once every line is committed or quarantined, so a corrupt-file fault
    does not hold it until the time limit."""
    ds.run_scan(
        ds.DemoConfig(
            scene=ds.labyrinth(), n_lines=4, n_pixels=8, seed=3, scan_id="demo-labyrinth"
        ),
        tmp_path / "incoming",
        tmp_path / "truth",
    )
    folder = tmp_path / "incoming" / "demo-labyrinth"
    (folder / "line_00002_fwd.h5").write_bytes(b"corrupt")
    config = config_from_mapping(
        {
            "paths": {"watch_root": "incoming", "output_root": "output"},
            "logging": {"console": "off"},
            "alerts": {"console": False},
        },
        base_dir=tmp_path,
    )
    pipeline = LinePipeline(config)
    try:
        files = sorted(folder.glob("line_*.h5"))
        for path in files[:2]:
            pipeline.process(path)
        assert not _accounted(pipeline, 4)
        for path in files[2:]:
            pipeline.process(path)
        assert _accounted(pipeline, 4)
    finally:
        pipeline.close()


def test_a_fault_beyond_the_scan_is_a_usage_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`demo --lines 30 --fault tip_crash@40` exits 2 saying the fault must start before
    line 30, without a traceback and before anything is written."""
    folder = tmp_path / "demo"
    code = main(["demo", "--lines", "30", "--fault", "tip_crash@40", "--folder", str(folder)])
    assert code == 2
    err = capsys.readouterr().err
    assert err == (
        "strayline demo: demo config: fault 'tip_crash' must start at a line < 30; found line 40\n"
    )
    assert not folder.exists()
