"""Tests of the scene family (demo_stream.family), its new scenes and the slow nuisances."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.constants

from demo_stream.family import FAMILY_KINDS, GEOMETRIES, FamilyScan, draw_scan
from demo_stream.faults import parse_fault
from demo_stream.scenes import (
    _TABLE,
    _site_table,
    bubble_lattice,
    dot_array,
    film_edge,
    stripe_domains,
)
from demo_stream.tip import (
    NV_100_THETA_RAD,
    ScanRenderer,
    TipModel,
    pl_drift_factor,
    render_field_t,
    scan_axis_m,
)
from demo_stream.writer import DemoConfig, frequency_grid_hz, run_scan
from strayline.lines import line_file_name, read_line_file
from strayline.physics import stray_field_t

MU0 = scipy.constants.mu_0
# dD/dT = −74.2(7) kHz/K near room temperature: Acosta et al., PRL 104, 070801 (2010).
DD_DT_HZ_PER_K = -74.2e3


def _edge_field_t(s_m: np.ndarray, d_m: float, current_a: float) -> tuple[np.ndarray, np.ndarray]:
    """Thin-film edge / line current: (B_n, B_z) = (μ0 I/2π)(d, −s)/(s² + d²).

    PHYSICS.md §5: the edge of a +z film on s < 0 carries the bound current I_s = M_s t
    (magnetic-charge and Biot–Savart pictures agree), the geometry Hingant et al., Phys.
    Rev. Applied 4, 014003 (2015) calibrate on.
    """
    k = MU0 * current_a / (2.0 * np.pi) / (s_m**2 + d_m**2)
    return k * d_m, -k * s_m


def _dipole_field_t(points_m: np.ndarray, moment_a_m2: float) -> np.ndarray:
    """Field (n, 3) of a point dipole m ẑ at the origin: magpylib when installed, else
    B = (μ0/4π)(3 r̂ (m·r̂) − m)/r³ with μ0 from scipy.constants (Jackson, Classical
    Electrodynamics, 3rd ed., eq. 5.56)."""
    try:
        import magpylib
    except ImportError:
        r = np.linalg.norm(points_m, axis=1, keepdims=True)
        r_hat = points_m / r
        m = np.array([0.0, 0.0, moment_a_m2])
        return MU0 / (4 * np.pi) * (3 * r_hat * (r_hat @ m)[:, None] - m) / r**3
    dipole = magpylib.misc.Dipole(moment=(0.0, 0.0, moment_a_m2))
    return np.asarray(dipole.getB(points_m))


# -- new scenes ----------------------------------------------------------------------------


def test_film_edge_field_is_the_thin_film_edge_formula_at_and_far_from_the_edge() -> None:
    """A rotated, shifted film edge gives the line-current field across its edge, near and far."""
    # Hingant et al. 2015 / PHYSICS.md §5 (thin-film limit). The edge is 0.5 nm wide at
    # d = 50 nm: its spread changes the field by ~(δ/d)² ≈ 1e-4 of the peak [num].
    m_s, d, angle, offset = 1e-3, 50e-9, math.radians(30.0), 120e-9
    scene = film_edge(sheet_moment_a=m_s, angle_rad=angle, offset_m=offset, wall_width_m=0.5e-9)
    x = scan_axis_m(81, 10e-9)
    y = scan_axis_m(61, 10e-9)
    b = render_field_t(scene, x, y, d)
    xx, yy = np.meshgrid(x, y)
    s = xx * math.sin(angle) - yy * math.cos(angle) - offset  # across the edge, film at s < 0
    b_n, b_z = _edge_field_t(s, d, m_s)
    expected = np.stack([b_n * math.sin(angle), -b_n * math.cos(angle), b_z])
    peak = MU0 * m_s / (2 * np.pi * d)  # 4.0 mT, the check value of PHYSICS.md §5
    assert peak == pytest.approx(4.0e-3, rel=1e-3)
    np.testing.assert_allclose(b, expected, rtol=0, atol=1e-3 * peak)
    # Far from the edge (30 stand-offs) the field falls as 1/s on either side: a uniform
    # film makes no field of its own (Beardsley, IEEE Trans. Magn. 25, 671 (1989)).
    far = np.array([-30 * d, 30 * d])
    b_far = render_field_t(film_edge(sheet_moment_a=m_s, wall_width_m=0.5e-9), far, np.zeros(1), d)
    np.testing.assert_allclose(b_far[2, 0], _edge_field_t(far, d, m_s)[1], rtol=1e-3)
    assert np.all(np.abs(b_far) < 0.04 * peak)


def test_film_edge_matches_a_thin_magnetised_slab_from_magpylib() -> None:
    """Near its edge, a film edge's field is that of a wide, thin magnetised slab."""
    # Independent reference: magpylib's analytic cuboid field. A 400 µm wide slab of
    # thickness t = 0.2 nm carrying M = I_s/t, evaluated at d above its top; the sheet
    # model is compared at d + t/2 (the slab's mid-plane), which leaves O((t/d)²) of
    # thickness effect, and the slab's far edges add ~d/200 µm; 3e-4 of the peak was
    # seen [num], so 1e-3.
    magpylib = pytest.importorskip("magpylib")
    m_s, d, t, width = 1e-3, 50e-9, 0.2e-9, 400e-6
    slab = magpylib.magnet.Cuboid(
        polarization=(0.0, 0.0, MU0 * m_s / t),
        dimension=(width, width, t),
        position=(-width / 2, 0.0, -t / 2),
    )
    x = np.linspace(-300e-9, 300e-9, 13)
    points = np.stack([x, np.zeros_like(x), np.full_like(x, d)], axis=1)
    reference = np.asarray(slab.getB(points))
    b = render_field_t(
        film_edge(sheet_moment_a=m_s, wall_width_m=0.5e-9), x, np.zeros(1), d + t / 2
    )
    peak = MU0 * m_s / (2 * np.pi * d)
    np.testing.assert_allclose(b[0, 0], reference[:, 0], rtol=0, atol=1e-3 * peak)
    np.testing.assert_allclose(b[2, 0], reference[:, 2], rtol=0, atol=1e-3 * peak)


def test_a_lone_dot_far_away_is_a_point_dipole_of_its_moment() -> None:
    """Far from a single dot, its field is that of a point dipole m_s π R² (soft edge included)."""
    # Reference: point dipole (magpylib if installed, else Jackson eq. 5.56). The soft edge
    # m_s (1 − tanh((r − R)/δ))/2 is a Fermi function of width δ/2, whose area integral is
    # π R² + π³ δ²/12 (Sommerfeld expansion, e.g. Ashcroft & Mermin, Solid State Physics,
    # eq. 2.70, from memory): +0.8 % here. Budget [num], in units of the peak dipole
    # field: the dot is a loop of radius R, not a point (1.0 % at r = 10 R), and the
    # renderer's periodic images of its 6 x 4.8 µm map (0.4 %), so 2.5 %.
    m_s, radius, delta, d = 1e-3, 40e-9, 4e-9, 40e-9
    scene = dot_array(sheet_moment_a=m_s, pitch_m=100e-6, radius_m=radius, wall_width_m=delta)
    x = scan_axis_m(151, 8e-9)
    y = scan_axis_m(3, 8e-9)
    b = render_field_t(scene, x, y, d, oversample=2, margin_standoffs=60)
    far = (np.abs(x) >= 0.4e-6) & (np.abs(x) <= 0.6e-6)
    points = np.stack([x[far], np.zeros(far.sum()), np.full(far.sum(), d)], axis=1)
    moment = m_s * (np.pi * radius**2 + np.pi**3 * delta**2 / 12)
    expected = _dipole_field_t(points, moment)
    scale = float(np.max(np.abs(expected)))
    np.testing.assert_allclose(b[0, 1, far], expected[:, 0], rtol=0, atol=0.025 * scale)
    np.testing.assert_allclose(b[2, 1, far], expected[:, 2], rtol=0, atol=0.025 * scale)
    np.testing.assert_allclose(b[1, 1, far], 0.0, atol=1e-9 * scale)


def test_dot_array_has_no_moment_between_dots_and_the_dots_hold_their_moment() -> None:
    """Between the dots m is zero, and a lattice cell holds one dot's moment."""
    # Area of a soft-edged disc: π R² + π³ δ²/12 (Sommerfeld expansion, see above).
    m_s, pitch, radius, delta = 1e-3, 400e-9, 100e-9, 5e-9
    h = 2e-9
    c = np.arange(-pitch, pitch, h) + h / 2  # exactly 2 x 2 cells of the unrotated lattice
    m = dot_array(sheet_moment_a=m_s, pitch_m=pitch, radius_m=radius, wall_width_m=delta)
    values = m.sheet_moment_a(c, c)
    assert values.min() >= 0.0
    assert values.max() == pytest.approx(m_s, rel=1e-12)
    expected = (np.pi * radius**2 + np.pi**3 * delta**2 / 12) / pitch**2
    # A periodic function summed over whole periods: the sample sum is good to ~1e-4 at
    # h = δ/2.5 [num].
    assert values.mean() / m_s == pytest.approx(expected, rel=1e-3)
    # Rotated by 20°: the centre of each square of four dots is (√2/2) p − R = 183 nm =
    # 37 δ from every disc, where m is zero for all purposes (below 1e-12 m_s).
    angle = math.radians(20.0)
    rotated = dot_array(
        sheet_moment_a=m_s, pitch_m=pitch, radius_m=radius, wall_width_m=delta, angle_rad=angle
    )
    rot = np.array([[math.cos(angle), -math.sin(angle)], [math.sin(angle), math.cos(angle)]])
    for i, j in [(0.5, 0.5), (-0.5, 0.5), (1.5, -0.5), (-3.5, -2.5)]:
        px, py = rot @ (np.array([i, j]) * pitch)
        assert abs(rotated.sheet_moment_a(np.array([px]), np.array([py]))[0, 0]) < 1e-12 * m_s


def test_stripes_along_the_fast_axis_do_not_vary_along_x() -> None:
    """At angle 0 the walls are parallel to x: m and the rendered field are constant along x."""
    scene = stripe_domains(period_m=400e-9, angle_rad=0.0, offset_m=37e-9)
    x = scan_axis_m(64, 30e-9)
    y = scan_axis_m(48, 30e-9)
    m = scene.sheet_moment_a(x, y)
    assert np.array_equal(m, np.broadcast_to(m[:, :1], m.shape))
    assert np.ptp(m) > 1.9 * 0.5e-3  # both up and down domains are in the scan
    b = render_field_t(scene, x, y, 60e-9)
    assert np.max(np.ptp(b, axis=2)) < 1e-12 * np.max(np.abs(b))
    assert np.max(np.abs(b[0])) < 1e-12 * np.max(np.abs(b))  # no Bx without x dependence


def test_stripe_field_is_the_sum_of_its_walls() -> None:
    """On a map holding whole periods, stripes at any angle give the field of their walls."""
    # Each wall between up and down is two film edges, a line current 2 m_s (PHYSICS.md §5;
    # Hingant et al. 2015); the walls alternate in sign. A map holding 3 x 4 whole periods
    # (angle atan(3/4), period 250 nm, 1.25 µm side) is exactly periodic, so the Fourier
    # forward model (Beardsley 1989) sees the infinite array; the walls are 1 nm wide
    # (δ²/d² ≈ 4e-4 [num]) and the sum runs over ±3000 periods.
    m_s, period, d, duty, offset = 0.5e-3, 250e-9, 50e-9, 0.4, 30e-9
    angle = math.atan2(3.0, 4.0)
    scene = stripe_domains(
        sheet_moment_a=m_s,
        period_m=period,
        angle_rad=angle,
        wall_width_m=1e-9,
        duty=duty,
        offset_m=offset,
    )
    h = 5e-9
    x = np.arange(250) * h
    b = stray_field_t(scene.sheet_moment_a(x, x), pixel_m=h, standoff_m=d, pad=0)
    rng = np.random.default_rng(1)
    iy, ix = rng.integers(0, 250, (2, 200))
    s = x[iy] * math.cos(angle) - x[ix] * math.sin(angle) - offset  # across the walls
    n = np.arange(-3000, 3001)
    walls = np.concatenate([n * period + duty * period, n * period])  # up→down, down→up
    sign = np.concatenate([np.ones(n.size), -np.ones(n.size)])
    b_n, b_z = _edge_field_t(s[:, None] - walls[None, :], d, 2 * m_s)
    b_n, b_z = (b_n * sign).sum(axis=1), (b_z * sign).sum(axis=1)
    expected = np.stack([-b_n * math.sin(angle), b_n * math.cos(angle), b_z])
    peak = float(np.max(np.abs(expected)))
    np.testing.assert_allclose(b[:, iy, ix], expected, rtol=0, atol=2e-3 * peak)


@pytest.mark.parametrize("angle_deg", [0.0, 2.0, 61.0])
def test_stripe_walls_have_the_tanh_slope_and_the_asked_duty(angle_deg: float) -> None:
    """Up domains fill the duty fraction and every wall has the slope m_s/δ of tanh(s/δ)."""
    # Hubert & Schäfer, Magnetic Domains (1998), sec. 3.6.1: slope 1/δ at the wall centre.
    m_s, delta, duty = 0.4e-3, 20e-9, 0.3
    scene = stripe_domains(
        sheet_moment_a=m_s,
        period_m=300e-9,
        angle_rad=math.radians(angle_deg),
        wall_width_m=delta,
        duty=duty,
    )
    h = delta / 10
    x = scan_axis_m(600, h)
    m = scene.sheet_moment_a(x, x)
    assert float(np.mean(m > 0)) == pytest.approx(duty, abs=0.02)
    gy, gx = np.gradient(m, h)
    on_wall = np.abs(m) < 0.05 * m_s
    slope = np.hypot(gx, gy)[on_wall] * delta / m_s
    assert np.median(slope) == pytest.approx(1.0, abs=0.02)


def _ordered_bubbles_as_before(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """The ordered bubble lattice, written exactly as the scene computed it before disorder."""
    a, radius, delta, m_s = 600e-9, 150e-9, 15e-9, 0.5e-3
    b = a * np.sqrt(3.0)
    xr, yr = x[None, :], y[:, None]
    dx0 = xr - a * np.round(xr / a)
    dy0 = yr - b * np.round(yr / b)
    xs, ys = xr - a / 2.0, yr - b / 2.0
    dx1 = xs - a * np.round(xs / a)
    dy1 = ys - b * np.round(ys / b)
    r = np.sqrt(np.minimum(dx0**2 + dy0**2, dx1**2 + dy1**2))
    return m_s * np.tanh((r - radius) / delta)


def test_bubble_lattice_without_disorder_is_todays_scene_bit_for_bit() -> None:
    """With its default (zero) disorder the bubble lattice is exactly the ordered one, any seed."""
    x = scan_axis_m(128, 30e-9)
    y = scan_axis_m(64, 30e-9)
    expected = _ordered_bubbles_as_before(x, y)
    for scene in (bubble_lattice(), bubble_lattice(seed=9)):
        assert np.array_equal(scene.sheet_moment_a(x, y), expected)
    # The disordered code path agrees with it as the disorder vanishes.
    nearly = bubble_lattice(disorder_m=1e-15, radius_spread=1e-12, seed=3)
    np.testing.assert_allclose(nearly.sheet_moment_a(x, y), expected, rtol=0, atol=1e-9)


def test_disordered_bubbles_take_the_nearest_of_all_sites() -> None:
    """With the largest disorder, each point sees the bubble that is nearest in r − R_i."""
    # Brute force over every site of a 13 x 13 block around the origin (common practice).
    a, radius, spread, disorder, delta, seed = 600e-9, 150e-9, 0.5, 150e-9, 15e-9, 4
    scene = bubble_lattice(
        spacing_m=a,
        radius_m=radius * 0.95,
        wall_width_m=delta,
        disorder_m=disorder,
        radius_spread=spread,
        seed=seed,
    )
    dx, dy, factor = _site_table(seed, disorder, spread)
    h = a * np.sqrt(3.0) / 2
    i, j = np.meshgrid(np.arange(-6, 7), np.arange(-6, 7))
    cx = a * (i + j / 2) + dx[j % _TABLE, i % _TABLE]
    cy = j * h + dy[j % _TABLE, i % _TABLE]
    r_i = radius * 0.95 * factor[j % _TABLE, i % _TABLE]
    rng = np.random.default_rng(0)
    for px, py in rng.uniform(-1.5e-6, 1.5e-6, (300, 2)):
        nearest = np.min(np.hypot(px - cx, py - cy) - r_i)
        got = scene.sheet_moment_a(np.array([px]), np.array([py]))[0, 0]
        assert got == pytest.approx(0.5e-3 * math.tanh(nearest / delta), rel=1e-12, abs=1e-18)


def test_radius_spread_keeps_the_mean_bubble_area() -> None:
    """With radii R(1 + s u), u uniform in [−1, 1], the down area grows by 1 + s²/3 on average."""
    # Hexagonal lattice: 2 bubbles per a × a√3 cell; E[(1 + s u)²] = 1 + s²/3. 20 x 12
    # cells (480 bubbles of the 64 x 64 table) leave ~1.5 % of sampling scatter.
    a, radius, spread = 600e-9, 120e-9, 0.3
    scene = bubble_lattice(
        spacing_m=a,
        radius_m=radius,
        wall_width_m=2e-9,
        disorder_m=0.05 * a,
        radius_spread=spread,
        seed=2,
    )
    pitch = 15e-9
    x = np.arange(0, 20 * a, pitch) + pitch / 2
    y = np.arange(0, 12 * a * np.sqrt(3.0), pitch) + pitch / 2
    down = float(np.mean(scene.sheet_moment_a(x, y) < 0))
    expected = 2 * np.pi * radius**2 * (1 + spread**2 / 3) / (a * a * np.sqrt(3.0))
    assert down == pytest.approx(expected, rel=0.04)


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (
            lambda: stripe_domains(duty=1.0),
            r"'stripe_domains': duty must be in \(0, 1\); found 1.0",
        ),
        (lambda: stripe_domains(period_m=0.0), "period_m must be a finite number > 0; found 0"),
        (
            lambda: dot_array(radius_m=300e-9),
            r"radius_m must be < pitch_m / 2 = 2.5e-07; found 3e-07",
        ),
        (
            lambda: dot_array(jitter_m=200e-9),
            r"jitter_m must be in \[0, pitch_m / 4 = 1.25e-07\]; found 2e-07",
        ),
        (lambda: film_edge(angle_rad=math.nan), "'film_edge': angle_rad must be finite; found nan"),
        (
            lambda: bubble_lattice(disorder_m=-1e-9),
            r"disorder_m must be in \[0, spacing_m / 4 = 1.5e-07\]",
        ),
        (
            lambda: bubble_lattice(radius_spread=0.6),
            r"radius_spread must be in \[0, 0.5\]; found 0.6",
        ),
        (
            lambda: bubble_lattice(radius_m=250e-9, radius_spread=0.3),
            r"radius_m × \(1 \+ radius_spread\) must be < spacing_m / 2",
        ),
        (lambda: dot_array(seed=1.5), "'dot_array': seed must be a whole number >= 0; found 1.5"),
    ],
)
def test_new_scene_parameters_are_refused_with_the_reason(build, message: str) -> None:  # type: ignore[no-untyped-def]
    """Out-of-range parameters of the new scenes are refused, naming the key and the range."""
    with pytest.raises(ValueError, match=message):
        build()


# -- slow nuisances ------------------------------------------------------------------------


def _renderer(tip: TipModel, faults: tuple = ()) -> ScanRenderer:  # type: ignore[type-arg]
    return ScanRenderer(
        stripe_domains(),
        tip,
        n_lines=6,
        n_pixels=16,
        pixel_m=30e-9,
        freq_hz=frequency_grid_hz(2.7e9, 3.04e9, 41),
        faults=faults,
    )


def test_default_tip_keeps_todays_d_and_pl_exactly() -> None:
    """Without nuisances, D is D(T) everywhere and the PL follows the old drift, bit for bit."""
    tip = TipModel(pl_wobble=0.03)
    renderer = _renderer(tip)
    for k in range(6):
        truth = renderer.truth(k, backward=False)
        assert np.all(truth.zfs_hz == tip.zfs_hz)
        old_rate = (
            tip.count_rate_cps
            * np.ones(16)
            * pl_drift_factor(
                truth.time_s, tip.pl_drift_per_hour, tip.pl_wobble, tip.pl_wobble_period_s
            )
        )
        assert np.array_equal(truth.pl_rate_cps, old_rate)


def test_zfs_drift_moves_d_linearly_on_the_instrument_clock(tmp_path: Path) -> None:
    """A warming of 2 K/h lowers D by 148.4 kHz/h, and the truth record carries it."""
    # dD/dT = −74.2 kHz/K (Acosta et al. 2010).
    drift = 2.0 * DD_DT_HZ_PER_K
    tip = TipModel(zfs_drift_hz_per_hour=drift)
    config = DemoConfig(
        scene=stripe_domains(),
        tip=tip,
        n_lines=6,
        n_pixels=16,
        freq_hz=frequency_grid_hz(2.7e9, 3.04e9, 41),
        scan_id="drift",
    )
    record = run_scan(config, tmp_path / "watch", tmp_path / "truth")
    zfs = record.map("zfs_hz")
    time_s = record.map("time_s")
    np.testing.assert_allclose(zfs, tip.zfs_hz + drift * time_s / 3600.0, rtol=0, atol=1e-3)
    span_s = float(time_s[-1, -1] - time_s[0, 0])
    assert zfs[-1, -1] - zfs[0, 0] == pytest.approx(drift * span_s / 3600.0, rel=1e-9)


def test_pl_step_changes_the_rate_from_its_time_on() -> None:
    """A −8 % laser-power step lowers the truth's PL by 8 % from its instrument time on."""
    plain = _renderer(TipModel())
    pixel_s = 41 * TipModel().dwell_s
    at_s = 40.2 * pixel_s  # during line 2 (16 pixels a line), between pixels 7 and 8
    stepped = _renderer(TipModel(pl_step_fraction=-0.08, pl_step_at_s=at_s))
    for k in range(6):
        a, b = plain.truth(k, False), stepped.truth(k, False)
        after = a.time_s >= at_s
        np.testing.assert_allclose(b.pl_rate_cps[after], 0.92 * a.pl_rate_cps[after], rtol=1e-12)
        assert np.array_equal(b.pl_rate_cps[~after], a.pl_rate_cps[~after])
    assert plain.truth(2, False).time_s[8] > at_s > plain.truth(2, False).time_s[7]


def test_sample_touched_can_dim_the_pl_of_its_pixels() -> None:
    """A touch with pl_factor 0.85 dims exactly its pixels; the default leaves the PL alone."""
    fault = parse_fault("sample_touched@2:4,width_pixels=5,pl_factor=0.85")
    plain, touched = _renderer(TipModel()), _renderer(TipModel(), (fault,))
    a, b = plain.truth(2, False), touched.truth(2, False)
    ratio = b.pl_rate_cps / a.pl_rate_cps
    np.testing.assert_allclose(ratio[4:9], 0.85, rtol=1e-12)
    assert np.all(ratio[:4] == 1.0)
    assert np.all(ratio[9:] == 1.0)
    default = _renderer(TipModel(), (parse_fault("sample_touched@2:4,width_pixels=5"),))
    assert np.array_equal(default.truth(2, False).pl_rate_cps, a.pl_rate_cps)


@pytest.mark.parametrize(
    ("values", "message"),
    [
        (
            {"pl_step_fraction": -1.0},
            "tip: pl_step_fraction must be a finite number > -1; found -1.0",
        ),
        ({"pl_step_at_s": -5.0}, "tip: pl_step_at_s must be a finite number >= 0; found -5.0"),
        (
            {"zfs_drift_hz_per_hour": math.inf},
            "tip: zfs_drift_hz_per_hour must be finite; found inf",
        ),
    ],
)
def test_bad_nuisances_are_refused(values: dict[str, float], message: str) -> None:
    """Nuisance values that make no sense are refused with the key and what was found."""
    with pytest.raises(ValueError, match=message):
        TipModel(**values)  # type: ignore[arg-type]


# -- the family ----------------------------------------------------------------------------


def _counts(scan: FamilyScan, folder: Path) -> np.ndarray:
    run_scan(scan.config, folder / "watch", folder / "truth")
    lines = [
        read_line_file(folder / "watch" / scan.config.scan_id / line_file_name(k, "forward"))
        for k in range(scan.config.n_lines)
    ]
    return np.stack([line.counts for line in lines])


def test_the_same_seed_gives_the_same_scan_and_another_seed_another(tmp_path: Path) -> None:
    """draw_scan is a function of its seed: same summary and counts; other seeds differ."""
    kwargs = {"n_lines": 12, "n_pixels": 24, "fault": "tip_crash"}
    a = draw_scan(17, "default", **kwargs)  # type: ignore[arg-type]
    b = draw_scan(17, "default", **kwargs)  # type: ignore[arg-type]
    assert json.dumps(dict(a.summary)) == json.dumps(dict(b.summary))
    assert np.array_equal(_counts(a, tmp_path / "a"), _counts(b, tmp_path / "b"))
    others = {json.dumps(dict(draw_scan(s, "default", **kwargs).summary)) for s in range(18, 24)}  # type: ignore[arg-type]
    assert len(others) == 6
    assert json.dumps(dict(a.summary)) not in others


def test_a_fault_changes_nothing_else_of_the_scan() -> None:
    """The fault is drawn last: with or without it, a seed gives the same sample and tip."""
    clean = dict(draw_scan(5, "ferromagnet-multilayer").summary)
    assert clean.pop("fault") is None
    for fault in ("fluorescence_lost", "sample_touched"):
        faulty = dict(draw_scan(5, "ferromagnet-multilayer", fault=fault).summary)
        assert faulty.pop("fault").startswith(fault + "@")
        assert faulty == clean


@pytest.mark.slow  # renders 24 scans per kind (about 2 s each kind)
@pytest.mark.parametrize("kind", list(FAMILY_KINDS))
def test_every_kind_renders_with_its_resonances_inside_the_sweep(kind: str) -> None:
    """24 seeds of each kind render, with counts >= 0 and ≥ 90 % of pixels' resonances swept."""
    fractions = []
    for seed in range(24):
        scan = draw_scan(seed, kind, fault=("tip_crash", "sample_touched", None)[seed % 3])
        c = scan.config
        renderer = ScanRenderer(
            c.scene,
            c.tip,
            n_lines=c.n_lines,
            n_pixels=c.n_pixels,
            pixel_m=c.pixel_m,
            freq_hz=c.freq_hz,
            faults=c.faults,
            oversample=c.oversample,
        )
        rng = np.random.default_rng(c.seed)
        inside = 0
        for k in range(c.n_lines):
            counts, truth = renderer.render_trace(k, False, rng)
            assert counts.shape == (c.n_pixels, c.freq_hz.size)
            assert np.all(np.isfinite(renderer.expected_counts(truth)))
            assert np.all(renderer.expected_counts(truth) >= 0)
            inside += int(
                np.sum((truth.f_lo_hz >= c.freq_hz[0]) & (truth.f_hi_hz <= c.freq_hz[-1]))
            )
        fractions.append(inside / (c.n_lines * c.n_pixels))
    assert min(fractions) >= 0.9, fractions


def test_kinds_draw_fields_signals_and_sweeps_of_their_own_scale() -> None:
    """The antiferromagnet kind draws µT fields and narrow sweeps, the multilayer mT and wide."""
    for seed in range(12):
        afm = draw_scan(seed, "antiferromagnet-thin-film").summary
        ferro = draw_scan(seed, "ferromagnet-multilayer").summary
        cryo = draw_scan(seed, "cryogenic-2d-magnet").summary
        assert afm["scene"]["name"] == ferro["scene"]["name"]  # geometry is kind-independent
        assert 1e-6 < afm["peak_field_t"] < 50e-6
        assert ferro["peak_field_t"] > 1e-3
        assert afm["sweep"]["stop_hz"] - afm["sweep"]["start_hz"] <= 0.18e9 + 1
        assert ferro["sweep"]["start_hz"] >= 2.48e9
        assert ferro["sweep"]["stop_hz"] <= 3.27e9
        assert 1.0e-3 <= afm["tip"]["bias_along_nv_t"] <= 1.5e-3
        assert cryo["tip"]["temperature_k"] < 10
        assert cryo["tip"]["counts_per_sample"] <= 1000
        assert cryo["profile"] == "cryogenic-2d-magnet"


def test_the_family_covers_every_geometry_axis_and_bias() -> None:
    """Over 80 seeds: every geometry, stripes near the fast axis, both tip cuts, unbiased scans."""
    summaries = [draw_scan(seed, "default", n_lines=16, n_pixels=24).summary for seed in range(80)]
    names = {s["scene"]["name"] for s in summaries}
    assert names == set(GEOMETRIES)
    stripes = [s for s in summaries if s["scene"]["name"] == "stripe_domains"]
    near = [
        s
        for s in stripes
        if abs(math.sin(s["scene"]["params"]["angle_rad"])) < math.sin(math.radians(3.0))
    ]
    assert len(near) >= 0.2 * len(stripes) > 0
    # (100) tip: θ = arccos(1/√3), φ on ⟨110⟩; (111) tip: θ = 0 (PHYSICS.md §6).
    axes = {
        (round(s["tip"]["nv_theta_rad"], 9), round(math.degrees(s["tip"]["nv_phi_rad"])))
        for s in summaries
    }
    assert axes <= {(round(NV_100_THETA_RAD, 9), p) for p in (45, 135, 225, 315)} | {(0.0, 0)}
    assert (0.0, 0) in axes
    assert len(axes) == 5
    bias = [s["tip"]["bias_along_nv_t"] for s in summaries]
    assert min(bias) == 0.0
    assert all(b == 0.0 or 1e-3 <= b <= 5e-3 for b in bias)
    pitches = [s["pixel_m"] for s in summaries]
    assert min(pitches) >= 15e-9
    assert max(pitches) <= 80e-9


def test_nuisances_of_a_night_stay_in_their_ranges() -> None:
    """Bleaching 0–25 %, D drift within 0.6 MHz, wobble and laser steps of a few % over a scan."""
    steps = 0
    for seed in range(40):
        s = draw_scan(seed, "default", n_lines=16, n_pixels=24).summary
        tip, duration_h = s["tip"], s["scan_duration_s"] / 3600.0
        assert 0.0 <= -tip["pl_drift_per_hour"] * duration_h <= 0.25
        assert abs(tip["zfs_drift_hz_per_hour"] * duration_h) <= 0.6e6
        assert tip["zfs_drift_hz_per_hour"] * duration_h == pytest.approx(
            s["nuisances"]["zfs_drift_hz"]
        )
        assert 0.0 <= tip["pl_wobble"] <= 0.04
        if tip["pl_step_fraction"] != 0.0:
            steps += 1
            assert 0.02 <= abs(tip["pl_step_fraction"]) <= 0.08
            assert 0.1 <= tip["pl_step_at_s"] / s["scan_duration_s"] <= 0.9
    assert 0 < steps < 40


@pytest.mark.parametrize(
    "fault", ["fluorescence_lost", "contrast_collapsed", "tip_crash", "sample_touched"]
)
def test_faults_are_placed_and_sized_over_their_ranges(fault: str) -> None:
    """Faults start after the first quarter, before the last 5 lines, with sizes in range."""
    ends = set()
    for seed in range(30):
        scan = draw_scan(seed, "default", n_lines=48, n_pixels=64, fault=fault)
        (f,) = scan.config.faults
        assert 12 <= f.start_line <= 42
        assert 0 <= f.start_pixel < 64
        assert scan.summary["fault"] is not None
        assert parse_fault(scan.summary["fault"]) == f
        p = f.params
        if fault == "sample_touched":
            assert 3 <= p["width_pixels"] <= 15
            assert f.start_pixel + p["width_pixels"] <= 64
            assert f.end_line is not None
            assert 0 <= f.end_line - f.start_line <= 2
            assert 1e6 <= p["zfs_shift_hz"] <= 8e6
            assert 0.8 <= p["pl_factor"] <= 1.0
            continue
        ends.add(f.end_line is None)
        if f.end_line is not None:
            assert 1 <= f.end_line - f.start_line <= 4
        if fault == "tip_crash":
            assert 5e-9 <= p["standoff_step_m"] <= 50e-9
            assert 0.5 <= p["pl_factor"] <= 0.95
        elif fault == "fluorescence_lost":
            assert 0.02 <= p["pl_factor"] <= 0.4
        else:
            assert 0.0 <= p["contrast_factor"] <= 0.3
    assert fault == "sample_touched" or ends == {True, False}


def test_summary_is_json_and_says_what_the_scan_is() -> None:
    """The summary survives JSON and agrees with the config; describe() gives one line."""
    scan = draw_scan(3, "cryogenic-2d-magnet", fault="contrast_collapsed", scan_id="cryo-3")
    data = json.loads(json.dumps(dict(scan.summary)))
    c = scan.config
    assert data["scene"] == {"name": c.scene.name, "params": dict(c.scene.params)}
    assert data["pixel_m"] == c.pixel_m
    assert data["tip"]["standoff_m"] == c.tip.standoff_m
    assert data["tip"]["bias_field_t"] == list(c.tip.bias_field_t or ())
    assert data["sweep"] == {
        "start_hz": c.freq_hz[0],
        "stop_hz": c.freq_hz[-1],
        "n_freq": c.freq_hz.size,
    }
    assert data["fault"].startswith("contrast_collapsed@")
    assert c.profile == "cryogenic-2d-magnet"
    assert c.scan_id == "cryo-3"
    line = scan.describe()
    assert "\n" not in line
    assert line.startswith("cryogenic-2d-magnet seed 3: ")
    assert draw_scan(3, "default", profile="custom").config.profile == "custom"


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        (
            {"seed": 1, "kind": "superconductor"},
            r"draw_scan: kind must be one of default, .*; found 'superconductor'",
        ),
        (
            {"seed": 1, "kind": "default", "fault": "corrupt_file"},
            r"fault must be None or one of .*; found 'corrupt_file'",
        ),
        ({"seed": -1, "kind": "default"}, "draw_scan: seed must be an integer >= 0; found -1"),
        (
            {"seed": 1, "kind": "default", "n_lines": 6, "fault": "tip_crash"},
            "n_lines must be >= 8 to place a fault",
        ),
    ],
)
def test_draw_scan_refuses_bad_arguments(kwargs: dict[str, object], message: str) -> None:
    """Unknown kinds and faults, negative seeds and too-short faulty scans are refused."""
    with pytest.raises(ValueError, match=message):
        draw_scan(**kwargs)  # type: ignore[arg-type]
