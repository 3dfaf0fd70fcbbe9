"""Robustness options: local-energy clipping, gradient-norm clipping and learning-rate schedules.

Local-energy clipping follows common practice: E_loc → median + clip(E_loc − median,
±k·mean|E_loc − median|); the expected values are recomputed here with numpy (np.median,
np.mean). Gradient-norm clipping and schedules are optax's (optax documentation: the update is
rescaled to norm ≤ max_norm; sgd multiplies by −lr(count)), checked on the SR direction, whose
reference is numpy.linalg.solve of (XᵀX + εI) δ = F.
"""

from __future__ import annotations

from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from hypothesis import given, strategies as st
from hypothesis.extra import numpy as hnp

import psiloom as pl
from psiloom.optimize import winsorize_local_energies, energy_gradient, stochastic_reconfiguration, tree_norm


def numpy_clip(e, k):
    """Reference implementation in numpy (common practice, see module docstring)."""
    re = np.real(e)
    m = np.median(re)
    w = k * np.mean(np.abs(re - m))
    out = m + np.clip(re - m, -w, w)
    return out + 1j * np.imag(e) if np.iscomplexobj(e) else out


finite = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)


@given(e=hnp.arrays(np.float64, st.sampled_from([1, 2, 7, 40]), elements=finite), k=st.floats(0.1, 20.0))
def test_clip_matches_definition(e, k):
    got = np.asarray(winsorize_local_energies(jnp.asarray(e), k))
    np.testing.assert_allclose(got, numpy_clip(e, k), rtol=1e-12, atol=1e-9)
    # window property: nothing further than k·mean|e − median| from the median
    m = np.median(e)
    assert np.all(np.abs(got - m) <= k * np.mean(np.abs(e - m)) * (1 + 1e-12) + 1e-9)


@given(e=hnp.arrays(np.float64, st.sampled_from([1, 2, 7, 40]), elements=finite))
def test_clip_is_monotone_and_keeps_the_median(e):
    # clipping is a monotone map (order of samples preserved) and the median is a fixed point
    got = np.asarray(winsorize_local_energies(jnp.asarray(e), 2.0))
    order = np.argsort(e, kind="stable")
    assert np.all(np.diff(got[order]) >= -1e-9)
    np.testing.assert_allclose(np.median(got), np.median(e), rtol=1e-12, atol=1e-9)


def test_clip_worked_example_and_complex():
    # e = [0,1,2,3,100]: median 2, mean|e−2| = (2+1+0+1+98)/5 = 20.4, k = 1 → 100 ↦ 22.4
    e = jnp.array([0.0, 1.0, 2.0, 3.0, 100.0])
    np.testing.assert_allclose(np.asarray(winsorize_local_energies(e, 1.0)), [0, 1, 2, 3, 22.4], rtol=1e-14)
    # large k: unchanged
    np.testing.assert_array_equal(np.asarray(winsorize_local_energies(e, 1e3)), np.asarray(e))
    # complex: real part clipped, imaginary part kept
    ec = e + 1j * jnp.arange(5.0)
    got = np.asarray(winsorize_local_energies(ec, 1.0))
    np.testing.assert_allclose(got.real, [0, 1, 2, 3, 22.4], rtol=1e-14)
    np.testing.assert_array_equal(got.imag, np.arange(5.0))


@given(k=st.one_of(st.floats(max_value=0.0), st.just(float("nan")), st.just("wide")))
def test_bad_width_rejected(k):
    with pytest.raises(ValueError, match="width"):
        winsorize_local_energies(jnp.ones(3), k)


def test_bad_shape_rejected():
    with pytest.raises(ValueError, match=r"\(2, 3\)"):
        winsorize_local_energies(jnp.ones((2, 3)), 3.0)


# ----------------------------------------------------------------------------- in the training step
@pytest.fixture(scope="module")
def small_problem():
    lat = pl.lattices.chain(6)
    space = pl.spaces.SpinSpace(6)
    ham = pl.operators.transverse_field_ising(lat, 1.0, 1.0)
    sampler = pl.sampling.MetropolisChains(space, n_chains=8)
    return ham, sampler


class Spy(NamedTuple):
    x: jax.Array
    e_loc: jax.Array
    grad: object


def spy_transformation(n_samples, n_sites, params):
    """Passes the gradient through and keeps what the step fed it (samples, E_loc, gradient)."""

    def init(p):
        return Spy(jnp.zeros((n_samples, n_sites)), jnp.zeros(n_samples), jax.tree_util.tree_map(jnp.zeros_like, p))

    def update(updates, state, params=None, *, geometry=None, **extra):
        return updates, Spy(geometry.x, geometry.e_loc, updates)

    return optax.GradientTransformationExtraArgs(init, update)


def test_winsorize_changes_gradient_not_estimate(small_problem):
    ham, sampler = small_problem
    model = pl.states.RBM(alpha=1, init_scale=0.5)
    params = model.init(jax.random.PRNGKey(0), jnp.ones((1, 6)))
    opt = optax.chain(spy_transformation(64, 6, params), optax.sgd(0.0))
    search = pl.train.GroundStateSearch(model, ham, sampler, opt, n_samples=64, winsorize=0.5)
    new, out = search.step(search.init(jax.random.PRNGKey(0), params))
    spy = new.opt_state[0]
    # unclipped local energies of the step's samples, recomputed here by the generic path
    e_plain = np.asarray(ham.local_energy(lambda x: model.apply(params, x), spy.x))
    # the reported estimate is the unclipped mean
    assert float(out.energy.mean) == pytest.approx(float(np.mean(e_plain)), rel=1e-12)
    # the geometry and the gradient see the clipped values (numpy reference)
    e_clip = numpy_clip(e_plain, 0.5)
    assert np.max(np.abs(e_clip - e_plain)) > 1e-3  # k = 0.5 does clip something
    np.testing.assert_allclose(np.asarray(spy.e_loc), e_clip, rtol=1e-12)
    _, g_ref = energy_gradient(model.apply, params, spy.x, jnp.asarray(e_clip))
    for got, want in zip(jax.tree_util.tree_leaves(spy.grad), jax.tree_util.tree_leaves(g_ref)):
        np.testing.assert_allclose(np.asarray(got), np.asarray(want), rtol=1e-9, atol=1e-12)
    assert float(out.grad_norm) == pytest.approx(float(tree_norm(g_ref)), rel=1e-10)
    _, g_plain = energy_gradient(model.apply, params, spy.x, jnp.asarray(e_plain))
    assert abs(float(out.grad_norm) - float(tree_norm(g_plain))) > 1e-6


def test_winsorize_validated(small_problem):
    ham, sampler = small_problem
    with pytest.raises(ValueError, match="width"):
        pl.train.GroundStateSearch(pl.states.RBM(), ham, sampler, optax.sgd(0.1), n_samples=64, winsorize=-1.0)


# ----------------------------------------------------------------------------- optax composition
class MatrixGeometry:
    def __init__(self, x, residual):
        self.x, self.eps = jnp.asarray(x), jnp.asarray(residual)
        self.complex_output, self.n_samples = False, self.x.shape[0]

    def jacobian(self):
        return self.x

    def residual(self):
        return self.eps

    def s_operator(self):
        return lambda v: self.x.T @ (self.x @ v)


def sr_reference(x, res, shift):
    # numpy.linalg.solve of (XᵀX + εI) δ = Xᵀ ε (the SR definition, Sorella 1998)
    return np.linalg.solve(x.T @ x + shift * np.eye(x.shape[1]), x.T @ res)


@pytest.mark.parametrize("solver", ["dense", "sample_space", "cg"])
def test_global_norm_clipping_after_sr(solver):
    rng = np.random.default_rng(1)
    x, res = rng.normal(size=(10, 7)), rng.normal(size=10) * 50
    geom = MatrixGeometry(x, res)
    delta = sr_reference(x, res, 1e-2)
    max_norm = 0.25 * np.linalg.norm(delta)
    tx = optax.chain(stochastic_reconfiguration(1e-2, solver, tol=1e-13), optax.clip_by_global_norm(max_norm),
                     optax.sgd(0.1))
    params = {"w": jnp.zeros(7)}
    state = tx.init(params)
    updates, _ = tx.update({"w": jnp.asarray(2 * x.T @ res)}, state, params, geometry=geom)
    u = np.asarray(updates["w"])
    # documented behaviour: norm clipped to max_norm, direction kept; sgd then scales by −lr
    assert np.linalg.norm(u) <= 0.1 * max_norm * (1 + 1e-12)
    np.testing.assert_allclose(u, -0.1 * max_norm * delta / np.linalg.norm(delta), rtol=1e-8)
    # a loose bound leaves δ untouched
    tx = optax.chain(stochastic_reconfiguration(1e-2, solver, tol=1e-13), optax.clip_by_global_norm(1e9),
                     optax.sgd(0.1))
    updates, _ = tx.update({"w": jnp.asarray(2 * x.T @ res)}, tx.init(params), params, geometry=geom)
    np.testing.assert_allclose(np.asarray(updates["w"]), -0.1 * delta, rtol=1e-8)


def test_global_norm_clipping_before_sr():
    # clipping the raw gradient first: SR then preconditions the clipped gradient exactly
    rng = np.random.default_rng(2)
    x, res = rng.normal(size=(6, 15)), rng.normal(size=6)
    g = 2 * x.T @ res
    geom = MatrixGeometry(x, res)
    clip = 0.1 * np.linalg.norm(g)
    params = {"w": jnp.zeros(15)}
    for solver in ("dense", "sample_space", "cg"):
        tx = optax.chain(optax.clip_by_global_norm(clip), stochastic_reconfiguration(1e-2, solver, tol=1e-13))
        out, _ = tx.update({"w": jnp.asarray(g)}, tx.init(params), params, geometry=geom)
        ref = np.linalg.solve(x.T @ x + 1e-2 * np.eye(15), 0.5 * g * clip / np.linalg.norm(g))
        np.testing.assert_allclose(np.asarray(out["w"]), ref, rtol=1e-7, err_msg=solver)


def test_learning_rate_schedule_with_sr():
    # the parameter change at step t equals −lr(t)·δ, lr(t) from an optax schedule
    rng = np.random.default_rng(3)
    x, res = rng.normal(size=(12, 5)), rng.normal(size=12)
    geom = MatrixGeometry(x, res)
    delta = sr_reference(x, res, 1e-3)
    schedule = optax.piecewise_constant_schedule(0.1, {2: 0.5, 4: 0.1})  # 0.1, 0.1, 0.05, 0.05, 0.005
    expected_lr = [0.1, 0.1, 0.05, 0.05, 0.005]
    tx = optax.chain(stochastic_reconfiguration(1e-3, "sample_space"), optax.sgd(schedule))
    params = {"w": jnp.zeros(5)}
    state = tx.init(params)
    for t, lr in enumerate(expected_lr):
        updates, state = tx.update({"w": jnp.asarray(2 * x.T @ res)}, state, params, geometry=geom)
        new = optax.apply_updates(params, updates)
        np.testing.assert_allclose(np.asarray(new["w"] - params["w"]), -lr * delta, rtol=1e-9, err_msg=f"t={t}")
        params = new
