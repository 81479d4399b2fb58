"""Tests of the demo scenes (demo_stream.scenes) and their rendered fields."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants
from hypothesis import given, settings
from hypothesis import strategies as st

from demo_stream.scenes import (
    SCENES,
    Scene,
    bubble_lattice,
    calibration_stripe,
    labyrinth,
    make_scene,
    weak_domains,
    wire,
)
from demo_stream.tip import render_field_t, scan_axis_m

MU0 = scipy.constants.mu_0


def _grid(n: int, pitch_m: float) -> np.ndarray:
    return scan_axis_m(n, pitch_m)


def test_labyrinth_is_roughly_balanced_up_and_down() -> None:
    """Over many periods, up and down domains of the labyrinth cover about equal areas."""
    # A maze built from zero-mean waves has no preferred sign (common practice for a
    # demagnetised film); 12 periods per side leave a few % of statistical imbalance.
    scene = labyrinth(period_m=400e-9, seed=3)
    x = _grid(256, 20e-9)
    m = scene.sheet_moment_a(x, x)
    up = float(np.mean(m > 0))
    assert 0.4 < up < 0.6
    assert np.max(np.abs(m)) <= 0.3e-3


@pytest.mark.parametrize("wall_width_m", [10e-9, 30e-9])
def test_labyrinth_walls_have_the_requested_tanh_width(wall_width_m: float) -> None:
    """On every wall the magnetisation slope is m_s/δ, as for m = m_s tanh(s/δ)."""
    # Hubert & Schäfer, Magnetic Domains (1998), sec. 3.6.1: the wall profile tanh(s/δ)
    # has slope 1/δ at its centre; the finite differences (pitch δ/10) are good to 1 %.
    m_s = 0.5e-3
    scene = labyrinth(sheet_moment_a=m_s, wall_width_m=wall_width_m, seed=5)
    pitch = wall_width_m / 10.0
    x = _grid(400, pitch)
    m = scene.sheet_moment_a(x, x)
    gy, gx = np.gradient(m, pitch)
    on_wall = np.abs(m) < 0.05 * m_s
    assert on_wall.sum() > 50
    slope = np.hypot(gx, gy)[on_wall] * wall_width_m / m_s
    assert np.median(slope) == pytest.approx(1.0, abs=0.02)


def test_labyrinth_depends_only_on_its_seed() -> None:
    """The same seed gives the same maze and another seed a different one."""
    x = _grid(64, 30e-9)
    a = labyrinth(seed=1).sheet_moment_a(x, x)
    b = labyrinth(seed=1).sheet_moment_a(x, x)
    c = labyrinth(seed=2).sheet_moment_a(x, x)
    np.testing.assert_array_equal(a, b)
    assert not np.allclose(a, c)


def test_stripe_edges_sit_where_asked() -> None:
    """Pixels inside the stripe hold m_s, outside 0, and an edge pixel its covered fraction."""
    scene = calibration_stripe(sheet_moment_a=1e-3, width_m=400e-9, center_x_m=35e-9)
    x = np.arange(-20, 20) * 20e-9  # pixel centres on multiples of 20 nm
    m = scene.sheet_moment_a(x, np.zeros(3))
    assert m.shape == (3, 40)
    left, right = 35e-9 - 200e-9, 35e-9 + 200e-9  # -165 nm and +235 nm
    inside = (x - 10e-9 >= left) & (x + 10e-9 <= right)
    outside = (x + 10e-9 <= left) | (x - 10e-9 >= right)
    np.testing.assert_allclose(m[:, inside], 1e-3)
    np.testing.assert_allclose(m[:, outside], 0.0)
    # The edge pixels centred at -160 nm and +240 nm are 3/4 and 1/4 covered.
    np.testing.assert_allclose(m[0, np.isclose(x, -160e-9)], 0.75e-3)
    np.testing.assert_allclose(m[0, np.isclose(x, 240e-9)], 0.25e-3)


@settings(max_examples=60, deadline=None)
@given(
    width_nm=st.floats(20.0, 900.0),
    center_nm=st.floats(-300.0, 300.0),
    pitch_nm=st.floats(5.0, 60.0),
)
def test_stripe_total_moment_is_exact_on_any_grid(
    width_nm: float, center_nm: float, pitch_nm: float
) -> None:
    """Summed over a grid, the stripe's moment per unit length is m_s × width on any pitch."""
    scene = calibration_stripe(
        sheet_moment_a=1e-3, width_m=width_nm * 1e-9, center_x_m=center_nm * 1e-9
    )
    n = int(np.ceil(3000.0 / pitch_nm))
    x = scan_axis_m(n, pitch_nm * 1e-9)
    m = scene.sheet_moment_a(x, np.zeros(1))
    assert np.sum(m) * pitch_nm * 1e-9 == pytest.approx(1e-3 * width_nm * 1e-9, rel=1e-9)


def test_bubbles_sit_on_a_hexagonal_lattice_with_the_requested_radius() -> None:
    """Sites are down, triangle centres up, m = 0 at radius R, and πR² is down per site."""
    a, r = 600e-9, 150e-9
    scene = bubble_lattice(spacing_m=a, radius_m=r, wall_width_m=10e-9)
    h = a * np.sqrt(3.0) / 2.0
    sites = [(0.0, 0.0), (a, 0.0), (a / 2, h), (-a / 2, -h)]
    for sx, sy in sites:
        assert scene.sheet_moment_a(np.array([sx]), np.array([sy]))[0, 0] < 0
        edge = scene.sheet_moment_a(np.array([sx + r]), np.array([sy]))[0, 0]
        assert edge == pytest.approx(0.0, abs=1e-12)
    assert scene.sheet_moment_a(np.array([a / 2]), np.array([h / 3]))[0, 0] > 0
    # Over a whole number of rectangular cells (a × a√3 holds two bubbles), the down area
    # is 2πR² / (a² √3) of the total (geometry of the hexagonal lattice).
    pitch = 2e-9
    x = np.arange(0, a, pitch) + pitch / 2
    y = np.arange(0, 2 * h, pitch) + pitch / 2
    m = scene.sheet_moment_a(x, y)
    expected = 2 * np.pi * r**2 / (a * 2 * h)
    assert np.mean(m < 0) == pytest.approx(expected, rel=0.01)


def test_make_scene_builds_each_scene_and_applies_overrides() -> None:
    """Every registered scene builds by name, and overrides reach its parameters."""
    for name in SCENES:
        assert make_scene(name).name == name
    assert make_scene("calibration_stripe", width_m=1e-6).params["width_m"] == 1e-6


def test_make_scene_names_the_unknown_scene_or_parameter() -> None:
    """An unknown scene or parameter is refused with the accepted choices in the message."""
    with pytest.raises(ValueError, match=r"scene must be one of labyrinth, .*; found 'maze'"):
        make_scene("maze")
    with pytest.raises(
        ValueError, match=r"'wire': parameters must be among current_a, x0_m; found radius_m"
    ):
        make_scene("wire", radius_m=1.0)


def test_scene_refuses_bad_parameters() -> None:
    """Non-positive sizes, oversized bubbles and scenes with both or neither source are refused."""
    with pytest.raises(
        ValueError, match="'labyrinth': wall_width_m must be a finite number > 0; found 0"
    ):
        labyrinth(wall_width_m=0.0)
    with pytest.raises(ValueError, match=r"radius_m must be < spacing_m / 2 = 3e-07; found 4e-07"):
        bubble_lattice(radius_m=400e-9)
    with pytest.raises(
        ValueError, match="exactly one of sheet_moment_a and field_t must be given; found neither"
    ):
        Scene(name="empty", description="nothing")


def test_wire_field_is_biot_savart() -> None:
    """The wire scene's field at height d is μ0 I/(2π r) around the wire, circulating about +y."""
    # Biot–Savart law for an infinite straight wire, B = μ0 I / (2π r) φ̂ (e.g. Jackson,
    # Classical Electrodynamics, 3rd ed., eq. 5.10); for I along +y at the origin and a
    # point (x, 0, d): B = μ0 I / (2π r²) (d, 0, -x).
    current, d = 2e-3, 70e-9
    x = scan_axis_m(41, 25e-9) + 13e-9
    b = render_field_t(wire(current_a=current, x0_m=13e-9), x, scan_axis_m(3, 25e-9), d)
    xr = x - 13e-9
    r2 = xr**2 + d**2
    np.testing.assert_allclose(b[0, 1], MU0 * current / (2 * np.pi) * d / r2, rtol=1e-12)
    np.testing.assert_allclose(b[1], 0.0, atol=0)
    np.testing.assert_allclose(b[2, 2], -MU0 * current / (2 * np.pi) * xr / r2, rtol=1e-12)
    # Check value from PHYSICS.md §5 [num]: 15 nA at 10 nm gives 0.300 µT.
    b_small = render_field_t(wire(current_a=15e-9), np.array([0.0, 1e-9]), np.zeros(1), 10e-9)
    assert b_small[0, 0, 0] == pytest.approx(0.300e-6, rel=1e-3)


def test_stripe_field_peaks_at_the_edges_as_a_pair_of_line_currents() -> None:
    """A stripe's field is two opposite edge fields on every row, Bx peaking at each edge."""
    # PHYSICS.md §5 (geometry of Hingant et al., Phys. Rev. Applied 4, 014003 (2015)): the
    # edge of a +z film on x < 0 gives Bx = (μ0 I_s/2π) d/(x²+d²), Bz = −(μ0 I_s/2π) x/(x²+d²);
    # a stripe [L, R] is edge(x − R) − edge(x − L). The renderer treats the scan area plus
    # a margin as periodic, so images of the stripe ~3.8 µm away leave ≈ 1.7 % of
    # μ0 I_s/(2π d) in Bz [num]; 3 % bounds that. Every row is checked: the stripe must
    # not end at the scan's border.
    i_s, d = 1e-3, 60e-9
    left, right = -400e-9, 500e-9
    scene = calibration_stripe(sheet_moment_a=i_s, width_m=right - left, center_x_m=50e-9)
    pitch = 20e-9
    x = scan_axis_m(128, pitch)
    y = scan_axis_m(128, pitch)
    b = render_field_t(scene, x, y, d, oversample=2)

    def edge(xe: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        k = MU0 * i_s / (2 * np.pi) / (xe**2 + d**2)
        return k * d, -k * xe

    bx = edge(x - right)[0] - edge(x - left)[0]
    bz = edge(x - right)[1] - edge(x - left)[1]
    scale = MU0 * i_s / (2 * np.pi * d)  # 3.33 mT
    assert np.max(np.abs(b[0] - bx)) < 0.03 * scale
    assert np.max(np.abs(b[2] - bz)) < 0.03 * scale
    assert np.max(np.abs(b[1])) < 1e-9 * scale
    assert x[np.argmin(b[0, 64])] == pytest.approx(left, abs=pitch)
    assert x[np.argmax(b[0, 64])] == pytest.approx(right, abs=pitch)


def test_weak_domains_give_microtesla_fields() -> None:
    """The antiferromagnet-like scene gives fields of µT, three orders below the ferromagnet."""
    # Common practice: uncompensated moments of a few µA give µT stray fields at 50–100 nm.
    x = scan_axis_m(96, 40e-9)
    b_weak = render_field_t(weak_domains(), x, x, 60e-9)
    b_ferro = render_field_t(labyrinth(), x, x, 60e-9)
    peak_weak = float(np.max(np.abs(b_weak)))
    assert 1e-6 < peak_weak < 100e-6
    assert float(np.max(np.abs(b_ferro))) > 100 * peak_weak
