"""Time evolution by the TDVP against the matrix exponential and exact diagonalisation."""

import os

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import psiloom as pl
from psiloom.dynamics import (DiagonalShift, NonFiniteEvolution, PseudoInverse, SignalToNoise, TimeEvolution,
                              product_state_rbm, tdvp_system)
from psiloom.reference import evolve_expectations
from psiloom.states import TrialState

L = 4


class MeanField(TrialState):
    """log ψ(x) = Σ_i a_i x_i with complex a: every product state without zero amplitudes."""

    @nn.compact
    def log_amplitude(self, x):
        a = self.param("a", nn.initializers.normal(0.4), (x.shape[-1],), jnp.complex128)
        return x.astype(a.dtype) @ a


def _field_hamiltonian(n):
    # independent spins in site-dependent fields: product states stay product states, so the
    # mean-field family holds the exact evolution
    terms = [pl.operators.pauli(n, "X", i, -1.0) for i in range(n)]
    terms += [pl.operators.pauli(n, "Z", i, -0.3 * (i + 1)) for i in range(n)]
    return pl.operators.total(terms, n)


def _observables(n):
    sx = pl.operators.total([pl.operators.pauli(n, "X", i) for i in range(n)], n) / n
    return {"sx": sx, "z0": pl.operators.pauli(n, "Z", 0), "y1": pl.operators.pauli(n, "Y", 1)}


@pytest.fixture(scope="module")
def mean_field():
    model = MeanField()
    params = model.init(jax.random.PRNGKey(1), jnp.ones((1, L)))
    space = pl.spaces.SpinSpace(L)
    v0 = pl.reference.state_vector(lambda x: model.apply(params, x), space)
    return model, params, space, v0


@pytest.mark.parametrize("holomorphic", [True, False])
def test_exact_tdvp_of_a_closed_family_matches_matrix_exponential(mean_field, holomorphic):
    # reference: exp(−iHt) by scipy's expm_multiply; RK4 error ~ dt⁴ = 1.6e-7 per unit time
    model, params, space, v0 = mean_field
    h = _field_hamiltonian(L)
    times = np.linspace(0.0, 1.0, 5)
    ref = evolve_expectations(h, v0, times, _observables(L))
    evo = TimeEvolution(model, h, space, integrator="rk4", dt=0.02, holomorphic=holomorphic)
    traj = evo.run(evo.init(params, jax.random.PRNGKey(0)), times, _observables(L))
    np.testing.assert_allclose(traj.times, times)
    for name in ref:
        np.testing.assert_allclose(traj.values[name], ref[name], atol=2e-6)
        assert np.all(traj.errors[name] == 0)
    assert np.ptp(ref["sx"]) > 0.1  # the state really moves
    assert np.nanmax(traj.history["residual"]) < 1e-10  # the family follows exactly: no residual


def test_adaptive_steps_shrink_with_tolerance_and_results_converge(mean_field):
    model, params, space, v0 = mean_field
    h = _field_hamiltonian(L)
    times = np.array([0.0, 1.5])
    ref = evolve_expectations(h, v0, times, _observables(L))["sx"][-1]
    out = {}
    for tol in (1e-3, 1e-6):
        evo = TimeEvolution(model, h, space, integrator="rk23", dt=0.1, tol=tol, holomorphic=True)
        traj = evo.run(evo.init(params, jax.random.PRNGKey(0)), times, _observables(L))
        dts = traj.history["dt"]
        out[tol] = (np.nanmedian(dts), abs(traj.values["sx"][-1] - ref))
    assert out[1e-6][0] < 0.5 * out[1e-3][0]
    assert out[1e-6][1] < out[1e-3][1]
    assert out[1e-6][1] < 1e-4


def test_regularisations_agree_on_a_well_conditioned_system():
    rng = np.random.default_rng(3)
    n, p = 400, 6
    o = jnp.asarray(rng.normal(size=(n, p)) + 1j * rng.normal(size=(n, p)))
    e = jnp.asarray(rng.normal(size=n) + 0.3 * (o[:, 0] * o[:, 1]).real)
    w = jnp.asarray(rng.uniform(0.5, 1.5, size=n))

    @jax.jit
    def solves(o, e, w):
        out = []
        for holo in (True, False):
            sys = tdvp_system(o, e, w, holomorphic=holo)
            out.append((sys.matrix, sys.rhs, [reg.solve(sys) for reg in
                                              (DiagonalShift(1e-12), PseudoInverse(1e-12), SignalToNoise(rcond=1e-12))]))
        noisy = tdvp_system(o, e, None, holomorphic=True)
        return out, SignalToNoise(threshold=50.0).solve(noisy), PseudoInverse(1e-12).solve(noisy)

    out, damped, plain = solves(o, e, w)
    for matrix, rhs, results in out:
        direct = np.linalg.solve(np.asarray(matrix), np.asarray(rhs))
        for result in results:
            np.testing.assert_allclose(result, direct, rtol=1e-8, atol=1e-10)
    assert np.linalg.norm(damped) < np.linalg.norm(plain)  # noise-dominated modes of samples are damped


def test_checkpoint_resume_is_bit_identical_and_nan_keeps_the_last_checkpoint(mean_field, tmp_path):
    model, params, space, _ = mean_field
    h = _field_hamiltonian(L)
    obs = _observables(L)
    evo = TimeEvolution(model, h, space, integrator="heun", dt=0.05, holomorphic=True)
    straight = evo.run(evo.init(params, jax.random.PRNGKey(0)), [0.0, 0.1, 0.2], obs)
    path = str(tmp_path / "evo.ckpt")
    evo.run(evo.init(params, jax.random.PRNGKey(0)), [0.0, 0.1], obs, checkpoint=path)
    state, history = evo.resume(path, params)
    resumed = evo.run(state, [0.1, 0.2], obs, history=history)
    for name in obs:
        np.testing.assert_array_equal(resumed.values[name], straight.values[name])
    np.testing.assert_array_equal(resumed.times, straight.times)

    class Broken:  # a solve that fails: the step must stop and name the time
        def solve(self, system):
            return system.rhs * jnp.nan

    bad = TimeEvolution(model, h, space, integrator="heun", dt=0.05, holomorphic=True, regularisation=Broken())
    with pytest.raises(NonFiniteEvolution, match=r"t = 0\.1\b") as err:
        bad.run(state, [0.1, 0.2], obs, checkpoint=path)
    assert float(err.value.state.time) == pytest.approx(0.1)
    kept, _ = evo.resume(path, params)  # the checkpoint on disk is still the last good state
    assert float(kept.time) == pytest.approx(0.1)
    np.testing.assert_array_equal(kept.params["params"]["a"], state.params["params"]["a"])


@pytest.fixture(scope="module")
def tfim_chain():
    n = 6
    lattice = pl.lattices.chain(n)
    return n, lattice, pl.sampling.MetropolisChains(pl.spaces.SpinSpace(n), n_chains=16, compiled_sweeps=False)


def test_imaginary_time_lowers_the_energy_and_reaches_the_ground_state(tfim_chain):
    # reference: exact diagonalisation (psiloom.reference.ground_state, Lanczos/dense)
    n, lattice, sampler = tfim_chain
    h = pl.operators.transverse_field_ising(lattice, 1.0, 1.0)
    e0 = pl.reference.ground_state(h)[0]
    model = pl.states.RBM(alpha=1)
    params = model.init(jax.random.PRNGKey(0), jnp.ones((1, n)))
    evo = TimeEvolution(model, h, sampler, n_samples=512, integrator="heun", dt=0.05, imaginary=True,
                        regularisation=DiagonalShift(1e-3))
    traj = evo.run(evo.init(params, jax.random.PRNGKey(1)), [0.0, 1.0, 3.0], {"H": h})
    energies = traj.values["H"]
    assert energies[1] < energies[0] - 5 * traj.errors["H"][0]
    v = pl.reference.state_vector(lambda x: model.apply(traj.state.params, x), sampler.space)
    e_final = pl.reference.expectation(h, v)
    assert abs(e_final - e0) / abs(e0) < 1e-3
    assert abs(energies[-1] - e_final) < 5 * traj.errors["H"][-1] + 1e-4


def test_real_time_conserves_energy_within_statistical_error(tfim_chain):
    # exact dynamics conserve ⟨H⟩ (H is the generator); the sampled TDVP must, within its error bars
    n, lattice, sampler = tfim_chain
    h = pl.operators.transverse_field_ising(lattice, 1.0, 0.5)
    model = pl.states.RBM(alpha=1, complex_params=True, init_scale=0.2)
    params = model.init(jax.random.PRNGKey(4), jnp.ones((1, n)))
    v0 = pl.reference.state_vector(lambda x: model.apply(params, x), sampler.space)
    e_start = pl.reference.expectation(h, v0)
    evo = TimeEvolution(model, h, sampler, n_samples=1024, integrator="heun", dt=0.02, holomorphic=True)
    traj = evo.run(evo.init(params, jax.random.PRNGKey(5)), [0.0, 0.2, 0.4], {"H": h})
    z = np.abs(traj.values["H"] - e_start) / traj.errors["H"]
    assert np.all(z < 4), (traj.values["H"], traj.errors["H"], e_start)
    v = pl.reference.state_vector(lambda x: model.apply(traj.state.params, x), sampler.space)
    assert abs(pl.reference.expectation(h, v) - e_start) < 0.05 * abs(e_start)
    rows = np.isfinite(traj.history["dt"])  # the per-step energies agree too
    assert np.all(np.abs(traj.history["energy"][rows] - e_start) < 5 * traj.history["error"][rows])
    assert np.all(np.isfinite(traj.history["residual"][rows]))


# ---------------------------------------------------------------------- bad input
@pytest.fixture(scope="module")
def small_evolution(mean_field):
    model, params, space, _ = mean_field
    evo = TimeEvolution(model, _field_hamiltonian(L), space, integrator="euler", dt=0.1)
    return evo, evo.init(params, jax.random.PRNGKey(0))


@settings(max_examples=15)
@given(st.lists(st.floats(0, 3), min_size=2, max_size=5).filter(lambda t: np.any(np.diff(t) <= 0)))
def test_time_grid_not_increasing_is_refused(small_evolution, times):
    evo, state = small_evolution
    with pytest.raises(ValueError, match="increasing"):
        evo.run(state, times)


@pytest.mark.parametrize("kwargs,match", [
    (dict(integrator="rk45", tol=-1e-3), "tol"),
    (dict(integrator="rk45", tol=0.0), "tol"),
    (dict(integrator="rk45"), "tol"),
    (dict(integrator="rk4", tol=1e-3), "fixed step"),
    (dict(integrator="midpoint-magic"), "integrator"),
    (dict(dt=float("nan")), "dt"),
    (dict(dt=float("inf")), "dt"),
    (dict(dt=-0.1), "dt"),
])
def test_bad_options_are_refused(mean_field, kwargs, match):
    model, _, space, _ = mean_field
    with pytest.raises(ValueError, match=match):
        TimeEvolution(model, _field_hamiltonian(L), space, **kwargs)


def test_observable_outside_the_lattice_and_grid_before_the_state_are_refused(small_evolution):
    evo, state = small_evolution
    with pytest.raises(ValueError, match="outside the lattice"):
        evo.run(state, [0.0, 0.1], {"far": pl.operators.pauli(L + 2, "Z", L + 1)})
    with pytest.raises(ValueError, match="start at or after"):
        evo.run(state._replace(time=jnp.asarray(1.0)), [0.0, 2.0])


def test_product_state_rbm_is_the_requested_product_state():
    # reference: the tensor product of the site amplitudes, built with numpy.kron
    n = 4
    rng = np.random.default_rng(7)
    amps = rng.uniform(0.2, 1.0, size=(n, 2)) * np.exp(1j * rng.uniform(0, 2 * np.pi, size=(n, 2)))
    space = pl.spaces.SpinSpace(n)
    expected = np.ones(1)
    for i in range(n):
        expected = np.kron(expected, amps[i])  # basis order of configurations(): first site slowest, +1 first
    configs = space.configurations()
    order = np.lexsort([-configs[:, i] for i in reversed(range(n))])
    target = np.empty(space.size, complex)
    target[order] = expected
    model = pl.states.RBM(alpha=1, complex_params=True)
    for scale, tol in ((0.0, 1e-12), (1e-3, 1e-5)):
        params = product_state_rbm(model, amps, jax.random.PRNGKey(0), kernel_scale=scale)
        v = pl.reference.state_vector(lambda x: model.apply(params, x), space)
        assert pl.reference.fidelity(v, target) > 1 - tol
    with pytest.raises(ValueError, match="non-zero"):
        product_state_rbm(model, np.array([[1.0, 0.0]] * n), jax.random.PRNGKey(0))
    with pytest.raises(ValueError, match="complex"):
        product_state_rbm(pl.states.RBM(alpha=1), amps, jax.random.PRNGKey(0))


def test_real_time_of_a_real_state_is_refused(mean_field):
    _, _, space, _ = mean_field
    model = pl.states.RBM(alpha=1)
    params = model.init(jax.random.PRNGKey(0), jnp.ones((1, L)))
    evo = TimeEvolution(model, _field_hamiltonian(L), space, dt=0.1)
    with pytest.raises(ValueError, match="complex log"):
        evo.init(params, jax.random.PRNGKey(0))


def test_signal_to_noise_filter_acts_per_eigenmode_as_published():
    # Schmitt & Heyl, PRL 125, 100503 (2020), form from memory: in the eigenbasis S = V diag(σ) V†
    # the force component ρ_k = mean_s Q_sk has SNR_k = |ρ_k| / (std_s Q_sk / √n), and its
    # inverse is damped by 1/(1 + (threshold/SNR_k)⁶), times the soft spectral cut
    # 1/(1 + (rcond σ_max/σ_k)⁶). Built directly in that basis: every mode's factor is known.
    from psiloom.dynamics import TDVPSystem

    rng = np.random.default_rng(11)
    n, p, threshold = 256, 4, 4.0
    v, _ = np.linalg.qr(rng.normal(size=(p, p)) + 1j * rng.normal(size=(p, p)))  # a random unitary basis
    sigma = np.array([1.0, 0.5, 0.2, 1e-3])
    s = (v * sigma) @ v.conj().T
    noise = rng.normal(size=(n, p)) + 1j * rng.normal(size=(n, p))
    noise -= noise.mean(axis=0)
    noise /= np.sqrt(np.mean(np.abs(noise) ** 2, axis=0))  # spread exactly 1 in every mode
    # signal of mode k chosen so that SNR_k = √n |ρ_k| equals these values
    target = np.array([1e3, threshold, 0.5 * threshold, 1e3])
    q = noise + target / np.sqrt(n) * np.exp(1j * np.array([0.3, 1.1, -0.7, 2.0]))
    g = q @ v.T  # per-sample contributions g_s = Σ_k Q_sk V_k, so V_k† g_s = Q_sk
    system = TDVPSystem(jnp.asarray(s), jnp.asarray(g.mean(axis=0)), jnp.asarray(g), jnp.full((n,), 1.0 / n),
                        jnp.asarray(float(n)), jnp.asarray(0j), jnp.asarray(1.0))
    reg = SignalToNoise(threshold=threshold, rcond=1e-2)
    v_j = jnp.asarray(v)
    np.testing.assert_allclose(reg.signal_to_noise(system, v_j), target, rtol=1e-10)
    modes = v.conj().T @ np.asarray(reg.solve(system))
    factor = modes * sigma / q.mean(axis=0)  # what the filter kept of each plain inverse component
    spectral = 1.0 / (1.0 + (1e-2 * sigma.max() / sigma) ** 6)
    snr = 1.0 / (1.0 + (threshold / target) ** 6)
    np.testing.assert_allclose(factor, spectral * snr, rtol=1e-8)
    f = factor.real
    assert f[0] > 0.999 and abs(f[1] - 0.5) < 1e-3 and f[2] < 1 / 64  # kept, halved, cut
    assert f[3] < 2e-6  # (rcond σ_max/σ)⁶ = 10⁶: below the spectral cut, however strong the signal


# ---------------------------------------------------------------------- sums over orbits
def _ring_group(n):
    lattice = pl.lattices.chain(n)
    return lattice, pl.symmetry.product(pl.symmetry.translations(lattice), pl.symmetry.spin_flip(lattice))


@pytest.mark.parametrize("n, expected", [(6, 8), (8, 20), (10, 56)])
def test_orbit_count_of_the_ring_under_rotation_and_complement(n, expected):
    # binary necklaces of length n counted up to rotation and complement: OEIS A000013
    # (1, 1, 2, 2, 4, 4, 8, 10, 20, 30, 56 for n = 0..10; from memory)
    _, group = _ring_group(n)
    orbits = pl.symmetry.OrbitEnumeration(pl.spaces.SpinSpace(n), group)
    assert orbits.size == expected
    assert orbits.multiplicities().sum() == 2 ** n
    assert np.all(len(group) % orbits.multiplicities() == 0)


def test_tdvp_over_orbits_equals_tdvp_over_all_configurations():
    # the orbit sums are a rewriting of the full sums for an invariant state and Hamiltonian:
    # the trajectory, its parameters and the history's energy agree to rounding
    n = 8
    lattice, group = _ring_group(n)
    space = pl.spaces.SpinSpace(n)
    model = pl.states.TranslationInvariantRBM(group, alpha=2, complex_params=True)
    params = model.init(jax.random.PRNGKey(3), jnp.ones((1, n)))
    h = pl.operators.transverse_field_ising(lattice, 1.0, 1.0)
    sx = pl.operators.total([pl.operators.pauli(n, "X", i) for i in range(n)], n) / n
    grid = np.linspace(0.0, 0.3, 4)
    runs = []
    for sampler in (space, pl.symmetry.OrbitEnumeration(space, group)):
        evo = TimeEvolution(model, h, sampler, integrator="rk4", dt=0.05, holomorphic=True)
        runs.append(evo.run(evo.init(params, jax.random.PRNGKey(0)), grid, {"sx": sx}))
    full, orbit = runs
    np.testing.assert_allclose(orbit.values["sx"], full.values["sx"], atol=1e-10)
    np.testing.assert_allclose(orbit.history["energy"], full.history["energy"], atol=1e-9)
    for a, b in zip(jax.tree_util.tree_leaves(orbit.state.params), jax.tree_util.tree_leaves(full.state.params)):
        np.testing.assert_allclose(a, b, atol=1e-8)
    assert np.ptp(np.real(full.values["sx"])) > 1e-2  # the state moved: the comparison is not trivial


def test_orbit_enumeration_refuses_a_state_that_is_not_invariant():
    n = 6
    lattice, group = _ring_group(n)
    model = pl.states.RBM(alpha=1, complex_params=True)  # a dense RBM breaks translations
    params = model.init(jax.random.PRNGKey(1), jnp.ones((1, n)))
    evo = TimeEvolution(model, pl.operators.transverse_field_ising(lattice, 1.0, 1.0),
                        pl.symmetry.OrbitEnumeration(pl.spaces.SpinSpace(n), group), holomorphic=True)
    with pytest.raises(ValueError, match=r"log\|ψ\| is not invariant under the group"):
        evo.init(params, jax.random.PRNGKey(0))


def test_orbit_enumeration_refuses_a_hamiltonian_that_breaks_the_symmetry():
    n = 6
    lattice, group = _ring_group(n)
    model = pl.states.TranslationInvariantRBM(group, alpha=1, complex_params=True)
    params = model.init(jax.random.PRNGKey(1), jnp.ones((1, n)))
    # a field on one site breaks translations (the state itself is invariant)
    h = pl.operators.transverse_field_ising(lattice, 1.0, 1.0) + pl.operators.pauli(n, "X", 0, 0.5)
    orbits = pl.symmetry.OrbitEnumeration(pl.spaces.SpinSpace(n), group)
    with pytest.raises(ValueError, match="the local energy is not invariant"):
        TimeEvolution(model, h, orbits, holomorphic=True).init(params, jax.random.PRNGKey(0))
    # the invariant Hamiltonian passes the same check; an observable on one site does not
    evo = TimeEvolution(model, pl.operators.transverse_field_ising(lattice, 1.0, 1.0), orbits, holomorphic=True)
    state = evo.init(params, jax.random.PRNGKey(0))
    with pytest.raises(ValueError, match="observable 'x0' is not invariant"):
        evo.measure(state, {"x0": pl.operators.pauli(n, "X", 0)})
    sx = pl.operators.total([pl.operators.pauli(n, "X", i) for i in range(n)], n) / n
    values, _, _ = evo.measure(state, {"sx": sx})
    assert np.isfinite(values["sx"])


def test_orbit_enumeration_bad_input():
    _, group = _ring_group(6)
    with pytest.raises(ValueError, match="space has 8 sites, the group acts on 6"):
        pl.symmetry.OrbitEnumeration(pl.spaces.SpinSpace(8), group)
    with pytest.raises(ValueError, match="magnetisation=1"):
        pl.symmetry.OrbitEnumeration(pl.spaces.SpinSpace(6, magnetisation=1), group)
    with pytest.raises(TypeError, match="SymmetryGroup"):
        pl.symmetry.OrbitEnumeration(pl.spaces.SpinSpace(6), "T x Z2")
