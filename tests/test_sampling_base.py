"""The shared sampler machinery: one acceptance step for every kernel, the Sampler interface,
and the global spin-flip move.

References: the Metropolis rule min(1, π(x')/π(x)) for symmetric proposals (Metropolis et al.
1953) and mixtures of symmetric proposals (Hastings 1970; Tierney 1994); |ψ|² is computed by
exact enumeration of the 2^N configurations; chi-square p-values from scipy.
"""

from __future__ import annotations

import collections

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.stats

import psiloom as pl
from psiloom import electrons as el
from psiloom.electrons.basis import BasisFunction
from psiloom.sampling import (
    GlobalFlip,
    MetropolisChains,
    Mixture,
    Sampler,
    TemperingSampler,
    base,
    global_flip,
    single_flip,
)
from psiloom.states import RBM, BoundState

N_SITES = 6


def _rbm(n_sites=N_SITES, scale=0.3, seed=0):
    model = RBM(alpha=1.0, init_scale=scale)
    variables = model.init(jax.random.PRNGKey(seed), jnp.ones((1, n_sites)))
    return model, variables


def _electrons():
    system = el.molecule([(2.0, (0.0, 0.0, 0.0))], n_up=1, n_down=1)
    model = el.SlaterJastrow(el.SlaterTypeOrbitals(system, basis=(BasisFunction(0, "s", 2.0, label="1s"),),
                                                   cusp_free=False), ())
    params = model.init(jax.random.PRNGKey(0), jnp.zeros((1, 2, 3)))
    return system, (lambda x: model.apply(params, x))


# --------------------------------------------------------------------------- one acceptance step


def test_every_kernel_decides_through_the_one_acceptance_step(monkeypatch):
    """Tempering, plain Metropolis (generic path, fast path in random and sequential order) and the
    electron sampler all call ``base.metropolis_accept``: replaced by a version that rejects every
    proposal, it is called by each of them and no chain moves anywhere."""
    calls = collections.Counter()
    original = base.metropolis_accept

    def reject_all(log_u, log_ratio, proposal, current, beta=None):
        calls["n"] += 1
        return original(jnp.full_like(log_u, jnp.inf), log_ratio, proposal, current, beta)

    monkeypatch.setattr(base, "metropolis_accept", reject_all)
    space = pl.spaces.SpinSpace(N_SITES)
    model, variables = _rbm()
    runs = {
        "metropolis generic": (MetropolisChains(space, 4), BoundState(model, variables, fast=False)),
        "metropolis fast random": (MetropolisChains(space, 4, compiled_sweeps=False), BoundState(model, variables)),
        "metropolis fast sequential": (MetropolisChains(space, 4, order="sequential", compiled_sweeps=False),
                                       BoundState(model, variables)),
        "tempering": (TemperingSampler(space, 4, betas=(1.0, 0.5)), BoundState(model, variables)),
        "tempering generic": (TemperingSampler(space, 4, betas=(1.0, 0.5)), BoundState(model, variables, fast=False)),
    }
    system, log_psi = _electrons()
    runs["electrons"] = (el.ElectronSampler(system, n_chains=4, burn_in=1, equilibrate=0), log_psi)
    for name, (sampler, log_amp) in runs.items():
        assert isinstance(sampler, Sampler), name
        calls.clear()
        state = sampler.init(jax.random.PRNGKey(0), log_amp)
        xs, logs, out, acceptance = sampler.sample(jax.random.PRNGKey(1), state, log_amp, 3)
        assert calls["n"] > 0, name
        assert float(acceptance) == 0.0, name
        if name.startswith("tempering"):  # replica exchanges still permute the replicas of a chain
            before, after = (np.sort(pl.spaces.codes(np.asarray(s.x).reshape(-1, N_SITES)).reshape(2, -1), axis=0)
                             for s in (state, out))
            np.testing.assert_array_equal(after, before, err_msg=name)
        else:
            np.testing.assert_array_equal(np.asarray(xs[-1]), np.asarray(state.x), err_msg=name)


def test_acceptance_step_follows_the_metropolis_rule():
    """accept ⇔ log u < β·log_ratio, chosen per chain on every leaf (None leaves stay None)."""
    log_u = jnp.log(jnp.asarray([0.5, 0.5, 0.1, 0.9]))
    log_ratio = jnp.asarray([0.0, -1.0, -1.0, -0.05])
    new = (jnp.ones((4, 3)), jnp.arange(4.0), None)
    old = (jnp.zeros((4, 3)), -jnp.arange(4.0), None)
    (x, v, none), accepted = base.metropolis_accept(log_u, log_ratio, new, old)
    expected = np.asarray([0.5, 0.5, 0.1, 0.9]) < np.exp([0.0, -1.0, -1.0, -0.05])
    np.testing.assert_array_equal(np.asarray(accepted), expected)
    np.testing.assert_array_equal(np.asarray(x[:, 0]), expected.astype(float))
    np.testing.assert_array_equal(np.asarray(v), np.where(expected, np.arange(4.0), -np.arange(4.0)))
    assert none is None
    _, hot = base.metropolis_accept(log_u, log_ratio, new, old, beta=jnp.asarray([1.0, 0.5, 0.1, 0.0]))
    np.testing.assert_array_equal(np.asarray(hot), np.asarray([0.5, 0.5, 0.1, 0.9]) < np.exp(
        np.asarray([1.0, 0.5, 0.1, 0.0]) * np.asarray([0.0, -1.0, -1.0, -0.05])))


# --------------------------------------------------------------------------- global spin flip


def _bimodal_rbm(n_sites=N_SITES):
    """An RBM whose |ψ|² has two unequal ferromagnetic modes: one hidden unit coupled by w = 0.8 to
    every spin (log 2cosh(0.8 Σx) favours |Σx| = N) and a visible bias a = 0.15 tilting them
    (|ψ(+…+)/ψ(−…−)|² = e^{4·0.15·N})."""
    model = RBM(alpha=1.0 / n_sites)
    params = {"kernel": jnp.full((n_sites, 1), 0.8), "hidden_bias": jnp.zeros(1),
              "visible_bias": jnp.full(n_sites, 0.15)}
    return model, {"params": params}


def test_global_flip_mixture_samples_born_distribution_on_both_paths():
    # Born-rule histogram (chi-square against exact |ψ|² by enumeration of 2^6 states) for
    # single flips mixed with x -> -x; the fast path (all N sites change) repeats the generic
    # chains proposal for proposal.
    space = pl.spaces.SpinSpace(N_SITES)
    model, variables = _bimodal_rbm()
    move = Mixture((single_flip, global_flip), (0.7, 0.3))
    sampler = MetropolisChains(space, 2048, move=move, burn_in=40)
    out = {}
    for fast in (True, False):
        amp = BoundState(model, variables, fast=fast)
        state = sampler.init(jax.random.PRNGKey(3), amp)
        assert (state.cache is not None) == fast
        out[fast] = jax.jit(lambda k, s: sampler.sample(k, s, amp, 2))(jax.random.PRNGKey(4), state)
    np.testing.assert_array_equal(np.asarray(out[True][0]), np.asarray(out[False][0]))
    np.testing.assert_allclose(np.asarray(out[True][1]), np.asarray(out[False][1]), atol=1e-11)
    x = np.asarray(out[True][0][-1])
    log_w = 2.0 * np.asarray(model.apply(variables, space.configurations()))
    probs = np.exp(log_w - log_w.max())
    probs /= probs.sum()
    index = np.searchsorted(pl.spaces.codes(space.configurations()), pl.spaces.codes(x))
    counts = np.bincount(index, minlength=len(probs)).astype(float)
    expected = probs * len(x)
    small = expected < 5.0  # pool bins with fewer than 5 expected counts (common practice)
    counts = np.append(counts[~small], counts[small].sum())
    expected = np.append(expected[~small], expected[small].sum())
    assert scipy.stats.chisquare(counts, expected).pvalue > 1e-3


def test_global_flip_is_accepted_with_the_metropolis_probability():
    # Detailed balance of the deterministic involution x -> -x: from x, the move is accepted with
    # probability min(1, |ψ(−x)/ψ(x)|²) (Metropolis et al. 1953); from the favoured all-up mode
    # of the bimodal RBM that is e^{−4·0.15·N} = e^{−3.6}; a binomial test on 20000 chains.
    space = pl.spaces.SpinSpace(N_SITES)
    model, variables = _bimodal_rbm()
    amp = BoundState(model, variables)
    n = 20_000
    x = jnp.ones((n, N_SITES))
    state = pl.sampling.ChainState(x, amp(x), None)
    sampler = MetropolisChains(space, n, move=global_flip)
    new, info = jax.jit(lambda k, s: sampler.step(k, s, amp))(jax.random.PRNGKey(5), state)
    accepted = np.asarray(info.accepted)
    assert np.all(np.asarray(new.x)[accepted] == -1.0) and np.all(np.asarray(new.x)[~accepted] == 1.0)
    p = float(np.exp(-4 * 0.15 * N_SITES))
    assert scipy.stats.binomtest(int(accepted.sum()), n, p).pvalue > 1e-3
    # from the all-down mode every flip is accepted
    down = pl.sampling.ChainState(-x[:8], amp(-x[:8]), None)
    _, info = sampler.step(jax.random.PRNGKey(6), down, amp)
    assert np.all(np.asarray(info.accepted))


def test_global_flip_keeps_only_the_zero_magnetisation_sector():
    MetropolisChains(pl.spaces.SpinSpace(4, magnetisation=0), 2, move=global_flip)
    with pytest.raises(ValueError, match="GlobalFlip"):
        MetropolisChains(pl.spaces.SpinSpace(4, magnetisation=1), 2, move=global_flip)
    with pytest.raises(ValueError, match="order='sequential'"):
        MetropolisChains(pl.spaces.SpinSpace(4), 2, move=global_flip, order="sequential")
    assert GlobalFlip() == global_flip and hash(GlobalFlip()) == hash(global_flip)
    x, sites = global_flip(jax.random.PRNGKey(0), jnp.asarray([[1.0, -1.0, 1.0]]))
    np.testing.assert_array_equal(np.asarray(x), [[-1.0, 1.0, -1.0]])
    np.testing.assert_array_equal(np.asarray(sites), [[0, 1, 2]])


def test_moves_are_static_under_jit():
    """Typed moves are hashable static pytrees: they pass through jit as arguments."""
    move = Mixture((single_flip, global_flip), (0.5, 0.5))
    assert jax.tree_util.tree_leaves(move) == []
    x = jnp.ones((3, 4))
    out = jax.jit(lambda m, k, x: m(k, x))(move, jax.random.PRNGKey(0), x)
    np.testing.assert_array_equal(np.asarray(out[0]), np.asarray(move(jax.random.PRNGKey(0), x)[0]))
    with pytest.raises(TypeError, match="Move"):
        MetropolisChains(pl.spaces.SpinSpace(4), 2, move=lambda k, x: (x, jnp.zeros((x.shape[0], 1), int)))


def test_every_sampler_offers_the_sampler_interface():
    space = pl.spaces.SpinSpace(4)
    system, _ = _electrons()
    for sampler in (MetropolisChains(space, 2), TemperingSampler(space, 2), pl.sampling.BlockGibbsSampler(space, 2),
                    pl.sampling.ChainRuleSampler(space, 2), el.ElectronSampler(system, n_chains=2)):
        assert isinstance(sampler, Sampler), type(sampler).__name__
    assert not isinstance(object(), Sampler)
