"""The autoregressive trial state and exact direct sampling.

Checks against the outside world: the chain rule of probability (Σ_x p(x) = 1 for normalised
conditionals), the Born rule by exact enumeration with Pearson's chi-square test (Pearson 1900;
scipy.stats.chisquare), τ_int = 1 for independent draws (Sokal 1997), and the exact TFIM ring
energy from free fermions (Pfeuty 1970) with the variational principle.
"""

import jax

jax.config.update("jax_enable_x64", True)

import math

import jax.numpy as jnp
import numpy as np
import optax
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

import psiloom as pl
from psiloom.sampling import ChainRuleSampler
from psiloom.states import BoundState, ChainRuleState


_COMPILED = {}


def compiled(model, method=None):
    """One jitted ``model.apply(variables, *args, method=method)`` per model (cached: fewer compiles)."""
    key = (model, method)
    if key not in _COMPILED:
        _COMPILED[key] = jax.jit(lambda variables, *args: model.apply(variables, *args, method=method))
    return _COMPILED[key]


def make_state(n_sites, features=3, phase_features=0, magnetisation=None, seed=0, scale=0.8):
    """A ChainRuleState with Gaussian random parameters of standard deviation ``scale``."""
    model = ChainRuleState(features=features, phase_features=phase_features, magnetisation=magnetisation)
    shapes = jax.eval_shape(model.init, jax.random.PRNGKey(0), jnp.ones((1, n_sites)))
    rng = np.random.default_rng(seed)
    variables = jax.tree_util.tree_map(lambda s: jnp.asarray(rng.normal(0.0, scale, s.shape)), shapes)
    return BoundState(model, variables)


def born(state, states):
    """|ψ(x)|² of a batch, through the compiled log-amplitude."""
    return np.exp(2.0 * np.real(np.asarray(compiled(state.model)(state.variables, states))))


# --------------------------------------------------------------------------- normalisation


@given(n_sites=st.integers(1, 7), seed=st.integers(0, 2**16))
@settings(max_examples=10)
def test_probabilities_sum_to_one(n_sites, seed):
    # chain rule of probability: a product of normalised conditionals is normalised (the phase
    # network must not change that)
    state = make_state(n_sites, 2, phase_features=2, seed=seed)
    total = born(state, pl.spaces.SpinSpace(n_sites).configurations()).sum()
    assert total == pytest.approx(1.0, abs=1e-12)


@given(n_sites=st.integers(1, 6), data=st.data(), seed=st.integers(0, 2**16))
@settings(max_examples=10)
def test_sector_probabilities_sum_to_one(n_sites, data, seed):
    n_up = data.draw(st.integers(0, n_sites))
    magnetisation = n_up - n_sites / 2
    state = make_state(n_sites, 2, magnetisation=magnetisation, seed=seed)
    # all 2^N configurations at once: the sector sums to one, everything else has p = 0
    everything = pl.spaces.SpinSpace(n_sites).configurations()
    inside = pl.spaces.SpinSpace(n_sites, magnetisation=magnetisation).contains(everything)
    p = born(state, everything)
    assert p[inside].sum() == pytest.approx(1.0, abs=1e-12)
    assert np.all(p[~inside] == 0.0)


@given(site=st.integers(0, 6), seed=st.integers(0, 2**16))
@settings(max_examples=15)
def test_conditionals_are_causal(site, seed):
    # ℓ_i may depend on x_<i only: changing sites ≥ i leaves ℓ_0 … ℓ_i unchanged
    n_sites, i = 7, site
    state = make_state(n_sites, 3, seed=seed)
    rng = np.random.default_rng(seed)
    x = rng.choice([-1.0, 1.0], size=(1, n_sites))
    y = x.copy()
    y[0, i:] = rng.choice([-1.0, 1.0], size=n_sites - i)
    logits = compiled(state.model, "logits")
    lx = np.asarray(logits(state.variables, x))
    ly = np.asarray(logits(state.variables, y))
    np.testing.assert_allclose(lx[0, : i + 1], ly[0, : i + 1], rtol=0, atol=1e-13)
    # ... and the last logit does read the earlier sites (the test could fail)
    z = x.copy()
    z[0, 0] *= -1
    assert not np.allclose(np.asarray(logits(state.variables, z))[0, -1], lx[0, -1])


def test_log_probability_is_twice_the_real_log_amplitude():
    state = make_state(5, 2, phase_features=3, seed=4)
    x = pl.spaces.SpinSpace(5).configurations()
    log_amp = state(x)
    assert jnp.iscomplexobj(log_amp)
    np.testing.assert_allclose(np.asarray(state.apply_method("log_probability", x)),
                               2.0 * np.real(np.asarray(log_amp)), atol=1e-13)


# --------------------------------------------------------------------------- direct sampling


def chi_square_pvalue(samples, space, probs):
    samples = np.asarray(samples).reshape(-1, space.n_sites)
    assert np.all(space.contains(samples))
    index = np.searchsorted(pl.spaces.codes(space.configurations()), pl.spaces.codes(samples))
    counts = np.bincount(index, minlength=len(probs)).astype(float)
    expected = probs * len(samples)
    small = expected < 5.0  # pool sparse bins (common practice)
    if small.any():
        counts = np.append(counts[~small], counts[small].sum())
        expected = np.append(expected[~small], expected[small].sum())
    return scipy.stats.chisquare(counts, expected).pvalue


@pytest.mark.parametrize("n_sites, magnetisation, phase", [(7, None, 2), (8, 0, 0)])
def test_direct_samples_follow_born_rule_and_are_independent(n_sites, magnetisation, phase):
    space = pl.spaces.SpinSpace(n_sites, magnetisation=magnetisation)
    state = make_state(n_sites, 3, phase_features=phase, magnetisation=magnetisation, seed=7)
    sampler = ChainRuleSampler(space, n_chains=64)
    chains = sampler.init(jax.random.PRNGKey(0), state)
    xs, logs, chains, acc = jax.jit(sampler.sample, static_argnums=3)(jax.random.PRNGKey(1), chains, state, 256)
    assert xs.shape == (256, 64, n_sites) and float(acc) == 1.0
    everything = space.configurations()
    probs = born(state, everything)
    index = np.searchsorted(pl.spaces.codes(everything), pl.spaces.codes(np.asarray(xs).reshape(-1, n_sites)))
    np.testing.assert_allclose(np.exp(2.0 * np.real(np.asarray(logs))).reshape(-1), probs[index], rtol=1e-10)
    assert chi_square_pvalue(xs, space, probs) > 1e-3
    # independent draws: τ_int = 1 (Sokal 1997) within its statistical error
    # var(τ̂) ≈ 2(2M+1)/N τ² with window M ≈ 5τ (Sokal 1997)
    observable = np.asarray(xs[..., 0] * xs[..., 1] + xs[..., -1])
    tau = float(pl.stats.integrated_autocorrelation_time(observable))
    sigma = math.sqrt(2.0 * (2.0 * 5.0 + 1.0) / observable.size)
    assert abs(tau - 1.0) < 4.0 * sigma


def test_direct_sampler_validation():
    space = pl.spaces.SpinSpace(4)
    state = make_state(4)
    key = jax.random.PRNGKey(0)
    with pytest.raises(ValueError, match="BoundState"):
        ChainRuleSampler(space, 4).init(key, lambda x: state(x))
    with pytest.raises(ValueError, match="magnetisation"):
        ChainRuleSampler(pl.spaces.SpinSpace(4, magnetisation=0), 4).init(key, state)
    with pytest.raises(ValueError, match="sites"):
        ChainRuleSampler(pl.spaces.SpinSpace(5), 4).init(key, state)
    with pytest.raises(ValueError, match="n_chains"):
        ChainRuleSampler(space, 0)
    with pytest.raises(ValueError, match="n_samples"):
        state.apply_method("sample", key, 0)
    rbm = pl.states.RBM()
    with pytest.raises(ValueError, match="sample"):
        ChainRuleSampler(space, 4).init(key, BoundState(rbm, rbm.init(key, jnp.ones((1, 4)))))


@given(features=st.integers(-3, -1))
@settings(max_examples=3)
def test_state_rejects_bad_hyperparameters(features):
    with pytest.raises(ValueError, match="features"):
        ChainRuleState(features=features).init(jax.random.PRNGKey(0), jnp.ones((1, 3)))
    with pytest.raises(ValueError, match="magnetisation"):
        ChainRuleState(magnetisation=0.5).init(jax.random.PRNGKey(0), jnp.ones((1, 4)))


# --------------------------------------------------------------------------- training


def test_stochastic_reconfiguration_with_direct_sampling_lowers_tfim_energy():
    # TFIM ring, 6 spins, J = 1, h = 0.7 (Pauli): exact E0 by free fermions (Pfeuty 1970).
    # The nearly uniform start has E ≈ −h·N = −4.2; a few SR steps must approach E0 and, by the
    # variational principle, no estimate may fall below E0 beyond its error bar.
    n, h = 6, 0.7
    lat = pl.lattices.chain(n)
    space = pl.spaces.SpinSpace(n)
    hamiltonian = pl.operators.transverse_field_ising(lat, 1.0, h)
    exact = pl.reference.tfim_ring_energy(n, 1.0, h)
    model = ChainRuleState(features=4, init_scale=0.05)
    opt = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.1))
    search = pl.train.GroundStateSearch(model, hamiltonian, ChainRuleSampler(space, 16), opt, n_samples=512,
                                       step_rhat=True)
    state, history = search.run(25, key=jax.random.PRNGKey(0), progress=False)
    energy, error = history["energy"], history["error"]
    assert energy[0] > -4.6
    assert np.all(energy > exact - 5.0 * error)
    est, acc = search.evaluate(state, 8192)
    assert acc == 1.0
    assert float(est.mean) > exact - 5.0 * float(est.error)
    assert abs(float(est.mean) - exact) / abs(exact) < 0.01  # from −4.2 (38 % off) to within 1 %
    assert np.all(np.isfinite(history["tau"])) and np.all(np.isfinite(history["rhat"]))
