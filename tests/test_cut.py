"""Tests of line cuts (strayline.products.cut, strayline.products._cuts): the pixels a cut
takes, the automatic cut across a wall, the fitted product and ``strayline cut``."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from strayline.cli import main
from strayline.physics.structure_field import StraightStructure, structure_field_nv_t
from strayline.products import cut_store
from strayline.products._cuts import cut_across_strongest_wall, sample_cut
from strayline.products._maps import assemble_trace
from tests._stores import write_map_store

THETA = math.acos(1 / math.sqrt(3))  # (100) tip, PHYSICS.md §6
PHI = math.pi / 4
PITCH_M = 30e-9
X = (np.arange(64) - 31.5) * PITCH_M
Y = (np.arange(32) - 15.5) * PITCH_M
D_M = 55e-9
MS_A = 0.45e-3
WALL_ANGLE = 1.3  # the wall runs along (cos, sin) of this; up on its left


def _wall_map(seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """A sharp up/down wall of M_s t = MS_A (a line current 2 M_s t, PHYSICS.md §5)
    through (60 nm, 0), with 20 µT noise and a 2 mT bias."""
    wall = StraightStructure("wire", D_M, 2 * MS_A, 60e-9 * math.sin(WALL_ANGLE), WALL_ANGLE)
    gx, gy = np.meshgrid(X, Y)
    rng = np.random.default_rng(seed)
    sigma = np.full(gx.shape, 20e-6)
    b = structure_field_nv_t(wall, gx, gy, THETA, PHI) + 2e-3 + rng.normal(size=gx.shape) * sigma
    return b, sigma


@pytest.fixture(scope="module")
def wall_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("cut")
    b, sigma = _wall_map()
    return write_map_store(
        root / "out", "wall-01", b, sigma, x_m=X, y_m=Y, nv_axis_rad=(THETA, PHI), tip_id="t1"
    )


def _trace(b: np.ndarray, sigma: np.ndarray):  # type: ignore[no-untyped-def]
    trace = assemble_trace(
        "forward",
        X,
        Y,
        np.arange(Y.size),
        {"field_nv_t": b, "field_nv_sigma_t": sigma},
    )
    assert trace is not None
    return trace


def test_a_cut_takes_each_pixel_of_its_band_once_in_order() -> None:
    """Along a row, a 1-pixel band is that row, in order of x; a 3-pixel diagonal band
    takes each pixel once, sorted by its distance along the cut, all within the band."""
    b, sigma = _wall_map()
    trace = _trace(b, sigma)
    row = sample_cut(trace, (X[0], Y[10]), (X[-1], Y[10]))
    np.testing.assert_allclose(row.s_m, X - X[0])
    np.testing.assert_allclose(row.b_nv_t, b[10])
    diagonal = sample_cut(trace, (X[0], Y[0]), (X[30], Y[30]), width_px=3)
    pairs = set(zip(diagonal.x_m.round(12), diagonal.y_m.round(12), strict=True))
    assert len(pairs) == diagonal.s_m.size
    assert np.all(np.diff(diagonal.s_m) >= 0)
    across = np.abs(-(diagonal.x_m - X[0]) + (diagonal.y_m - Y[0])) / math.sqrt(2)
    assert across.max() <= 1.5 * PITCH_M + 1e-15


def test_bad_cuts_are_refused() -> None:
    """Coinciding ends, a band of width 0, or a cut through no measured pixel raise
    ValueError saying so."""
    b, sigma = _wall_map()
    trace = _trace(b, sigma)
    with pytest.raises(ValueError, match="a cut needs two different ends"):
        sample_cut(trace, (0.0, 0.0), (0.0, 0.0))
    with pytest.raises(ValueError, match="width_px must be a whole number ≥ 1; found 0"):
        sample_cut(trace, (0.0, 0.0), (1e-7, 0.0), width_px=0)
    with pytest.raises(ValueError, match="no measured pixel lies on the cut"):
        sample_cut(trace, (5e-6, 5e-6), (6e-6, 5e-6))


def test_the_automatic_cut_crosses_the_wall_at_right_angles() -> None:
    """The strongest gradient lies on the wall; the cut runs across it (along its normal
    (sin α, −cos α), either way) and stays in the map."""
    trace = _trace(*_wall_map())
    start, end = cut_across_strongest_wall(trace, 300e-9)
    direction = np.subtract(end, start)
    direction /= np.linalg.norm(direction)
    normal = (math.sin(WALL_ANGLE), -math.cos(WALL_ANGLE))
    assert abs(abs(direction @ normal) - 1.0) < 0.05
    for x, y in (start, end):
        assert X[0] - 1e-12 <= x <= X[-1] + 1e-12
        assert Y[0] - 1e-12 <= y <= Y[-1] + 1e-12


def test_cut_product_fits_the_wall_and_writes_json_and_figure(wall_store: Path) -> None:
    """An automatic cut with a 3-pixel band at the known d finds M_s t within 3σ, a wall
    width bounded from above (the wall is sharp), and writes cut_auto.json and .png in
    the scan's products folder."""
    made = cut_store(wall_store, standoff_m=D_M, width_px=3)
    assert made.json_path == wall_store.parent / "wall-01.products" / "cut_auto.json"
    assert made.png_path is not None
    assert made.png_path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    fit = made.fit
    assert abs(fit.values["sheet_moment_a"] - MS_A) < 3 * fit.sigmas["sheet_moment_a"]
    assert not fit.width_resolved
    assert fit.width_upper_m is not None
    data = json.loads(made.json_path.read_text(encoding="utf-8"))
    assert data["format"] == "strayline-cut"
    assert data["standoff_source"] == "given"
    assert data["width"]["resolved"] is False
    assert data["cut"]["pixels"] == made.samples.s_m.size
    assert "Bloch" in data["caution"]


def test_cli_cut_between_two_points(
    wall_store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`strayline cut STORE --from-nm --to-nm --standoff-nm` fits along the given line and
    prints the wall's place and M_s t; half an end pair or no standoff anywhere fail."""
    nx, ny = math.sin(WALL_ANGLE), -math.cos(WALL_ANGLE)
    start = f"{60 - 400 * nx:.1f},{-400 * ny:.1f}"
    end = f"{60 + 400 * nx:.1f},{400 * ny:.1f}"
    args = ["cut", str(wall_store), f"--from-nm={start}", f"--to-nm={end}"]
    out_dir = tmp_path / "cuts"
    assert main([*args, "--standoff-nm", "55", "--name", "across", "--out", str(out_dir)]) == 0
    printed = capsys.readouterr().out
    assert printed.startswith("across: wall at s = ")
    data = json.loads((out_dir / "cut_across.json").read_text(encoding="utf-8"))
    # The wall passes through (60, 0) nm, 400 nm from the start along the cut.
    assert abs(data["values"]["position_m"] - 400e-9) < 3 * data["sigmas"]["position_m"]
    assert main(["cut", str(wall_store), f"--from-nm={start}"]) == 2
    assert "give both --from-nm and --to-nm" in capsys.readouterr().err
    assert main([*args, "--out", str(out_dir)]) == 1
    assert "needs the standoff" in capsys.readouterr().err
