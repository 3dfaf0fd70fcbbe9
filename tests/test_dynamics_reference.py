"""Exact time-evolution references: free-fermion TFIM quench against the matrix exponential."""

import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, strategies as st

import psiloom as pl
from psiloom.reference import evolve_expectations, evolve_state, tfim_ring_quench_sx


def _sx_per_site(n):
    return pl.operators.total([pl.operators.pauli(n, "X", i) for i in range(n)], n) / n


@pytest.mark.parametrize("h0,h1", [(0.5, 1.0), (0.5, 2.0), (2.0, 0.3), (1.5, 0.7)])
def test_free_fermion_quench_matches_matrix_exponential(h0, h1):
    # Barouch & McCoy 1971; Calabrese, Essler & Fagotti 2012: exact for the periodic ring in the
    # even-parity sector. Reference: exp(−iH t) applied by scipy's expm_multiply (Al-Mohy & Higham).
    n = 8
    lattice = pl.lattices.chain(n)
    h_init = pl.operators.transverse_field_ising(lattice, 1.0, h0)
    h_quench = pl.operators.transverse_field_ising(lattice, 1.0, h1)
    _, v0 = pl.reference.ground_state(h_init)
    times = np.array([0.0, 0.3, 0.7, 1.4, 2.5])
    exact = evolve_expectations(h_quench, v0, times, {"sx": _sx_per_site(n)})["sx"]
    free = tfim_ring_quench_sx(n, h0, h1, times)
    np.testing.assert_allclose(free, exact, atol=1e-10)
    assert np.ptp(exact) > 0.05  # the quench moves ⟨σˣ⟩: a constant curve could not pass


def test_evolve_state_agrees_with_dense_exponential_and_imaginary_time_reaches_ground_state():
    # dense scipy.linalg.expm as the independent reference
    n = 4
    h = pl.operators.heisenberg(pl.lattices.chain(n))
    rng = np.random.default_rng(0)
    v = rng.normal(size=2**n) + 1j * rng.normal(size=2**n)
    times = [0.0, 0.4, 1.1]
    states = evolve_state(h, v, times)
    dense = h.dense_matrix()
    for t, s in zip(times, states):
        ref = scipy.linalg.expm(-1j * dense * t) @ (v / np.linalg.norm(v))
        np.testing.assert_allclose(s, ref, atol=1e-10)
    e0, g = pl.reference.ground_state(h)
    far = evolve_state(h, v, [0.0, 30.0], imaginary=True)[-1]
    assert pl.reference.fidelity(far, g) > 1 - 1e-8


@given(st.lists(st.floats(-5, 5), min_size=2, max_size=6).filter(lambda t: np.any(np.diff(t) < 0)))
def test_time_grid_that_decreases_is_refused(times):
    h = pl.operators.pauli(2, "X", 0)
    with pytest.raises(ValueError, match="increasing"):
        evolve_state(h, np.ones(4), times)


def test_quench_refuses_odd_ring_and_non_finite_times():
    with pytest.raises(ValueError, match="even"):
        tfim_ring_quench_sx(7, 0.5, 1.0, [0.0])
    with pytest.raises(ValueError, match="finite"):
        tfim_ring_quench_sx(8, 0.5, 1.0, [0.0, np.nan])
