"""Fast amplitude updates (psiloom.states.fast, RBM.fast_updates) against full re-evaluation.

References used here:
* the RBM amplitude with the hidden units traced out, ψ(x) = exp(a·x) Π_j 2 cosh(θ_j),
  θ = xW + b (Carleo & Troyer, Science 355, 602 (2017), Eq. 2), evaluated directly with
  NumPy's cosh as an independent implementation of the amplitude ratios;
* the variational identity Σ_x |ψ(x)|² E_loc(x) / Σ_x |ψ(x)|² = ⟨ψ|H|ψ⟩/⟨ψ|ψ⟩ (textbook VMC),
  with the right-hand side from a dense matrix-vector product in NumPy.
Equality of the fast and generic code paths is asserted to float64 rounding (common practice:
a few hundred ulps of the magnitudes involved).
"""

import functools
import re

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import psiloom as pl
from psiloom.sampling import ChainState
from psiloom.states import RBM, BoundState, fast_updates_of
from psiloom.states.fast import values_at

N_SITES, N_BATCH, K_SITES = 10, 6, 3


def _wrap_phase(d):
    """Imaginary parts of log-amplitudes are defined modulo 2π."""
    return np.real(d) + 1j * (np.mod(np.imag(d) + np.pi, 2 * np.pi) - np.pi)


def _model(complex_params: bool, scale: float = 0.4):
    model = RBM(alpha=2, complex_params=complex_params, init_scale=scale)
    space = pl.spaces.SpinSpace(N_SITES)
    variables = model.init(jax.random.PRNGKey(3), space.random(jax.random.PRNGKey(0), 1))
    return model, variables


_MODELS = {flag: _model(flag) for flag in (False, True)}


@jax.jit
def _fast_real(variables, x, sites, new_values):
    fast = fast_updates_of(BoundState(_MODELS[False][0], variables))
    return fast.update(values_at(x, sites), fast.init(x), sites, new_values)


@jax.jit
def _fast_complex(variables, x, sites, new_values):
    fast = fast_updates_of(BoundState(_MODELS[True][0], variables))
    return fast.update(values_at(x, sites), fast.init(x), sites, new_values)


@functools.partial(jax.jit, static_argnums=0)
def _fresh_cache(model, variables, x):
    return fast_updates_of(BoundState(model, variables)).init(x)


def _numpy_log_psi(variables, x):
    """log ψ straight from the RBM formula with NumPy (independent of psiloom's log_two_cosh)."""
    p = jax.tree_util.tree_map(np.asarray, variables["params"])
    theta = x @ p["kernel"] + p["hidden_bias"]
    return x @ p["visible_bias"] + np.sum(np.log(2.0 * np.cosh(theta)), axis=-1)


@st.composite
def _changes(draw):
    """A batch of ±1 configurations and, per row, up to K distinct sites (−1 padded) with new values."""
    spins = draw(st.lists(st.sampled_from([-1.0, 1.0]), min_size=N_BATCH * N_SITES, max_size=N_BATCH * N_SITES))
    x = np.array(spins).reshape(N_BATCH, N_SITES)
    sites = np.full((N_BATCH, K_SITES), -1, dtype=np.int32)
    new_values = np.ones((N_BATCH, K_SITES))
    for row in range(N_BATCH):
        chosen = draw(st.lists(st.integers(0, N_SITES - 1), max_size=K_SITES, unique=True))
        slots = draw(st.permutations(list(range(K_SITES))))[: len(chosen)]  # padding anywhere
        for slot, site in zip(slots, chosen):
            sites[row, slot] = site
            new_values[row, slot] = draw(st.sampled_from([-1.0, 1.0]))  # may equal the old value
    return x, sites, new_values


def _apply(x, sites, new_values):
    x_new = x.copy()
    for row in range(x.shape[0]):
        for site, value in zip(sites[row], new_values[row]):
            if site >= 0:
                x_new[row, site] = value
    return x_new


@pytest.mark.parametrize("complex_params", [False, True])
@settings(max_examples=15)
@given(change=_changes())
def test_fast_ratio_equals_rbm_formula(complex_params, change):
    x, sites, new_values = change
    model, variables = _MODELS[complex_params]
    update = _fast_complex if complex_params else _fast_real
    delta, cache = update(variables, jnp.asarray(x), jnp.asarray(sites), jnp.asarray(new_values))
    x_new = _apply(x, sites, new_values)
    # reference: the amplitude formula of Carleo & Troyer (2017), Eq. 2, in NumPy
    expected = _numpy_log_psi(variables, x_new) - _numpy_log_psi(variables, x)
    diff = _wrap_phase(np.asarray(delta) - expected)
    assert np.max(np.abs(diff)) < 1e-11 * (1.0 + np.max(np.abs(expected)))
    # the cache follows x' (see _assert_cache_of)
    _assert_cache_of(cache, _fresh_cache(model, variables, jnp.asarray(x_new)), rtol=1e-11)


def _assert_cache_of(cache, fresh, rtol):
    """The carried cache is the cache of x' itself: (1 + tanh θ', 1 − tanh θ') per hidden unit."""
    for part in ("plus", "minus"):
        np.testing.assert_allclose(np.asarray(getattr(cache, part)), np.asarray(getattr(fresh, part)),
                                   rtol=rtol, atol=rtol)


# float32 caches (RBM(cache_dtype=jnp.float32)): every factor r_j = (p e^d + q e^-d)/2 carries a
# few float32 roundings (table entry, cache entry, product, sum: 4 ε₃₂ relative), and log Π r sums
# them over the M hidden units: |error of Δ log ψ| ≤ 4 M ε₃₂ + 4 ε₃₂ |Δ| in the worst case
# (errors adding linearly; common practice for a rounding bound).
EPS32 = float(np.finfo(np.float32).eps)


def _float32_bound(n_units, magnitude):
    return 4 * n_units * EPS32 + 4 * EPS32 * np.abs(magnitude)


@pytest.mark.parametrize("cache_dtype, rtol", [(None, 1e-12), (jnp.float32, 40 * 4 * EPS32)])
def test_long_walk_to_huge_hidden_fields_stays_finite_and_exact(cache_dtype, rtol):
    """A chain walking far from where its cache was built: W = 3 u vᵀ (u, v of ±1) on 40 sites,
    from a configuration with u·x = 0 (θ = 0) to x = u (|θ| = 120 for every hidden unit), one
    flip at a time. The summed Δ log ψ equals log ψ(u) − log ψ(x₀) from the amplitude formula
    (Carleo & Troyer 2017, Eq. 2, log 2cosh θ = logaddexp(θ, −θ) in NumPy). A cache kept relative
    to the starting configuration (P ∝ e^{θ − θ₀}) overflows here: eight factors e^{120} per
    logarithm exceed the float64 range; the per-update renormalised pair stays in [0, 2]."""
    n = 40
    rng = np.random.default_rng(10)
    u = rng.choice([-1.0, 1.0], n)
    v = rng.choice([-1.0, 1.0], n)
    x0 = u.copy()
    x0[rng.permutation(n)[: n // 2]] *= -1  # u·x0 = 0
    model = RBM(alpha=1, cache_dtype=cache_dtype)
    variables = model.init(jax.random.PRNGKey(9), jnp.ones((1, n)))
    params = {"kernel": 3.0 * np.outer(u, v), "hidden_bias": np.zeros(n), "visible_bias": np.zeros(n)}
    variables = {"params": jax.tree_util.tree_map(jnp.asarray, params)}
    path = jnp.asarray(np.flatnonzero(x0 != u))

    @jax.jit
    def walk(v, x):
        fast = fast_updates_of(BoundState(model, v))

        def flip(carry, site):
            x, cache, total = carry
            sites = jnp.reshape(site, (1,))
            delta, cache = fast.update(x[:, sites], cache, sites, -x[:, sites])
            return (x.at[:, site].multiply(-1), cache, total + delta), None

        (x, cache, total), _ = jax.lax.scan(flip, (x, fast.init(x), jnp.zeros(x.shape[0])), path)
        return x, cache, total

    x_end, cache, total = walk(variables, jnp.asarray(x0)[None])

    def log_psi(x):
        theta = x @ params["kernel"]
        return np.sum(np.logaddexp(theta, -theta), axis=-1)

    np.testing.assert_array_equal(np.asarray(x_end)[0], u)
    assert np.min(np.abs(u @ params["kernel"])) == 120.0  # every hidden field ends at ±120
    expected = log_psi(u) - log_psi(x0)
    assert np.isfinite(float(total[0]))
    # 20 flips, each Δ computed with relative error ≤ 4·40 ε (float32 cache; see _float32_bound)
    np.testing.assert_allclose(float(total[0]), expected, rtol=rtol)
    assert np.all((np.asarray(cache.plus) >= 0) & (np.asarray(cache.plus) <= 2))
    assert cache.plus.dtype == (cache_dtype or jnp.float64)


_MODELS_FLOAT32_CACHE = {
    flag: (RBM(alpha=2, complex_params=flag, init_scale=0.4, cache_dtype=jnp.float32), _MODELS[flag][1])
    for flag in (False, True)
}


@functools.partial(jax.jit, static_argnums=0)
def _fast_float32(complex_params, variables, x, sites, new_values):
    fast = fast_updates_of(BoundState(_MODELS_FLOAT32_CACHE[complex_params][0], variables))
    return fast.update(values_at(x, sites), fast.init(x), sites, new_values)


@pytest.mark.parametrize("complex_params", [False, True])
@settings(max_examples=15)
@given(change=_changes())
def test_float32_cache_ratio_equals_rbm_formula(complex_params, change):
    """With float32 tables and caches the ratios stay within the rounding bound of the amplitude
    formula (Carleo & Troyer 2017, Eq. 2, in NumPy float64); Δ log ψ and the parameters stay
    float64/complex128, the cache is float32/complex64."""
    x, sites, new_values = change
    model, variables = _MODELS_FLOAT32_CACHE[complex_params]
    delta, cache = _fast_float32(complex_params, variables, jnp.asarray(x), jnp.asarray(sites),
                                 jnp.asarray(new_values))
    assert delta.dtype == (jnp.complex128 if complex_params else jnp.float64)
    assert cache.plus.dtype == (jnp.complex64 if complex_params else jnp.float32)
    expected = _numpy_log_psi(variables, _apply(x, sites, new_values)) - _numpy_log_psi(variables, x)
    diff = np.abs(_wrap_phase(np.asarray(delta) - expected))
    m = variables["params"]["kernel"].shape[1]
    assert np.all(diff <= _float32_bound(m, expected)), (diff, _float32_bound(m, expected))


@pytest.mark.parametrize("bad", ["float16", jnp.int32, "complex64", 3, "nonsense"])
def test_bad_cache_dtype_is_named(bad):
    x = jnp.ones((1, 4))
    for model in (RBM(alpha=1, cache_dtype=bad),
                  pl.states.TranslationInvariantRBM(pl.lattices.chain(4), alpha=1, cache_dtype=bad)):
        with pytest.raises(ValueError, match=re.escape(f"cache_dtype must be float32, float64 or None, got {bad!r}")):
            model.init(jax.random.PRNGKey(0), x)


def test_fast_ratio_with_large_weights_and_shared_sites():
    """Weights of order 3 (|θ| up to ~30, where tanh θ rounds to ±1): no cancellation."""
    model = RBM(alpha=2, complex_params=False, init_scale=3.0)
    x = pl.spaces.SpinSpace(N_SITES).random(jax.random.PRNGKey(5), 32)
    variables = model.init(jax.random.PRNGKey(6), x[:1])
    sites = jnp.array([4, -1, 7])  # the same sites in every sample (the local-energy layout)

    @jax.jit
    def change(v, x):
        fast = fast_updates_of(BoundState(model, v))
        return fast.update(x[:, jnp.array([4, 0, 7])], fast.init(x), sites, -x[:, jnp.array([4, 0, 7])])[0]

    delta = change(variables, x)
    x_new = np.asarray(x).copy()
    x_new[:, [4, 7]] *= -1
    expected = _numpy_log_psi(variables, x_new) - _numpy_log_psi(variables, np.asarray(x))
    assert np.max(np.abs(expected)) > 20  # the test really probes large ratios
    np.testing.assert_allclose(np.asarray(delta), expected, rtol=1e-12, atol=1e-11)


def test_generic_states_take_the_generic_path():
    jastrow = pl.states.TwoBodyJastrow()
    x = pl.spaces.SpinSpace(6).random(jax.random.PRNGKey(0), 2)
    variables = jastrow.init(jax.random.PRNGKey(1), x)
    assert fast_updates_of(BoundState(jastrow, variables)) is None
    rbm, rbm_vars = _MODELS[False]
    assert fast_updates_of(BoundState(rbm, rbm_vars, fast=False)) is None
    assert fast_updates_of(pl.states.BoundState(rbm, rbm_vars)) is not None
    assert fast_updates_of(lambda x: rbm.apply(rbm_vars, x)) is None  # a plain function
    assert ChainState(x, jnp.zeros(2)).cache is None  # old two-field construction still works


# ----------------------------------------------------------------------------- Metropolis
@pytest.mark.parametrize("constrained, complex_params, order",
                         [(False, False, "random"), (True, True, "random"), (True, False, "sequential"),
                          (False, True, "sequential")])
def test_fast_metropolis_chain_equals_generic_chain(constrained, complex_params, order):
    """The JAX fast path, the compiled sweeps (real parameters) and full re-evaluation give the
    same chain from the same key."""
    lat = pl.lattices.chain(12)
    space = pl.spaces.SpinSpace(12, magnetisation=0 if constrained else None)
    model = RBM(alpha=1, complex_params=complex_params, init_scale=0.3)
    variables = model.init(jax.random.PRNGKey(2), space.random(jax.random.PRNGKey(0), 1))
    runs = {}
    for path, fast, compiled in (("compiled", True, True), ("jax", True, False), ("generic", False, False)):
        sampler = pl.sampling.MetropolisChains(space, n_chains=8, bonds=lat.bonds if constrained else None,
                                                order=order, compiled_sweeps=compiled)
        amp = BoundState(model, variables, fast=fast)
        state = sampler.init(jax.random.PRNGKey(7), amp)
        assert (state.cache is None) == (not fast)
        runs[path] = jax.jit(lambda s, k: sampler.sample(k, s, amp, 10))(state, jax.random.PRNGKey(8))
    assert (fast_updates_of(BoundState(model, variables)).dense_rbm is None) == complex_params
    xs_g, logs_g, _, acc_g = runs["generic"]
    assert 0.05 < float(acc_g) < 0.95  # a chain that actually moves and rejects
    for path in ("compiled", "jax"):
        xs_f, logs_f, end_f, acc_f = runs[path]
        np.testing.assert_array_equal(np.asarray(xs_f), np.asarray(xs_g))
        assert float(acc_f) == float(acc_g)
        diff = _wrap_phase(np.asarray(logs_f) - np.asarray(logs_g))
        assert np.max(np.abs(diff)) < 1e-11
        # after many accepted updates the carried cache still equals a fresh one
        _assert_cache_of(end_f.cache, _fresh_cache(model, variables, end_f.x), rtol=1e-10)


# ----------------------------------------------------------------------------- local energies
def _hamiltonians():
    chain, square = pl.lattices.chain(10), pl.lattices.square(3, 4)
    return {
        "heisenberg-chain": (pl.operators.heisenberg(chain, marshall_basis=True), chain, 0),
        "tfim-chain": (pl.operators.transverse_field_ising(chain, 1.0, 0.7), chain, None),
        "j1j2-chain": (pl.operators.j1j2(chain, 1.0, 0.4, marshall_basis=False), chain, 0),
        "heisenberg-square": (pl.operators.heisenberg(pl.lattices.square(4), marshall_basis=True), pl.lattices.square(4), 0),
        "tfim-square": (pl.operators.transverse_field_ising(square, 1.0, 3.0), square, None),
        "j1j2-square": (pl.operators.j1j2(pl.lattices.square(4), 1.0, 0.5, marshall_basis=False), pl.lattices.square(4), 0),
    }


@pytest.mark.parametrize(
    "name, complex_params",
    [("heisenberg-chain", False), ("tfim-chain", True), ("j1j2-chain", False),
     ("heisenberg-square", True), ("tfim-square", False), ("j1j2-square", True)],
)
def test_fast_local_energy_equals_generic(name, complex_params):
    hamiltonian, lattice, sz = _hamiltonians()[name]
    space = pl.spaces.SpinSpace(lattice.n_sites, magnetisation=sz)
    model = RBM(alpha=2, complex_params=complex_params, init_scale=0.3)
    variables = model.init(jax.random.PRNGKey(4), space.random(jax.random.PRNGKey(0), 1))
    x = space.random(jax.random.PRNGKey(9), 40)

    @jax.jit
    def both(v, x):
        fast = hamiltonian.local_energy(BoundState(model, v), x, chunk=16)
        generic = hamiltonian.local_energy(BoundState(model, v, fast=False), x)
        return fast, generic

    fast, generic = both(variables, x)
    scale = np.max(np.abs(np.asarray(generic)))
    np.testing.assert_allclose(np.asarray(fast), np.asarray(generic), rtol=0, atol=1e-12 * scale)


def test_fast_local_energy_gives_the_variational_energy_exactly():
    """Σ_x |ψ|² E_loc / Σ_x |ψ|² over all 2^8 states equals ψ†Hψ/ψ†ψ from the dense matrix."""
    lattice = pl.lattices.chain(8)
    space = pl.spaces.SpinSpace(8)
    hamiltonian = pl.operators.transverse_field_ising(lattice, 1.0, 0.8) + pl.operators.heisenberg(lattice, 0.5)
    model = RBM(alpha=1, complex_params=True, init_scale=0.4)
    variables = model.init(jax.random.PRNGKey(11), space.random(jax.random.PRNGKey(0), 1))
    states = jnp.asarray(space.configurations())
    e_loc = jax.jit(lambda v, x: hamiltonian.local_energy(BoundState(model, v), x, chunk=128))(variables, states)
    e_loc = np.asarray(e_loc)
    psi = np.exp(_numpy_log_psi(variables, np.asarray(states)))  # NumPy amplitude (Carleo & Troyer Eq. 2)
    weights = np.abs(psi) ** 2
    vmc = np.sum(weights * e_loc) / np.sum(weights)
    dense = np.vdot(psi, hamiltonian.dense_matrix(space) @ psi) / np.vdot(psi, psi)
    assert abs(vmc - dense) < 1e-11 * abs(dense)


def test_uniform_state_local_energy_closed_form():
    """Zero RBM weights give ψ = const; for H = −J Σ σᶻσᶻ − h Σ σˣ (Pauli),
    E_loc(x) = −J Σ_⟨ij⟩ x_i x_j − h N exactly (every σˣ connection has ratio 1)."""
    lattice = pl.lattices.square(3, 4)
    space = pl.spaces.SpinSpace(lattice.n_sites)
    model = RBM(alpha=1)
    variables = model.init(jax.random.PRNGKey(0), space.random(jax.random.PRNGKey(0), 1))
    variables = jax.tree_util.tree_map(jnp.zeros_like, variables)
    x = space.random(jax.random.PRNGKey(1), 25)
    tfim = pl.operators.transverse_field_ising(lattice, 1.3, 0.6)
    e_loc = jax.jit(lambda v, x: tfim.local_energy(BoundState(model, v), x))(variables, x)
    xn = np.asarray(x)
    bonds = np.asarray(lattice.bonds)
    expected = -1.3 * np.sum(xn[:, bonds[:, 0]] * xn[:, bonds[:, 1]], axis=1) - 0.6 * lattice.n_sites
    np.testing.assert_allclose(np.asarray(e_loc), expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize("working_set, chunk", [(None, None), (None, 7), (1, None), (16 * 41 * 5, None)])
def test_fast_local_energy_blocks_equal_one_generic_batch(monkeypatch, working_set, chunk):
    """The fast path evaluates samples in blocks (a power of two sized by the cache, at most
    ``chunk``) and connections CONNECTION_BLOCK at a time; any blocking, with padding of a batch
    (37 samples) that no block size divides, gives the generic path's values."""
    from psiloom.operators import local as local_module

    if working_set is not None:
        monkeypatch.setattr(local_module, "FAST_WORKING_SET", working_set)
    lattice = pl.lattices.chain(10)
    hamiltonian = pl.operators.heisenberg(lattice) + pl.operators.transverse_field_ising(lattice, 0.3, 0.7)
    model = RBM(alpha=2, complex_params=True, init_scale=0.3)
    space = pl.spaces.SpinSpace(lattice.n_sites)
    variables = model.init(jax.random.PRNGKey(5), space.random(jax.random.PRNGKey(0), 1))
    x = space.random(jax.random.PRNGKey(6), 37)
    fast = jax.jit(lambda v, x: hamiltonian.local_energy(BoundState(model, v), x, chunk=chunk))(variables, x)
    generic = jax.jit(lambda v, x: hamiltonian.local_energy(BoundState(model, v, fast=False), x))(variables, x)
    scale = np.max(np.abs(np.asarray(generic)))
    np.testing.assert_allclose(np.asarray(fast), np.asarray(generic), rtol=0, atol=1e-12 * scale)
    # the block size itself: the largest power of two within the working set (cache: 2·20 + 1
    # numbers per sample for alpha=2 on 10 sites), never above the caller's chunk
    per_sample = 2 * 20 + 1
    fits = max(1, local_module.FAST_WORKING_SET // (local_module.CONNECTION_BLOCK * per_sample))
    expected = 2 ** int(np.floor(np.log2(fits)))
    assert local_module._fast_chunk(fast_updates_of(BoundState(model, variables)), x) == expected
    if working_set == 16 * 41 * 5:
        assert expected == 4


def test_flip_table_describes_the_connections():
    for hamiltonian, lattice, _ in _hamiltonians().values():
        x = pl.spaces.SpinSpace(lattice.n_sites).random(jax.random.PRNGKey(2), 5)
        x_conn, mels = hamiltonian.connections(np.asarray(x))
        table = hamiltonian.flip_table
        assert table.shape == (hamiltonian.n_connections, table.shape[1]) and table.dtype == np.int32
        for g, sites in enumerate(table):
            expected = np.asarray(x).copy()
            expected[:, sites[sites >= 0]] *= -1
            np.testing.assert_array_equal(x_conn[:, g, :], expected)
        np.testing.assert_array_equal(hamiltonian.matrix_elements(np.asarray(x)), mels)


# ----------------------------------------------------------------------------- training
# float32 cache: local energies within the rounding bound of 10 hidden units; SR (shift 1e-2)
# can amplify a change of the force by up to 1/shift = 100 in the parameter update
@pytest.mark.parametrize("cache_dtype, energy_rtol, param_rtol",
                         [(None, 1e-11, 1e-9), (jnp.float32, 4 * 10 * EPS32, 100 * 4 * 10 * EPS32)])
def test_training_with_fast_path_equals_generic_path(cache_dtype, energy_rtol, param_rtol):
    lattice = pl.lattices.chain(10)
    space = pl.spaces.SpinSpace(10, magnetisation=0)
    hamiltonian = pl.operators.heisenberg(lattice, marshall_basis=True)
    results = {}
    for fast in (True, False):
        sampler = pl.sampling.MetropolisChains(space, n_chains=8, bonds=lattice.bonds)
        optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05))
        search = pl.train.GroundStateSearch(RBM(alpha=1, cache_dtype=cache_dtype), hamiltonian, sampler, optimizer,
                                            n_samples=128, fast=fast)
        results[fast] = search.run(3, key=jax.random.PRNGKey(1), progress=False)
    (state_f, hist_f), (state_g, hist_g) = results[True], results[False]
    np.testing.assert_allclose(hist_f["energy"], hist_g["energy"], rtol=energy_rtol)
    np.testing.assert_array_equal(hist_f["acceptance"], hist_g["acceptance"])
    for a, b in zip(jax.tree_util.tree_leaves(state_f.params), jax.tree_util.tree_leaves(state_g.params)):
        np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=param_rtol, atol=1e-3 * param_rtol)
        assert a.dtype == jnp.float64  # the cache's precision never reaches the parameters
    assert state_f.chains.cache is not None and state_g.chains.cache is None
    if cache_dtype is not None:
        assert state_f.chains.cache.plus.dtype == cache_dtype


# ----------------------------------------------------------------------------- tied-weight RBM
def _assert_fast_equals_generic(model, lattice, space, orders, n_chains, n_per_chain, tol):
    """Heisenberg local energies and whole Metropolis chains (one per proposal order) of
    ``model`` agree between the fast and the generic path; the chains really move."""
    variables = model.init(jax.random.PRNGKey(3), space.random(jax.random.PRNGKey(4), 1))
    assert fast_updates_of(BoundState(model, variables)) is not None
    ham = pl.operators.heisenberg(lattice, marshall_basis=False)
    x = space.random(jax.random.PRNGKey(5), 12)
    fast = ham.local_energy(BoundState(model, variables), x)
    generic = ham.local_energy(BoundState(model, variables, fast=False), x)
    np.testing.assert_allclose(np.asarray(fast), np.asarray(generic), rtol=tol, atol=tol)
    for order in orders:
        sampler = pl.sampling.MetropolisChains(space, n_chains=n_chains, bonds=lattice.bonds, order=order)
        runs = {}
        for use_fast in (True, False):
            amp = BoundState(model, variables, fast=use_fast)
            runs[use_fast] = sampler.sample(jax.random.PRNGKey(6), sampler.init(jax.random.PRNGKey(7), amp), amp,
                                            n_per_chain)
        np.testing.assert_array_equal(np.asarray(runs[True][0]), np.asarray(runs[False][0]))
        assert 0.05 < float(runs[False][3]) < 0.95
        diff = _wrap_phase(np.asarray(runs[True][1]) - np.asarray(runs[False][1]))
        assert np.max(np.abs(diff)) < 10 * tol


@pytest.mark.parametrize("with_flips, complex_params", [(False, True), (True, False)])
def test_translation_invariant_rbm_fast_path_equals_generic(with_flips, complex_params):
    """The weight-shared RBM reuses the dense RBM's fast updates on its tied kernel: local energies
    and a whole Metropolis chain agree with full re-evaluation."""
    lat = pl.lattices.chain(10)
    group = pl.symmetry.translations(lat)
    if with_flips:
        group = pl.symmetry.product(pl.symmetry.space_group(lat), pl.symmetry.spin_flip(lat))
    model = pl.states.TranslationInvariantRBM(group, alpha=2, complex_params=complex_params, init_scale=1.0)
    _assert_fast_equals_generic(model, lat, pl.spaces.SpinSpace(10, magnetisation=0), ("sequential",), 6, 6, 1e-11)


@pytest.mark.parametrize("sector_kind, complex_params, activation",
                         [("invariant", True, "log_cosh"), ("momentum", False, "log_cosh"), ("invariant", True, "tanh")])
def test_one_layer_group_conv_net_fast_path_equals_generic(sector_kind, complex_params, activation):
    """The one-layer equivariant net moves its lift's pre-activations by the changed sites' rows:
    local energies and whole Metropolis chains agree with full re-evaluation, for an invariant
    state with complex kernels, for a momentum sector (complex characters, real kernels), and
    with another activation than log cosh (the path that re-applies it)."""
    lat = pl.lattices.chain(10)
    group = pl.symmetry.product(pl.symmetry.translations(lat), pl.symmetry.spin_flip(lat))
    symmetry = group if sector_kind == "invariant" else pl.symmetry.sector(pl.symmetry.translations(lat),
                                                                           (2 * np.pi / 5,))
    act = pl.states.equivariant.log_cosh if activation == "log_cosh" else jnp.tanh
    model = pl.states.GroupConvNet(symmetry, features=(3,), complex_params=complex_params, init_scale=1.0,
                                   activation=act)
    _assert_fast_equals_generic(model, lat, pl.spaces.SpinSpace(10, magnetisation=0), ("random", "sequential"), 6,
                                6, 1e-11)


def test_deeper_group_conv_net_takes_generic_path():
    """After a group convolution every feature depends on every site: no fast updates."""
    lat = pl.lattices.chain(6)
    model = pl.states.GroupConvNet(pl.symmetry.translations(lat), features=(2, 2))
    variables = model.init(jax.random.PRNGKey(0), jnp.ones((1, 6)))
    assert fast_updates_of(BoundState(model, variables)) is None


# ----------------------------------------------------------------------------- projected states
@pytest.mark.parametrize(
    "base_kind, sector_kind, parity",
    [("invariant", "A1", 1), ("invariant", "B1", None), ("rbm", "momentum", None), ("rbm", "A1", -1),
     ("invariant_float32_cache", "A1", 1)],
)
def test_symmetrized_fast_path_equals_generic(base_kind, sector_kind, parity):
    """The projection of a state with fast updates has them too: local energies and whole
    Metropolis chains agree with full re-evaluation of Σ_g χ(g) ψ(g·x) (real and complex sums)."""
    lat = pl.lattices.square(3)
    tol = 1e-10
    if base_kind == "invariant":
        base = pl.states.TranslationInvariantRBM(lat, alpha=2, init_scale=1.0)
    elif base_kind == "invariant_float32_cache":
        base = pl.states.TranslationInvariantRBM(lat, alpha=2, init_scale=1.0, cache_dtype=jnp.float32)
        tol = _float32_bound(2 * 2 * 9 * 8, 1.0)  # 2 filters x 9 translations x 8 point-group x 2 flip images
    else:
        base = RBM(alpha=1, complex_params=True, init_scale=0.3)
    if sector_kind == "momentum":
        sector = pl.symmetry.sector(pl.symmetry.translations(lat), (2 * np.pi / 3, 0.0))
    else:
        sector = pl.symmetry.sector(pl.symmetry.point_group(lat), None, sector_kind)
    model = pl.states.Symmetrized(base, sector, spin_parity=parity)
    variables = model.init(jax.random.PRNGKey(0), jnp.ones((1, 9)))
    assert fast_updates_of(BoundState(model, variables)) is not None
    _assert_fast_equals_generic(model, lat, pl.spaces.SpinSpace(9, magnetisation=0.5), ("random", "sequential"), 4, 5,
                                tol)


def test_symmetrized_without_base_fast_path_takes_generic_path():
    lat = pl.lattices.chain(6)
    model = pl.states.Symmetrized(pl.states.TwoBodyJastrow(), pl.symmetry.translations(lat))
    variables = model.init(jax.random.PRNGKey(0), pl.spaces.SpinSpace(6).random(jax.random.PRNGKey(1), 1))
    assert fast_updates_of(BoundState(model, variables)) is None
