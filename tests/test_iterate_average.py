"""Iterate averaging (psiloom.optimize.iterate_average, averaged_parameters).

References independent of the code under test: the numpy mean of the recorded iterates, and the
variance of the mean of a stationary AR(1) sequence (textbook time-series result, e.g. Box &
Jenkins, Time Series Analysis, ch. 2): for x_t = a x_{t-1} + e_t with Var e = s², the stationary
variance is γ₀ = s²/(1 - a²) and the mean of m consecutive values has variance
γ₀/m · [1 + 2 Σ_{k=1}^{m-1} (1 - k/m) a^k].
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from hypothesis import given, settings, strategies as st

import psiloom as pl
from psiloom.spaces import SpinSpace
from psiloom.states import RBM
from psiloom.train import GroundStateSearch
from psiloom.optimize import averaged_parameters, iterate_average


def run_chain(optimizer, params, grads):
    """Apply ``grads`` in turn; return the final state and the list of iterates after each update."""
    state = optimizer.init(params)
    iterates = []
    for g in grads:
        updates, state = optimizer.update(g, state, params)
        params = optax.apply_updates(params, updates)
        iterates.append(params)
    return state, iterates


@settings(max_examples=25, deadline=None)
@given(start=st.integers(0, 6), n_updates=st.integers(1, 12), seed=st.integers(0, 2 ** 16))
def test_mean_equals_numpy_mean_of_the_iterates(start, n_updates, seed):
    rng = np.random.default_rng(seed)
    params = {"w": jnp.asarray(rng.normal(size=(3, 2))), "c": jnp.asarray(rng.normal(size=4) + 1j * rng.normal(size=4))}
    grads = [{"w": jnp.asarray(rng.normal(size=(3, 2))),
              "c": jnp.asarray(rng.normal(size=4) + 1j * rng.normal(size=4))} for _ in range(n_updates)]
    optimizer = optax.chain(optax.sgd(0.3), iterate_average(start))
    state, iterates = run_chain(optimizer, params, grads)
    averaged = iterates[start:]
    if not averaged:
        with pytest.raises(ValueError, match="holds 0 iterate"):
            averaged_parameters(state)
        return
    mean = averaged_parameters(state)
    for name in params:
        expected = np.mean([np.asarray(p[name]) for p in averaged], axis=0)
        np.testing.assert_allclose(np.asarray(mean[name]), expected, rtol=1e-12, atol=1e-12)
        assert mean[name].dtype == params[name].dtype
    # the updates pass through unchanged
    _, plain = run_chain(optax.sgd(0.3), params, grads)
    for name in params:
        np.testing.assert_array_equal(np.asarray(plain[-1][name]), np.asarray(iterates[-1][name]))


def test_averaging_removes_the_stationary_wander_as_ar1_theory_says():
    # SGD on ½θ² with gradient noise: θ_{t+1} = (1 - η) θ_t - η ξ_t, an AR(1) with a = 1 - η and
    # innovation variance s² = η²σ². 4000 independent replicas (one parameter vector).
    eta, sigma, replicas, start, m = 0.1, 1.0, 4000, 200, 400
    key = jax.random.PRNGKey(7)
    optimizer = optax.chain(optax.sgd(eta), iterate_average(start))
    params = jnp.zeros(replicas)
    state = optimizer.init(params)

    @jax.jit
    def step(carry, k):
        params, state = carry
        grad = params + sigma * jax.random.normal(k, params.shape)
        updates, state = optimizer.update(grad, state, params)
        return (optax.apply_updates(params, updates), state), None

    (params, state), _ = jax.lax.scan(step, (params, state), jax.random.split(key, start + m))
    a, s2 = 1 - eta, (eta * sigma) ** 2
    gamma0 = s2 / (1 - a ** 2)
    k = np.arange(1, m)
    var_mean = gamma0 / m * (1 + 2 * np.sum((1 - k / m) * a ** k))
    last, mean = np.asarray(params), np.asarray(averaged_parameters(state))
    # sample variances over R replicas: relative standard error √(2/(R-1)) (normal theory); 5 of them
    tolerance = 5 * np.sqrt(2 / (replicas - 1))
    assert abs(np.var(last) / gamma0 - 1) < tolerance
    assert abs(np.var(mean) / var_mean - 1) < tolerance
    assert np.var(mean) < 0.2 * np.var(last)  # the point of averaging (here var_mean/γ₀ ≈ 0.047)


def test_state_is_found_at_any_depth_and_only_once():
    params = jnp.ones(3)
    nested = optax.chain(optax.chain(optax.sgd(0.1), iterate_average(0)), optax.identity())
    state, _ = run_chain(nested, params, [jnp.ones(3)] * 2)
    np.testing.assert_allclose(np.asarray(averaged_parameters(state)), (0.9 + 0.8) / 2 * np.ones(3))
    with pytest.raises(ValueError, match="holds 0 iterate_average"):
        averaged_parameters(optax.sgd(0.1).init(params))
    twice = optax.chain(iterate_average(0), iterate_average(0))
    with pytest.raises(ValueError, match="holds 2 iterate_average"):
        averaged_parameters(twice.init(params))


@pytest.mark.parametrize("start", [-1, 1.5, True, "3", None])
def test_bad_start_is_refused(start):
    with pytest.raises(ValueError, match="start must be an integer"):
        iterate_average(start)


@pytest.mark.parametrize("minimum", [0, -2, 2.0, True])
def test_bad_minimum_is_refused(minimum):
    state = iterate_average(0).init(jnp.ones(2))
    with pytest.raises(ValueError, match="minimum must be an integer"):
        averaged_parameters(state, minimum=minimum)


def test_too_few_iterates_is_refused():
    optimizer = optax.chain(optax.sgd(0.1), iterate_average(2))
    state, _ = run_chain(optimizer, jnp.ones(2), [jnp.ones(2)] * 3)
    np.testing.assert_allclose(np.asarray(averaged_parameters(state)), 0.7 * np.ones(2))
    with pytest.raises(ValueError, match="holds 1 iterate"):
        averaged_parameters(state, minimum=2)


def test_update_without_params_is_refused():
    transform = iterate_average(0)
    with pytest.raises(ValueError, match="needs the parameters"):
        transform.update(jnp.ones(2), transform.init(jnp.ones(2)))


def test_in_a_search_the_mean_is_of_the_trained_iterates_and_survives_a_checkpoint(tmp_path):
    # a Heisenberg chain of 6 trained with SR; the parameters recorded after each step are the reference
    lattice = pl.lattices.chain(6)
    sampler = pl.sampling.MetropolisChains(SpinSpace(6, magnetisation=0), n_chains=8, bonds=lattice.bonds, burn_in=1)
    optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05), iterate_average(3))
    search = GroundStateSearch(RBM(alpha=1.0, complex_params=True, init_scale=0.05), pl.operators.heisenberg(lattice),
                               sampler, optimizer, n_samples=64)
    state = search.init(jax.random.PRNGKey(0))
    recorded = []
    for _ in range(7):
        state, _ = search.step(state)
        recorded.append(jax.tree_util.tree_leaves(state.params))
    mean = jax.tree_util.tree_leaves(averaged_parameters(state.opt_state))
    for i, leaf in enumerate(mean):
        expected = np.mean([np.asarray(leaves[i]) for leaves in recorded[3:]], axis=0)
        np.testing.assert_allclose(np.asarray(leaf), expected, rtol=1e-10, atol=1e-12)
    path = str(tmp_path / "averaged.ckpt")
    search.save(path, state)
    restored, _ = search.resume(path)
    for a, b in zip(jax.tree_util.tree_leaves(averaged_parameters(restored.opt_state)), mean):
        np.testing.assert_array_equal(np.asarray(a), np.asarray(b))


def test_numpy_integer_counts_are_accepted():
    # counts read from arrays or configs arrive as NumPy integers; they mean the same as Python ints
    from psiloom.optimize import lowest_variance_window

    assert isinstance(iterate_average(np.int64(3)), type(iterate_average(3)))
    state = iterate_average(np.int32(0)).init(jnp.ones(2))
    with pytest.raises(ValueError, match="holds 0 iterate"):  # accepted as a count; nothing averaged yet
        averaged_parameters(state, minimum=np.int64(1))
    lowest_variance_window(np.int64(4), start=np.int16(2))
