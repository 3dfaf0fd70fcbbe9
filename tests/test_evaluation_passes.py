"""Evaluation passes to a requested error bar, and what a default run compiles.

The pass of ``GroundStateSearch.evaluate(state, target_error=...)`` reuses the training
program (frozen steps), so a default run followed by it compiles one XLA program of the step;
its stopping rule is checked on the uniform state of a Heisenberg ring, whose local-energy mean
and variance follow exactly from the Hamiltonian's matrix (⟨u|H|u⟩ and ⟨u|H²|u⟩ − ⟨u|H|u⟩²).
"""

import warnings

import jax
import numpy as np
import optax
import pytest

import psiloom as pl
from psiloom.stats import Estimate, combine_batches
from psiloom.testing import compilations

L = 6


def make(init_scale: float = 0.01, n_samples: int = 128):
    lattice = pl.lattices.chain(L)
    space = pl.spaces.SpinSpace(L, magnetisation=0)
    hamiltonian = pl.operators.heisenberg(lattice, marshall_basis=True)
    sampler = pl.sampling.MetropolisChains(space, n_chains=8, bonds=lattice.bonds)
    optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05))
    search = pl.train.GroundStateSearch(pl.states.RBM(alpha=1, init_scale=init_scale), hamiltonian, sampler,
                                        optimizer, n_samples=n_samples)
    return search, hamiltonian, space


def test_default_run_and_evaluation_compile_the_step_once():
    search, _, _ = make()
    with compilations() as names:
        state, _ = search.run(5, key=jax.random.PRNGKey(0), progress=False, steps_per_visit=3)
        search.evaluate(state, target_error=1.0, max_samples=1024)
    assert names.count("jit(multi)") == 1, names
    assert not any("lambda" in name for name in names), names  # no evaluation program
    # one visit program; the compile log counts its compilations (the size of its dispatch cache,
    # JAX's process-wide LRU, can be 0 late in a long test process: seen once in a clean-clone run)
    assert len(search._multi) == 1
    assert not search._programs


@pytest.fixture(scope="module")
def uniform():
    search, hamiltonian, space = make(init_scale=0.0)  # all weights 0: ψ uniform over the sector
    return search, search.init(jax.random.PRNGKey(1)), np.asarray(hamiltonian.dense_matrix(space))


def test_pass_stops_once_the_requested_error_is_reached(uniform):
    search, state, h = uniform
    local = h.sum(axis=1)  # E_loc(x) = Σ_x' H_xx' ψ(x')/ψ(x) = Σ_x' H_xx' for ψ uniform
    mean_exact, var_exact = float(np.mean(local)), float(np.var(local))  # ⟨u|H|u⟩, ⟨u|H²|u⟩ − ⟨u|H|u⟩²
    target = 0.02
    estimate, acceptance = search.evaluate(state, target_error=target, max_samples=1 << 15)
    used = estimate.n_time * search.sampler.n_chains
    assert estimate.error <= target
    # it stopped near the sample count the error bar needs (error ∝ 1/sqrt(N)), far below the cap
    needed = var_exact * estimate.tau / target ** 2
    assert used <= 1.5 * needed + 2 * search.n_samples < (1 << 15)
    assert abs(estimate.mean - mean_exact) < 4 * estimate.error
    assert abs(estimate.variance - var_exact) < 0.25 * var_exact
    assert 0 < acceptance <= 1
    # a target out of reach: the pass stops at the cap (whole steps, never above it) and says so
    with pytest.warns(UserWarning, match="max_samples=1000"):
        capped, _ = search.evaluate(state, target_error=1e-9, max_samples=1000)
    assert capped.n_time * search.sampler.n_chains == 7 * search.n_samples


@pytest.mark.parametrize("kwargs, match", [
    ({"n_samples": 256, "target_error": 0.1}, "not both"),
    ({}, "n_samples"),
    ({"target_error": -1.0}, "target_error"),
    ({"target_error": float("nan")}, "target_error"),
    ({"n_samples": 256, "max_samples": 512}, "max_samples"),
    ({"target_error": 0.1, "max_samples": 0}, "max_samples"),
    ({"target_error": 0.1, "starts": np.array([[1, -1] * (L // 2)])}, "starts"),
])
def test_bad_evaluation_arguments(uniform, kwargs, match):
    search, state, _ = uniform
    with pytest.raises(ValueError, match=match):
        search.evaluate(state, **kwargs)


def test_combined_batches_agree_with_one_estimate_of_independent_draws():
    # independent normal draws (numpy's generator): the pooled error of K batches is the error of
    # the mean of all of them, sigma / sqrt(N) (textbook)
    rng = np.random.default_rng(3)
    values = rng.normal(2.0, 0.5, size=(16, 64, 8))  # 16 batches of (64 times, 8 chains)
    batches = [pl.stats.estimate(v) for v in values]
    pooled = combine_batches(jax.tree_util.tree_map(lambda *a: np.asarray(a), *batches))
    n = values.size
    assert pooled.n_time == 16 * 64
    np.testing.assert_allclose(pooled.mean, values.mean(), rtol=1e-12)
    np.testing.assert_allclose(pooled.variance, values.var(), rtol=1e-12)
    assert abs(pooled.error / (0.5 / np.sqrt(n)) - 1) < 0.15
    assert np.isnan(pooled.rhat)
    with pytest.raises(ValueError, match="leading axis"):
        combine_batches(Estimate(*(np.float64(1.0) for _ in range(6))))


class _ChunkRecorder:
    """A Hamiltonian that records the ``chunk`` each local-energy call receives (at trace time)."""

    def __init__(self, hamiltonian):
        self.hamiltonian, self.chunks = hamiltonian, []

    def __getattr__(self, name):
        return getattr(self.hamiltonian, name)

    def local_energy(self, log_amplitude, x, log_amp_x=None, chunk=None):
        self.chunks.append((x.shape[0], chunk))
        return self.hamiltonian.local_energy(log_amplitude, x, log_amp_x, chunk=chunk)


def test_a_large_evaluation_pass_works_in_chunks_of_a_training_step():
    # memory: a fixed pass of 8× the step's samples must not build all local-energy work at once
    # (an unchunked pass of 131072 samples of a projected fermion state asked XLA for 48 GB)
    search, hamiltonian, _ = make(n_samples=64)
    recorder = _ChunkRecorder(hamiltonian)
    search = pl.train.GroundStateSearch(search.model, recorder, search.sampler, search.optimizer, n_samples=64)
    state = search.init(jax.random.PRNGKey(0))
    est, _ = search.evaluate(state, 512)
    assert (512, 64) in recorder.chunks
    assert np.isfinite(est.mean)
    chunked = pl.train.GroundStateSearch(search.model, recorder, search.sampler, search.optimizer, n_samples=64,
                                         chunk=16)
    chunked.evaluate(chunked.init(jax.random.PRNGKey(0)), 512)
    assert (512, 16) in recorder.chunks  # an explicit chunk is kept
