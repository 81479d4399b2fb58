"""The example reader plug-in (examples/tally-reader) installs with pip into a fresh
virtual environment, offline, and strayline picks it up there without a change to its own
code: ``check-config`` lists it, its own tests pass, and a scan written in its format is
processed."""

from __future__ import annotations

import importlib.util
import shutil
import subprocess
import sys
import sysconfig
from importlib.metadata import version
from pathlib import Path

import pytest
import yaml

import demo_stream as ds

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "tally-reader"
SCAN = "tally-1"


def _can_build_offline() -> bool:
    """setuptools builds a wheel without network from 70.1 on (or with ``wheel`` present);
    the ``test`` extra installs such a setuptools."""
    major, minor = (int(part) for part in version("setuptools").split(".")[:2])
    return (major, minor) >= (70, 1) or importlib.util.find_spec("wheel") is not None


def _run(*args: str | Path, cwd: Path | None = None) -> str:
    done = subprocess.run(
        [str(a) for a in args], cwd=cwd, capture_output=True, text=True, timeout=300, check=False
    )
    assert done.returncode == 0, f"{args}: {done.stdout}\n{done.stderr}"
    return done.stdout


@pytest.mark.slow
@pytest.mark.skipif(
    not _can_build_offline(), reason="needs setuptools>=70.1 (the test extra) to build offline"
)
def test_the_example_plugin_installs_and_is_picked_up(tmp_path: Path) -> None:
    """A fresh venv that sees this environment's packages (strayline among them) gets the
    example with ``pip install --no-deps --no-index --no-build-isolation -e``; there
    check-config lists the tally reader, the example's tests pass, and ``strayline
    process`` writes a scan of tally files."""
    venv = tmp_path / "venv"
    _run(sys.executable, "-m", "venv", "--without-pip", venv)
    python = venv / "bin" / "python"
    site = Path(
        _run(python, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])").strip()
    )
    parent = sysconfig.get_paths()["purelib"]  # this environment's packages, strayline's too
    (site / "_parent_environment.pth").write_text(f"import site; site.addsitedir({parent!r})\n")
    source = shutil.copytree(EXAMPLE, tmp_path / "tally-reader")  # the build writes beside it
    _run(
        sys.executable, "-m", "pip", "--python", python, "install", "--quiet", "--no-deps",
        "--no-index", "--no-build-isolation", "-e", source,
    )  # fmt: skip

    folder = tmp_path / "lab"
    demo = ds.DemoConfig(n_lines=4, n_pixels=6, scan_id=SCAN, seed=1)
    ds.run_scan(demo, folder / "v1", folder / "truth", sleep=lambda _s: None)
    convert = (
        "import sys; from pathlib import Path; from strayline.lines import read_line_file\n"
        "from strayline_tally import write_tally\n"
        "out = Path(sys.argv[2]); out.mkdir(parents=True)\n"
        "for p in sorted(Path(sys.argv[1]).glob('*.h5')):\n"
        "    write_tally(read_line_file(p), out / (p.stem + '.tally'))\n"
    )
    _run(python, "-c", convert, folder / "v1" / SCAN, folder / "incoming" / SCAN)
    config = folder / "strayline.yaml"
    config.write_text(
        yaml.safe_dump(
            {
                "paths": {"watch_root": "incoming", "output_root": "output"},
                "readers": {"rules": [{"folder_glob": "tally-*", "reader": "tally"}]},
                "alerts": {"console": False},
                "logging": {"console": "off"},
            }
        )
    )
    listing = _run(python, "-m", "strayline", "check-config", config)
    assert "tally" in listing
    assert "*.tally  one 'tally' text file per line (the example plug-in) " in listing
    assert "[strayline-tally-reader 0.1.0]" in listing
    assert "scan folders matching 'tally-*': tally reads *.tally" in listing

    _run(python, "-m", "pytest", "-q", "-p", "no:cacheprovider", source / "tests", cwd=source)

    summary = _run(python, "-m", "strayline", "process", "incoming", "--config", config, cwd=folder)
    assert summary.startswith("4 files: 4 written, 0 already done, 0 quarantined"), summary
    assert (folder / "output" / f"{SCAN}.zarr" / "zarr.json").exists()
