"""Local estimators against dense linear algebra on complete bases of small systems.

Definition (e.g. Becca & Sorella 2017, "Quantum Monte Carlo Approaches for Correlated
Systems"): E_loc(x) = Σ_x' H_xx' ψ(x')/ψ(x) = (Hψ)(x)/ψ(x). The reference below forms the
dense matrix and the full amplitude vector and divides, sharing no code path with the
connection-based estimator except the matrix construction, which test_operators.py checks
against independent Kronecker products.
"""

from __future__ import annotations

import functools
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import psiloom as pl
from psiloom import reference, lattices
from psiloom.operators import (
    PauliSum,
    heisenberg,
    j1j2,
    local_estimates,
    pauli,
    spin_correlation,
    transverse_field_ising,
    xxz,
)
from psiloom.spaces import SpinSpace, codes
from psiloom.states import RBM, TrialState


@functools.lru_cache(maxsize=None)
def random_rbm(n_sites: int, complex_params: bool, seed: int, scale: float = 0.3):
    """A small RBM with parameters redrawn from N(0, scale²) (cached: one compilation each)."""
    model = RBM(alpha=1.0, complex_params=complex_params)

    @jax.jit
    def make(key):
        k1, k2 = jax.random.split(key)
        v = model.init(k1, jnp.ones((1, n_sites)))
        leaves, tree = jax.tree_util.tree_flatten(v)
        ks = jax.random.split(k2, 2 * len(leaves))
        new = []
        for k, leaf in enumerate(leaves):
            w = scale * jax.random.normal(ks[2 * k], leaf.shape)
            if jnp.iscomplexobj(leaf):
                w = w + 1j * scale * jax.random.normal(ks[2 * k + 1], leaf.shape)
            new.append(w.astype(leaf.dtype))
        return jax.tree_util.tree_unflatten(tree, new)

    return model, make(jax.random.PRNGKey(seed))


@functools.lru_cache(maxsize=None)
def jitted_apply(model):
    return jax.jit(model.apply)


def dense_local_energy(op: PauliSum, log_psi: np.ndarray, space: SpinSpace) -> np.ndarray:
    """(Hψ)(x)/ψ(x) with ψ the full amplitude vector in the basis of space.configurations()."""
    psi = np.exp(log_psi.astype(complex))
    return (op.dense_matrix(space) @ psi) / psi


def estimator(op, model, variables, chunk):
    """The library's local energy as one compiled function of the configurations."""
    return jax.jit(lambda x: op.local_energy(lambda c: model.apply(variables, c), x, chunk=chunk))


random_op = (pauli(6, "XY", (0, 3), 0.7) + pauli(6, "ZYX", (1, 2, 5), -0.4j) + pauli(6, "Z", 4, 1.1)
             + pauli(6, "YY", (2, 3), 0.25) + 0.3)  # not Hermitian: local values exist for any operator

CASES = {
    "tfim-ring": (lambda: transverse_field_ising(lattices.chain(6), 1.0, 0.7), None),
    "heisenberg-sign-rule": (lambda: heisenberg(lattices.chain(6), 1.0, marshall_basis=True), None),
    "xxz-open": (lambda: xxz(lattices.chain(6, periodic=False), 0.8, 1.7), None),
    "j1j2-square": (lambda: j1j2(lattices.square(3, 2), 1.0, 0.45), None),
    "random-complex": (lambda: random_op, None),
    "heisenberg-sector": (lambda: heisenberg(lattices.chain(8), 1.0), 0),
    "j1j2-sector": (lambda: j1j2(lattices.chain(8), 1.0, 0.3), 1),
}


@pytest.mark.parametrize("case", list(CASES))
@pytest.mark.parametrize("complex_params", [False, True], ids=["real", "complex"])
def test_local_energy_equals_dense_ratio(case, complex_params):
    build, magnetisation = CASES[case]
    op = build()
    n = op.n_sites
    space = SpinSpace(n, magnetisation=magnetisation)
    model, variables = random_rbm(n, complex_params, seed=1)
    x = jnp.asarray(space.configurations())
    log_psi = np.asarray(jitted_apply(model)(variables, x))
    expected = dense_local_energy(op, log_psi, space)
    # chunking must not change anything: chunk 7 does not divide the number of states
    chunk = 7 if case in ("tfim-ring", "heisenberg-sector") else None
    e_loc = np.asarray(estimator(op, model, variables, chunk)(x))
    np.testing.assert_allclose(e_loc, expected, rtol=1e-10, atol=1e-10)
    if not complex_params and op.is_real:
        assert not np.iscomplexobj(e_loc)
    # the average of E_loc over |ψ|² is ⟨ψ|H|ψ⟩/⟨ψ|ψ⟩ (definition of the estimator)
    p = np.exp(2 * log_psi.real)
    psi = np.exp(log_psi.astype(complex))
    quotient = np.vdot(psi, op.dense_matrix(space) @ psi) / np.vdot(psi, psi)
    np.testing.assert_allclose(np.sum(p * e_loc) / np.sum(p), quotient, rtol=1e-10)


def test_known_log_amplitudes_and_chunks_agree():
    op = transverse_field_ising(lattices.chain(6), 1.0, 0.7)
    model, variables = random_rbm(6, True, seed=1)
    x = jnp.asarray(SpinSpace(6).configurations())
    log_amp = lambda c: model.apply(variables, c)

    @jax.jit
    def three_ways(x):
        plain = local_estimates(log_amp, op, x)
        given_logs = local_estimates(log_amp, op, x, log_amp_x=log_amp(x))
        chunked = local_estimates(log_amp, op, x, chunk=64)  # chunk equal to the batch
        return plain, given_logs, chunked

    plain, given_logs, chunked = three_ways(x)
    np.testing.assert_allclose(np.asarray(given_logs), np.asarray(plain), rtol=1e-13)
    np.testing.assert_allclose(np.asarray(chunked), np.asarray(plain), rtol=1e-13)
    # the observable S_0·S_3 on the same state: the same dense check holds for any operator
    corr = spin_correlation(6, 0, 3)
    got = np.asarray(jax.jit(lambda c: local_estimates(log_amp, corr, c))(x))
    expected = dense_local_energy(corr, np.asarray(jax.jit(log_amp)(x)), SpinSpace(6))
    np.testing.assert_allclose(got, expected, rtol=1e-10, atol=1e-12)


def test_bad_configuration_shape_raises():
    op = transverse_field_ising(lattices.chain(4))
    with pytest.raises(ValueError, match=r"\(3, 2, 4\)"):
        local_estimates(lambda c: jnp.zeros(c.shape[0]), op, jnp.ones((3, 2, 4)))
    with pytest.raises(ValueError, match="5 sites"):
        op.connections(jnp.ones((2, 5)))


# --------------------------------------------------------------------------- exact eigenstates


class LookupState(TrialState):
    """A trial state given by a table of log-amplitudes indexed by the configuration code."""

    log_table: Any = None

    def log_amplitude(self, x):
        n = x.shape[-1]
        weights = 2 ** jnp.arange(n - 1, -1, -1)
        index = jnp.sum((x > 0).astype(jnp.int32) * weights, axis=-1)
        return jnp.asarray(self.log_table)[index]


def table_from_vector(vec: np.ndarray, space: SpinSpace) -> np.ndarray:
    """log ψ on all 2^N codes (−inf outside the space); complex when ψ has negative entries."""
    n = space.n_sites
    table = np.full(2**n, -np.inf, dtype=complex)
    table[codes(space.configurations())] = np.log(vec.astype(complex))
    return table if np.any(vec < 0) else table.real


@pytest.mark.parametrize(
    "name,op,space",
    [
        ("tfim", transverse_field_ising(lattices.chain(8), 1.0, 0.6), SpinSpace(8)),
        ("heisenberg-sector", heisenberg(lattices.chain(8), 1.0), SpinSpace(8, magnetisation=0)),
        ("j1j2-square-sector", j1j2(lattices.square(4, 2), 1.0, 0.3, marshall_basis=True), SpinSpace(8, magnetisation=0)),
    ],
)
def test_exact_eigenstate_has_zero_variance_local_energy(name, op, space):
    """For an eigenstate Hψ = Eψ the local energy is E at every configuration (zero-variance
    property, e.g. Becca & Sorella 2017)."""
    e0, vec = reference.ground_state(op, space)
    vec = vec * np.sign(vec[np.argmax(np.abs(vec))])
    assert np.min(np.abs(vec)) > 1e-10, "the lookup needs ψ ≠ 0 on the space"
    model = LookupState(log_table=table_from_vector(vec, space))
    x = jnp.asarray(space.configurations())
    e_loc = np.asarray(jax.jit(lambda c: op.local_energy(lambda y: model.apply({}, y), c))(x))
    np.testing.assert_allclose(e_loc, e0, atol=1e-8 * abs(e0))
    assert float(pl.reduce.sample_variance(jnp.asarray(e_loc))) < 1e-14
    # a perturbed state is no eigenstate: its local energy fluctuates (the check can fail)
    bumped = LookupState(log_table=table_from_vector(vec * (1 + 0.05 * np.cos(np.arange(len(vec)))), space))
    e_bumped = np.asarray(jax.jit(lambda c: op.local_energy(lambda y: bumped.apply({}, y), c))(x))
    assert np.std(e_bumped) > 1e-3
