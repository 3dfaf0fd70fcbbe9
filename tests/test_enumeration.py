"""Exact sums over an enumerated space (psiloom.sampling.ExactEnumeration) against scipy's
sparse matrices: the weighted energy is the Rayleigh quotient, the weighted gradient its
derivative, and the weighted geometry is the exact S and force; H2 in STO-3G reaches PySCF FCI."""

import jax
import jax.flatten_util
import jax.numpy as jnp
import numpy as np
import optax
import pytest

import psiloom as pl
from psiloom import fermions as fm
from psiloom.optimize.gradient import SampleGeometry, energy_gradient
from psiloom.states import BoundState


def _hubbard_problem():
    lattice = pl.lattices.chain(4)
    space = fm.FermionSpace(4, 2, 2)
    return space, fm.hubbard(lattice, t=1.0, U=4.0)


def _random_state(space):
    # a random backflow state: its heads start at zero, so perturb every parameter
    model = fm.BackflowDeterminant(space, hidden=6, jastrow=True)
    params = model.init(jax.random.PRNGKey(1), space.random(jax.random.PRNGKey(2), 1))
    leaves, tree = jax.tree_util.tree_flatten(params)
    keys = jax.random.split(jax.random.PRNGKey(3), len(leaves))
    leaves = [v + 0.3 * jax.random.normal(k, v.shape, v.dtype) for v, k in zip(leaves, keys)]
    return model, jax.tree_util.tree_unflatten(tree, leaves)


def _rayleigh(apply, params, matrix, x):
    psi = np.asarray(jnp.exp(apply(params, x)))
    return float(np.real(np.vdot(psi, matrix @ psi) / np.vdot(psi, psi)))


def test_exact_sums_match_the_sparse_matrix():
    """Energy = Rayleigh quotient ψ†Hψ/ψ†ψ (scipy CSR), local energies = the connection-based
    ones, gradient = finite differences of the Rayleigh quotient, S and F from their definitions."""
    space, H = _hubbard_problem()
    model, params = _random_state(space)
    apply = jax.jit(model.apply)
    sampler = pl.sampling.ExactEnumeration(space)
    x = jnp.asarray(space.configurations())
    assert sampler.n_chains == space.size == 36
    matrix = H.sparse_matrix(space)  # scipy CSR, same basis order
    logs = apply(params, x)
    e_loc, w = sampler.local_energies(H, logs), sampler.weights(logs)
    assert float(jnp.sum(w)) == pytest.approx(1.0, abs=1e-12)
    energy = float(jnp.real(jnp.sum(w * e_loc)))
    assert energy == pytest.approx(_rayleigh(apply, params, matrix, x), abs=1e-10)
    direct = jax.jit(lambda p, x, l: H.local_energy(BoundState(model, p), x, l))(params, x, logs)
    np.testing.assert_allclose(np.asarray(e_loc), np.asarray(direct), rtol=1e-9, atol=1e-9)
    est = pl.stats.weighted_estimate(e_loc, w)
    assert float(est.error) == 0.0 and float(jnp.real(est.mean)) == pytest.approx(energy, abs=1e-12)

    _, grad = jax.jit(lambda p: energy_gradient(model.apply, p, x, e_loc, w))(params)
    flat, unravel = jax.flatten_util.ravel_pytree(params)
    g = np.asarray(jax.flatten_util.ravel_pytree(grad)[0])
    rng = np.random.default_rng(0)
    for _ in range(2):  # central differences along random directions
        d, h = rng.standard_normal(flat.shape), 1e-5
        fd = (_rayleigh(apply, unravel(flat + h * d), matrix, x) - _rayleigh(apply, unravel(flat - h * d), matrix, x)) / (2 * h)
        assert float(g @ d) == pytest.approx(fd, rel=1e-5, abs=1e-7)

    v = jnp.asarray(rng.standard_normal(flat.shape))

    @jax.jit
    def geometry_pieces(p, v):
        geometry = SampleGeometry(model.apply, p, x, e_loc, weights=w)
        return (geometry.log_derivatives(), geometry.jacobian(), geometry.residual(), geometry.s_matvec(v),
                geometry.s_operator()(v))

    o, jac, res, sv, sv_op = geometry_pieces(params, v)
    do = o - w @ o  # S = Re Σ w (O − Ō)* (O − Ō); F = Xᵀ ε = ½ ∇E
    s_exact = np.real(np.asarray((jnp.conj(do) * w[:, None]).T @ do))
    np.testing.assert_allclose(np.asarray(jac.T @ jac), s_exact, atol=1e-10)
    np.testing.assert_allclose(np.asarray(jac.T @ res), 0.5 * g, atol=1e-10)
    np.testing.assert_allclose(np.asarray(sv), s_exact @ np.asarray(v), atol=1e-9)
    np.testing.assert_allclose(np.asarray(sv_op), s_exact @ np.asarray(v), atol=1e-9)


def test_enumeration_bad_input():
    with pytest.raises(ValueError, match="limited"):
        pl.sampling.ExactEnumeration(fm.FermionSpace(20, 10, 10))
    with pytest.raises(TypeError, match="configurations"):
        pl.sampling.ExactEnumeration(object())
    space, _ = _hubbard_problem()
    sampler = pl.sampling.ExactEnumeration(space)
    with pytest.raises(TypeError, match="sparse_matrix"):
        sampler.local_energies(object(), jnp.zeros(space.size))


def test_h2_sto3g_backflow_with_exact_sums_reaches_fci():
    pytest.importorskip("pyscf", reason="molecular tests need PySCF: pip install 'psiloom[test]' (or [chemistry])")
    # H2 near equilibrium (0.7414 Å, experiment); reference: PySCF's FCI in the same basis
    problem = fm.molecular_hamiltonian([("H", (0.0, 0.0, 0.0)), ("H", (0.0, 0.0, 0.7414))], "sto-3g",
                                       units="angstrom")
    model = fm.BackflowDeterminant(problem.space, problem.hartree_fock_guess(noise=0.1), hidden=4)
    sampler = pl.sampling.ExactEnumeration(problem.space)
    optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-4), optax.sgd(0.1))
    search = pl.train.GroundStateSearch(model, problem.hamiltonian, sampler, optimizer, n_samples=sampler.n_chains)
    state, _ = search.run(60, key=jax.random.PRNGKey(0), progress=False)
    energy, _ = search.evaluate(state, n_samples=sampler.n_chains)
    assert float(energy.error) == 0.0
    assert float(np.real(energy.mean)) == pytest.approx(problem.fci_energy(), abs=1e-4)
