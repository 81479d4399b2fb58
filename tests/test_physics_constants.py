"""Tests for strayline.physics.constants: CODATA-derived values and the D(T) model."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants
from hypothesis import given, settings
from hypothesis import strategies as st

from strayline.physics import constants as c


def test_gamma_nv_from_codata_bohr_magneton():
    """γ_NV = g μB/h is 28.0317 GHz/T for g = 2.0028 (PHYSICS.md §1 [num], CODATA μB/h via
    scipy.constants; g from Loubser & van Wyk, Rep. Prog. Phys. 41, 1201 (1978) [mem])."""
    mu_b_over_h = scipy.constants.physical_constants["Bohr magneton in Hz/T"][0]
    assert pytest.approx(2.0028 * mu_b_over_h, rel=1e-15) == c.GAMMA_NV_HZ_PER_T
    assert pytest.approx(28.0317, abs=5e-5) == c.GAMMA_NV_HZ_PER_T / 1e9


def test_gamma_nv_slightly_above_free_electron():
    """γ_NV exceeds the free-electron gyromagnetic ratio by 0.024 % (PHYSICS.md §1 [num], CODATA
    'electron gyromag. ratio in MHz/T' via scipy.constants)."""
    gamma_e_hz_per_t = scipy.constants.physical_constants["electron gyromag. ratio in MHz/T"][0]
    assert c.GAMMA_NV_HZ_PER_T / (gamma_e_hz_per_t * 1e6) - 1.0 == pytest.approx(2.4e-4, abs=0.1e-4)


def test_mu0_is_codata():
    """MU0 is the CODATA vacuum permeability (scipy.constants.mu_0)."""
    assert scipy.constants.mu_0 == c.MU0


def test_zfs_equals_room_value_at_300_k():
    """D(300 K) is D_ROOM_HZ = 2.870 GHz (PHYSICS.md §1, [mem])."""
    assert float(c.zfs_hz(300.0)) == pytest.approx(2.870e9, abs=1.0)


def test_zfs_slope_at_300_k_is_acosta_value():
    """dD/dT at 300 K is −74.2 kHz/K (Acosta et al., PRL 104, 070801 (2010), [pub])."""
    step_k = 0.01
    slope = (c.zfs_hz(300.0 + step_k) - c.zfs_hz(300.0 - step_k)) / (2 * step_k)
    assert float(slope) == pytest.approx(-74.2e3, rel=1e-5)


def test_zfs_tends_to_cryogenic_value_and_is_flat_below_100_k():
    """D(T) reaches ≈ 2.8777 GHz at 4 K and moves by less than 50 kHz below 100 K (Chen et al.,
    APL 99, 161903 (2011), [mem] anchor; the flatness is a property of our model)."""
    d = c.zfs_hz([1.0, 4.0, 50.0, 100.0])
    assert d[0] == pytest.approx(2.8777e9, abs=1.0)
    assert d[1] == pytest.approx(2.8777e9, abs=1.0)
    assert d[1] - d[3] < 50e3


def test_zfs_keeps_shape_and_accepts_integers():
    """zfs_hz returns an array of the input's shape and accepts integer temperatures."""
    out = c.zfs_hz(np.array([[4, 77, 300]]))
    assert out.shape == (1, 3)
    assert out.dtype == np.float64
    assert out[0, 2] == pytest.approx(2.870e9, abs=1.0)


@settings(max_examples=200, deadline=None)
@given(
    st.floats(min_value=0.1, max_value=800.0),
    st.floats(min_value=0.01, max_value=100.0),
)
def test_zfs_decreases_monotonically(t_k, dt_k):
    """D(T) never increases with temperature (common practice; Acosta 2010, Chen 2011)."""
    assert c.zfs_hz(t_k + dt_k) <= c.zfs_hz(t_k)


@pytest.mark.parametrize("bad", [0.0, -5.0, float("nan"), float("inf")])
def test_zfs_rejects_unphysical_temperature(bad):
    """A temperature that is not finite or not above 0 K raises ValueError naming the value."""
    with pytest.raises(ValueError, match=r"temperature_k must be finite and > 0 K; found"):
        c.zfs_hz([300.0, bad])


def test_zfs_error_message_names_the_value():
    """The error message states the offending temperature."""
    with pytest.raises(ValueError, match=r"found -5\.0"):
        c.zfs_hz(-5.0)


def _spin_ops(spin: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    m = np.arange(spin, -spin - 1, -1)
    sp = np.diag(np.sqrt(spin * (spin + 1) - m[1:] * (m[1:] + 1)), 1)
    sx = (sp + sp.T) / 2
    sy = (sp - sp.T) / 2j
    return sx, sy, np.diag(m)


@pytest.mark.parametrize(
    ("nucleus", "expected_hz", "n_lines"),
    [
        # (I, A∥, A⊥, quadrupole Q), Hz
        ((1.0, -2.14e6, -2.70e6, -5.01e6), c.HF_14N_HZ, 3),
        ((0.5, 3.03e6, 3.65e6, 0.0), c.HF_15N_HZ, 2),
    ],
)
def test_hyperfine_spacing_from_full_hamiltonian(nucleus, expected_hz, n_lines):
    """The ms=0→+1 line splits into 2I+1 lines spaced by HF_14N_HZ / HF_15N_HZ to within 1.5 %:
    diagonalising H = D Sz² + γB Sz + A∥ SzIz + A⊥(SxIx + SyIy) + Q Iz² with the ¹⁴N/¹⁵N
    parameters of Felton et al., PRB 79, 075203 (2009) [mem values]."""
    spin_n, a_par_hz, a_perp_hz, quad_hz = nucleus
    sx, sy, sz = _spin_ops(1.0)
    ix, iy, iz = _spin_ops(spin_n)
    one_s, one_i = np.eye(3), np.eye(int(2 * spin_n + 1))
    b_t = 5e-3
    h = (
        2.87e9 * np.kron(sz @ sz, one_i)
        + c.GAMMA_NV_HZ_PER_T * b_t * np.kron(sz, one_i)
        + a_par_hz * np.kron(sz, iz)
        + a_perp_hz * (np.kron(sx, ix) + np.kron(sy, iy))
        + quad_hz * np.kron(one_s, iz @ iz)
    )
    energies, vectors = np.linalg.eigh(h)
    n_i = one_i.shape[0]
    # Electron character of each eigenstate: weight on ms = +1 (rows 0..n_i-1) and ms = 0.
    w_plus = np.sum(np.abs(vectors[:n_i]) ** 2, axis=0)
    w_zero = np.sum(np.abs(vectors[n_i : 2 * n_i]) ** 2, axis=0)
    e_plus = np.sort(energies[w_plus > 0.5])
    e_zero = np.sort(energies[w_zero > 0.5])
    # Nuclear-spin-conserving transitions pair the levels of equal mI; with |A| ≪ D the
    # ordering by energy within each manifold follows mI, so pair by rank after sorting each
    # manifold by its mI expectation value.
    mi = np.real(np.einsum("ij,ik,kj->j", vectors.conj(), np.kron(np.eye(3), iz), vectors))
    plus_idx = np.where(w_plus > 0.5)[0]
    zero_idx = np.where(w_zero > 0.5)[0]
    plus_idx = plus_idx[np.argsort(mi[plus_idx])]
    zero_idx = zero_idx[np.argsort(mi[zero_idx])]
    lines = np.sort(energies[plus_idx] - energies[zero_idx])
    assert lines.size == n_lines
    assert e_plus.size == e_zero.size == n_lines
    spacing = np.diff(lines)
    np.testing.assert_allclose(spacing, expected_hz, rtol=0.015)
