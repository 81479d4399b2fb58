"""Tests of strayline.physics.structure_fit: the 2-D fit of a straight structure's field
for the stand-off, the strength, the position and direction, and the NV angles."""

from __future__ import annotations

import math

import magpylib as magpy
import numpy as np
import pytest
from scipy import constants
from scipy.spatial.transform import Rotation

import demo_stream as ds
from strayline.physics import nv_axis
from strayline.physics.structure_field import StraightStructure, structure_field_nv_t
from strayline.physics.structure_fit import fit_structure_map

THETA = math.acos(1 / math.sqrt(3))  # (100) tip, PHYSICS.md §6
PHI = math.pi / 4
PITCH_M = 30e-9
X = ds.scan_axis_m(64, PITCH_M)
Y = ds.scan_axis_m(32, PITCH_M)


def _demo_edge_map(seed: int) -> tuple[np.ndarray, np.ndarray, dict[str, float]]:
    """B_NV of a demo calibration film edge (its own analytic field, rendered by the demo
    instrument) with Gaussian noise at a varying σ, a bias and 3 % failed pixels."""
    scan = ds.calibration_scan(seed, n_lines=Y.size, n_pixels=X.size, pixel_m=PITCH_M)
    b = ds.render_field_t(scan.scene, X, Y, scan.tip.standoff_m)
    b_nv = np.tensordot(nv_axis(THETA, PHI), b, axes=(0, 0)) + 3e-3
    rng = np.random.default_rng(1000 + seed)
    sigma = rng.uniform(15e-6, 40e-6, b_nv.shape)
    data = b_nv + rng.normal(size=b_nv.shape) * sigma
    data[rng.random(data.shape) < 0.03] = np.nan
    truth = {"standoff_m": scan.tip.standoff_m, **scan.scene.params}
    return data, sigma, truth


def test_stand_off_and_sheet_moment_are_recovered_with_calibrated_sigma() -> None:
    """Over 32 fixed seeds of demo calibration edges (d drawn in 30–120 nm), d and M_s t lie
    within 2σ of the truth in ≥ 90 % of the seeds and their z-scores have an rms in
    0.8–1.2 (σ calibrated; with 32 seeds the rms itself scatters by ±0.13, common
    practice), and the edge's direction is found."""
    z_d, z_m = [], []
    for seed in range(32):
        data, sigma, truth = _demo_edge_map(seed)
        fit = fit_structure_map(
            data, sigma, X, Y, model="film-edge", nv_theta_rad=THETA, nv_phi_rad=PHI
        )
        assert fit.converged
        z_d.append((fit.values["standoff_m"] - truth["standoff_m"]) / fit.sigmas["standoff_m"])
        z_m.append(
            (fit.values["sheet_moment_a"] - truth["sheet_moment_a"]) / fit.sigmas["sheet_moment_a"]
        )
        turn = (fit.values["angle_rad"] - truth["angle_rad"]) % (2 * math.pi)
        assert min(turn, 2 * math.pi - turn) < 0.01
    for z in (np.array(z_d), np.array(z_m)):
        assert np.mean(np.abs(z) < 2) >= 0.9
        assert 0.8 <= float(np.sqrt(np.mean(z**2))) <= 1.2


def test_a_stripe_from_magpylib_is_recovered() -> None:
    """A 600 nm stripe of 1 mA, 2 nm thick, made by magpylib's cuboid (an independent
    forward model), fitted with the stripe model and its thickness: d, M_s t and the width
    within 3σ."""
    d, t, width, angle = 55e-9, 2e-9, 600e-9, 1.9
    slab = magpy.magnet.Cuboid(
        polarization=(0.0, 0.0, constants.mu_0 * 1e-3 / t),
        dimension=(width, 40e-6, t),
        position=(40e-9, 0.0, -t / 2),
    )
    slab.rotate(Rotation.from_euler("z", angle - math.pi / 2), anchor=(0, 0, 0))
    gx, gy = np.meshgrid(X, Y)
    b = slab.getB(np.stack([gx, gy, np.full_like(gx, d)], axis=-1)).transpose(2, 0, 1)
    rng = np.random.default_rng(7)
    sigma = np.full(gx.shape, 25e-6)
    data = np.tensordot(nv_axis(THETA, PHI), b, axes=(0, 0)) + rng.normal(size=gx.shape) * sigma
    fit = fit_structure_map(
        data, sigma, X, Y, model="stripe", nv_theta_rad=THETA, nv_phi_rad=PHI, thickness_m=t
    )
    for name, truth in (("standoff_m", d), ("sheet_moment_a", 1e-3), ("width_m", width)):
        assert abs(fit.values[name] - truth) < 3 * fit.sigmas[name], name
    assert fit.values["angle_rad"] == pytest.approx(angle % math.pi, abs=0.01)


def test_nv_azimuth_of_a_wire_is_fitted_from_a_wrong_start() -> None:
    """With θ held, a wire's map gives the current, d and the NV azimuth φ (the start 15°
    off) within 3σ (PHYSICS.md §6: φ is a calibration input)."""
    wire = StraightStructure("wire", 80e-9, 1.5e-3, 50e-9, 1.0)
    gx, gy = np.meshgrid(X, Y)
    rng = np.random.default_rng(11)
    sigma = np.full(gx.shape, 20e-6)
    data = structure_field_nv_t(wire, gx, gy, THETA, PHI) + rng.normal(size=gx.shape) * sigma
    fit = fit_structure_map(
        data, sigma, X, Y, model="wire", nv_theta_rad=THETA, nv_phi_rad=PHI + 0.26, fit_phi=True
    )
    assert "nv_phi_rad" in fit.fitted
    for name, truth in (("standoff_m", 80e-9), ("current_a", 1.5e-3), ("nv_phi_rad", PHI)):
        assert abs(fit.values[name] - truth) < 3 * fit.sigmas[name], name


def test_a_known_strength_is_held_and_the_edge_keeps_its_side() -> None:
    """Holding the known M_s t leaves it out of the fit and finds the film's side of the
    edge (the start's direction turned by π where its sign disagrees)."""
    edge = StraightStructure("film-edge", 60e-9, 0.9e-3, -40e-9, 2.8)
    gx, gy = np.meshgrid(X, Y)
    rng = np.random.default_rng(5)
    sigma = np.full(gx.shape, 20e-6)
    data = structure_field_nv_t(edge, gx, gy, THETA, PHI) + rng.normal(size=gx.shape) * sigma
    fit = fit_structure_map(
        data,
        sigma,
        X,
        Y,
        model="film-edge",
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
        strength_a=0.9e-3,
    )
    assert "sheet_moment_a" not in fit.fitted
    assert fit.values["sheet_moment_a"] == 0.9e-3
    assert fit.values["angle_rad"] == pytest.approx(2.8, abs=0.01)
    assert fit.values["position_m"] == pytest.approx(-40e-9, abs=3 * fit.sigmas["position_m"])
    assert fit.chi2_red == pytest.approx(1.0, abs=0.15)


def test_masked_and_outlying_pixels_are_left_out() -> None:
    """Pixels outside ``valid`` and NaN pixels are not used; a pixel 40σ off (a fit locked
    on an alias) is clipped once, counted, and does not pull the fit."""
    edge = StraightStructure("film-edge", 50e-9, 1e-3, 0.0, 1.3)
    gx, gy = np.meshgrid(X, Y)
    rng = np.random.default_rng(2)
    sigma = np.full(gx.shape, 20e-6)
    data = structure_field_nv_t(edge, gx, gy, THETA, PHI) + rng.normal(size=gx.shape) * sigma
    data[3, 5] = np.nan
    data[20, 40] += 40 * sigma[20, 40]
    valid = np.ones(gx.shape, dtype=bool)
    valid[:4] = False
    fit = fit_structure_map(
        data, sigma, X, Y, model="film-edge", nv_theta_rad=THETA, nv_phi_rad=PHI, valid=valid
    )
    assert fit.n_clipped == 1
    assert fit.n_pixels == gx.size - 4 * X.size - 1
    assert not fit.used[20, 40]
    assert abs(fit.values["standoff_m"] - 50e-9) < 3 * fit.sigmas["standoff_m"]


def test_underestimated_field_sigma_scales_the_parameter_sigma() -> None:
    """When the scatter is twice the σ map, χ²_red ≈ 4 and the σ of each parameter is
    multiplied by √χ²_red, flagged; an honest σ map gives χ²_red ≈ 1 (Press et al.,
    Numerical Recipes 3rd ed., sec. 15.6)."""
    edge = StraightStructure("film-edge", 70e-9, 1e-3, 0.0, 0.7)
    gx, gy = np.meshgrid(X, Y)
    rng = np.random.default_rng(9)
    sigma = np.full(gx.shape, 20e-6)
    clean = structure_field_nv_t(edge, gx, gy, THETA, PHI)
    honest = fit_structure_map(
        clean + rng.normal(size=gx.shape) * sigma,
        sigma,
        X,
        Y,
        model="film-edge",
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
    )
    noisy = fit_structure_map(
        clean + 2 * rng.normal(size=gx.shape) * sigma,
        sigma,
        X,
        Y,
        model="film-edge",
        nv_theta_rad=THETA,
        nv_phi_rad=PHI,
    )
    assert honest.chi2_red == pytest.approx(1.0, abs=0.1)
    assert noisy.sigma_scaled
    assert noisy.chi2_red == pytest.approx(4.0, rel=0.15)
    assert noisy.sigmas["standoff_m"] / honest.sigmas["standoff_m"] == pytest.approx(2.0, rel=0.2)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        (
            {"fit_theta": True, "fit_phi": True},
            "a straight structure determines two of its strength and the NV angles",
        ),
        ({"model": "dot"}, "model must be one of film-edge, stripe, wire; found 'dot'"),
        ({"valid": np.zeros((32, 64), dtype=bool)}, "too few measured pixels for a film-edge fit"),
    ],
)
def test_impossible_fits_raise_named_errors(kwargs: dict[str, object], message: str) -> None:
    """Three free amplitudes, an unknown model or no pixels raise ValueError saying so."""
    args: dict[str, object] = {"model": "film-edge", "nv_theta_rad": THETA, "nv_phi_rad": PHI}
    sigma = np.full((32, 64), 1e-5)
    with pytest.raises(ValueError, match=message):
        fit_structure_map(np.zeros((32, 64)), sigma, X, Y, **(args | kwargs))  # type: ignore[arg-type]
