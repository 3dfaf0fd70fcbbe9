"""lowest_variance_window: the mean parameters of the stretch of updates with the lowest mean
local-energy variance.

The reference is numpy on the recorded sequence: split the updates after ``start`` into
consecutive windows of ``window``, take the window with the smallest mean of σ²_t = ‖ε_res,t‖²
(the variance of the local energies, SampleGeometry.residual's definition) and average its θ_t.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from hypothesis import given, settings, strategies as st

import psiloom as pl
from psiloom.optimize import lowest_variance_window, selected_parameters
from psiloom.spaces import SpinSpace
from psiloom.states import RBM
from psiloom.train import GroundStateSearch


class ResidualGeometry:
    """What the transformation reads from a SampleGeometry: the residual ε_res."""

    def __init__(self, residual):
        self._r = jnp.asarray(residual)

    def residual(self):
        return self._r


def numpy_selection(thetas, variances, window, start):
    """The reference: windows after ``start``, the lowest mean variance (first one on ties)."""
    n_windows = (len(thetas) - start) // window
    means = [np.mean(variances[start + k * window: start + (k + 1) * window]) for k in range(n_windows)]
    k = int(np.argmin(means))
    return np.mean(thetas[start + k * window: start + (k + 1) * window], axis=0), start + (k + 1) * window


@settings(max_examples=30, deadline=None)
@given(window=st.integers(1, 5), start=st.integers(0, 6), n_updates=st.integers(1, 30), seed=st.integers(0, 2**16))
def test_selection_equals_numpy_on_the_recorded_sequence(window, start, n_updates, seed):
    rng = np.random.default_rng(seed)
    thetas = rng.normal(size=(n_updates, 3)) + 1j * rng.normal(size=(n_updates, 3))
    residuals = rng.normal(size=(n_updates, 7)) * rng.uniform(0.5, 2.0, size=(n_updates, 1))
    variances = np.sum(residuals ** 2, axis=1)
    tx = lowest_variance_window(window, start)
    state = tx.init({"w": jnp.zeros(3, jnp.complex128)})
    update = jax.jit(lambda u, s, p, r: tx.update(u, s, p, geometry=ResidualGeometry(r)))
    for t in range(n_updates):
        step = {"w": jnp.asarray(rng.normal(size=3) + 0j)}
        out, state = update(step, state, {"w": jnp.asarray(thetas[t])}, jnp.asarray(residuals[t]))
        np.testing.assert_array_equal(np.asarray(out["w"]), np.asarray(step["w"]))  # passes through
    if n_updates - start < window:
        with pytest.raises(ValueError, match="no window completed"):
            selected_parameters(state)
        return
    expected, end = numpy_selection(thetas, variances, window, start)
    np.testing.assert_allclose(np.asarray(selected_parameters(state)["w"]), expected, rtol=1e-12, atol=1e-12)
    assert int(state.best_end) == end
    assert int(state.n_windows) == (n_updates - start) // window


def test_a_low_variance_stretch_is_found_among_noisy_ones():
    # 40 windows of σ² drawn around 1 with one stretch at 0.5: the selection must be that stretch
    rng = np.random.default_rng(3)
    window, n = 10, 400
    level = np.ones(n)
    level[230:240] = 0.5
    thetas = rng.normal(size=(n, 2))
    tx = lowest_variance_window(window)
    state = tx.init({"w": jnp.zeros(2)})
    for t in range(n):
        r = rng.normal(size=512) * np.sqrt(level[t] / 512)
        _, state = tx.update({"w": jnp.zeros(2)}, state, {"w": jnp.asarray(thetas[t])}, geometry=ResidualGeometry(r))
    np.testing.assert_allclose(np.asarray(selected_parameters(state)["w"]), thetas[230:240].mean(axis=0), rtol=1e-12)


@given(bad=st.sampled_from([0, -1, 2.5, "3", True, None]))
def test_bad_window_is_refused(bad):
    with pytest.raises(ValueError, match="window"):
        lowest_variance_window(bad)


@given(bad=st.sampled_from([-1, 1.0, "0", False]))
def test_bad_start_is_refused(bad):
    with pytest.raises(ValueError, match="start"):
        lowest_variance_window(3, start=bad)


def test_update_without_geometry_or_params_is_refused():
    tx = lowest_variance_window(2)
    state = tx.init(jnp.ones(2))
    with pytest.raises(ValueError, match="geometry"):
        tx.update(jnp.ones(2), state, jnp.ones(2))
    with pytest.raises(ValueError, match="parameters"):
        tx.update(jnp.ones(2), state, geometry=ResidualGeometry(jnp.ones(3)))


def test_zero_or_two_selection_states_are_refused():
    with pytest.raises(ValueError, match="holds 0"):
        selected_parameters(optax.sgd(0.1).init(jnp.ones(2)))
    chain = optax.chain(lowest_variance_window(1), lowest_variance_window(2))
    with pytest.raises(ValueError, match="holds 2"):
        selected_parameters(chain.init(jnp.ones(2)))


def test_in_a_search_the_choice_matches_the_history_and_survives_a_checkpoint(tmp_path):
    # a Heisenberg chain of 6 trained with SR; the reference is numpy on the parameters recorded
    # before each step and the history's per-step variance (the same samples' local energies)
    lattice = pl.lattices.chain(6)
    sampler = pl.sampling.MetropolisChains(SpinSpace(6, magnetisation=0), n_chains=8, bonds=lattice.bonds, burn_in=1)
    optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05),
                            lowest_variance_window(3, start=1))
    search = GroundStateSearch(RBM(alpha=1.0, complex_params=True, init_scale=0.05), pl.operators.heisenberg(lattice),
                               sampler, optimizer, n_samples=64)
    state = search.init(jax.random.PRNGKey(0))
    recorded, variances = [], []
    for _ in range(10):
        recorded.append([np.asarray(leaf) for leaf in jax.tree_util.tree_leaves(state.params)])
        state, out = search.step(state)
        variances.append(float(out.energy.variance))
    chosen = jax.tree_util.tree_leaves(selected_parameters(state.opt_state))
    for i, leaf in enumerate(chosen):
        expected, _ = numpy_selection(np.array([r[i] for r in recorded]), np.array(variances), 3, 1)
        np.testing.assert_allclose(np.asarray(leaf), expected, rtol=1e-10, atol=1e-12)
    # the guarded loop accepts the state (every leaf finite from the start) and keeps selecting
    longer, _ = search.run(16, state=state, progress=False)
    assert int(pl.optimize.selection.find_selection_state(longer.opt_state).n_windows) == 5
    path = str(tmp_path / "selected.ckpt")
    search.save(path, state)
    restored, _ = search.resume(path)
    for a, b in zip(jax.tree_util.tree_leaves(selected_parameters(restored.opt_state)), chosen):
        np.testing.assert_array_equal(np.asarray(a), np.asarray(b))
