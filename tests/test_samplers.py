"""Samplers beyond single flips: mixtures of moves, block Gibbs, parallel tempering, R̂ on stuck chains.

Reference for every histogram check: the Born-rule distribution |ψ(x)|² / Σ|ψ|², computed by
exact enumeration of a ≤ 10-spin system, compared by Pearson's chi-square goodness-of-fit test
(Pearson 1900; scipy.stats.chisquare). Each chain contributes only its final configuration, so
the counts are independent multinomial draws and the test's p-value is valid; seeds are fixed.
"""

import jax

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp
import numpy as np
import optax
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

import psiloom as pl
from psiloom.sampling import (
    BlockGibbsSampler,
    ChainState,
    MetropolisChains,
    TemperingSampler,
    BondExchange,
    Mixture,
    TemperingState,
    geometric_betas,
    pair_exchange,
    single_flip,
)
from psiloom.states import RBM, BoundState, TwoBodyJastrow

N_SITES = 6
N_CHAINS = 4096
P_MIN = 1e-3  # reject at the 0.1 % level (fixed seeds make each outcome deterministic)


def random_rbm(n_sites=N_SITES, scale=0.3, seed=0):
    model = RBM(alpha=1.0, init_scale=scale)
    space = pl.spaces.SpinSpace(n_sites)
    variables = model.init(jax.random.PRNGKey(seed), space.random(jax.random.PRNGKey(seed), 1))
    return BoundState(model, variables)


def born_probabilities(state, space, power=1.0):
    """|ψ(x)|^{2·power} normalised over space.configurations() (exact enumeration)."""
    log_w = 2.0 * power * np.real(np.asarray(state(space.configurations())))
    w = np.exp(log_w - log_w.max())
    return w / w.sum()


def chi_square_pvalue(samples, space, probs):
    """Pearson chi-square p-value of samples (n, N) against probs over space.configurations();
    bins with expected count < 5 are pooled into one (common practice)."""
    samples = np.asarray(samples).reshape(-1, space.n_sites)
    assert np.all(space.contains(samples)), "sampler left the configuration space"
    index = np.searchsorted(pl.spaces.codes(space.configurations()), pl.spaces.codes(samples))
    counts = np.bincount(index, minlength=len(probs)).astype(float)
    expected = probs * len(samples)
    small = expected < 5.0
    if small.sum() > 0:
        counts = np.append(counts[~small], counts[small].sum())
        expected = np.append(expected[~small], expected[small].sum())
    return scipy.stats.chisquare(counts, expected).pvalue


def final_states(sampler, state, key, burn_in):
    """Run ``burn_in`` sweeps (inside one sample call) and return the chains' last configurations."""
    run = jax.jit(sampler.sample, static_argnums=3)
    chains = sampler.init(jax.random.fold_in(key, 1), state)
    xs, logs, chains, acc = run(key, chains, state, burn_in)
    np.testing.assert_allclose(np.asarray(logs[-1]), np.asarray(state(xs[-1])), rtol=1e-12, atol=1e-12)
    return xs[-1], chains, float(acc)


# --------------------------------------------------------------------------- histograms vs |ψ|²


def test_metropolis_mixture_samples_born_distribution():
    # Metropolis et al. 1953 / Hastings 1970: a mixture of symmetric proposals is symmetric.
    space = pl.spaces.SpinSpace(N_SITES)
    lat = pl.lattices.chain(N_SITES)
    state = random_rbm()
    move = Mixture((single_flip, BondExchange(lat.bonds), pair_exchange), (0.5, 0.25, 0.25))
    sampler = MetropolisChains(space, N_CHAINS, move=move)
    x, _, acc = final_states(sampler, state, jax.random.PRNGKey(11), burn_in=60)
    assert 0.05 < acc < 1.0
    assert chi_square_pvalue(x, space, born_probabilities(state, space)) > P_MIN


def test_exchange_mixture_in_fixed_sector_samples_born_distribution():
    # Sᶻ_tot = 0 sector of 8 spins (70 states); |ψ|² restricted to the sector (exact enumeration).
    space = pl.spaces.SpinSpace(8, magnetisation=0)
    lat = pl.lattices.chain(8)
    state = random_rbm(8, scale=0.3, seed=3)
    move = Mixture((BondExchange(lat.bonds), pair_exchange), (0.6, 0.4))
    sampler = MetropolisChains(space, N_CHAINS, move=move)
    x, _, _ = final_states(sampler, state, jax.random.PRNGKey(12), burn_in=60)
    assert chi_square_pvalue(x, space, born_probabilities(state, space)) > P_MIN


def test_block_gibbs_samples_born_distribution():
    # Two-block Gibbs sampling of exp(−E(v,h) − E(v,h')) (Geman & Geman 1984): its v-marginal is |ψ|².
    space = pl.spaces.SpinSpace(N_SITES)
    state = random_rbm()
    sampler = BlockGibbsSampler(space, N_CHAINS)
    x, _, moved = final_states(sampler, state, jax.random.PRNGKey(13), burn_in=80)
    assert 0.0 < moved <= 1.0
    assert chi_square_pvalue(x, space, born_probabilities(state, space)) > P_MIN


def test_parallel_tempering_replicas_sample_their_powers_of_psi():
    # Parallel tempering (Swendsen & Wang 1986; Geyer 1991; Hukushima & Nemoto 1996): replica r
    # samples |ψ|^{2β_r}; the β = 1 replica samples |ψ|².
    space = pl.spaces.SpinSpace(N_SITES)
    state = random_rbm(scale=0.4)
    betas = (1.0, 0.6, 0.3)
    sampler = TemperingSampler(space, N_CHAINS, betas=betas)
    x, chains, acc = final_states(sampler, state, jax.random.PRNGKey(14), burn_in=60)
    assert isinstance(chains, TemperingState)
    assert chi_square_pvalue(x, space, born_probabilities(state, space)) > P_MIN
    hot = chains.x[-1]
    assert chi_square_pvalue(hot, space, born_probabilities(state, space, power=betas[-1])) > P_MIN
    # ... and the test has power: the β = 0.3 replica is clearly not distributed as |ψ|²
    assert chi_square_pvalue(hot, space, born_probabilities(state, space)) < 1e-6
    rates = np.asarray(chains.swap_rate)
    assert rates.shape == (2,) and np.all((rates > 0.05) & (rates <= 1.0))
    assert np.asarray(chains.acceptance).shape == (3,)
    assert float(chains.acceptance[0]) == pytest.approx(acc)
    # hotter replicas accept more single flips of this state (flatter target)
    assert np.all(np.diff(np.asarray(chains.acceptance)) > 0)


def test_tempering_fast_updates_match_full_evaluation():
    # The RBM's fast-update cache must follow its configuration through replica exchanges:
    # with identical random numbers the fast and the generic path give the same chains.
    space = pl.spaces.SpinSpace(N_SITES)
    state = random_rbm(scale=0.4)
    sampler = TemperingSampler(space, 8, betas=(1.0, 0.7, 0.4, 0.2))
    run = jax.jit(sampler.sample, static_argnums=3)
    out = {}
    for fast in (True, False):
        bound = BoundState(state.model, state.variables, fast=fast)
        chains = sampler.init(jax.random.PRNGKey(0), bound)
        assert (chains.cache is not None) == fast
        out[fast] = run(jax.random.PRNGKey(1), chains, bound, 30)
    np.testing.assert_array_equal(np.asarray(out[True][0]), np.asarray(out[False][0]))
    np.testing.assert_allclose(np.asarray(out[True][1]), np.asarray(out[False][1]), atol=1e-10)
    np.testing.assert_array_equal(np.asarray(out[True][2].x), np.asarray(out[False][2].x))
    assert float(np.nanmin(np.asarray(out[True][2].swap_rate))) > 0.0


# --------------------------------------------------------------------------- mixture move itself


def test_mixture_picks_components_with_given_probabilities():
    # Binomial check (common practice: 5 standard deviations): a single flip changes Σx by ±2,
    # a pair exchange never does, so the fraction of magnetisation-changing proposals is p_flip.
    p_flip, n = 0.3, 20_000
    move = Mixture((single_flip, pair_exchange), (p_flip, 1.0 - p_flip))
    x = jnp.asarray(np.random.default_rng(0).permuted(np.tile([1.0] * 5 + [-1.0] * 5, (n, 1)), axis=1))
    x_new, sites = jax.jit(move)(jax.random.PRNGKey(1), x)
    frac = float(jnp.mean(jnp.sum(x_new, axis=1) != jnp.sum(x, axis=1)))
    assert abs(frac - p_flip) < 5 * np.sqrt(p_flip * (1 - p_flip) / n)
    # sites padded to K = 2: flips list one site then −1, exchanges list the two swapped sites
    assert sites.shape == (n, 2)
    flipped = np.asarray(jnp.sum(x_new, axis=1) != jnp.sum(x, axis=1))
    assert np.all(np.asarray(sites)[flipped, 1] == -1)
    changed = np.asarray(x_new != x)
    rows = np.arange(n)
    listed = np.zeros_like(changed)
    for k in range(2):
        ok = np.asarray(sites[:, k]) >= 0
        listed[rows[ok], np.asarray(sites[ok, k])] = True
    assert not np.any(changed & ~listed), "a changed site is missing from the sites list"


@given(probs=st.lists(st.floats(allow_nan=True, allow_infinity=True, width=64), min_size=1, max_size=3))
@settings(max_examples=30)
def test_mixture_rejects_bad_probabilities(probs):
    components = (single_flip,) * len(probs)
    valid = all(np.isfinite(p) and p > 0 for p in probs) and abs(sum(probs) - 1.0) <= 1e-9
    if valid:
        Mixture(components, probs)
    else:
        with pytest.raises(ValueError):
            Mixture(components, probs)


def test_mixture_rejects_malformed_components():
    with pytest.raises(ValueError, match="at least one"):
        Mixture((), ())
    with pytest.raises(ValueError, match="not a move"):
        Mixture(("flip",), (1.0,))
    with pytest.raises(ValueError, match="one weight per component"):
        Mixture((single_flip,), ())
    # a mixture that flips single spins cannot serve a fixed-magnetisation space
    with pytest.raises(ValueError, match="SingleFlip"):
        MetropolisChains(pl.spaces.SpinSpace(4, magnetisation=0), 2, move=Mixture((pair_exchange, single_flip), (0.5, 0.5)))


# --------------------------------------------------------------------------- validation


def test_block_gibbs_rejects_constrained_space_and_complex_or_foreign_states():
    with pytest.raises(ValueError, match="magnetisation"):
        BlockGibbsSampler(pl.spaces.SpinSpace(4, magnetisation=0))
    space = pl.spaces.SpinSpace(4)
    sampler = BlockGibbsSampler(space, 4)
    key = jax.random.PRNGKey(0)
    x = jnp.ones((1, 4))

    def shapes(model):  # parameter shapes and dtypes suffice: validation happens before any draw
        return BoundState(model, jax.eval_shape(model.init, key, x))

    with pytest.raises(ValueError, match="real"):
        sampler.init(key, shapes(RBM(alpha=1.0, complex_params=True)))
    with pytest.raises(ValueError, match="real"):
        sampler.init(key, shapes(RBM(alpha=1.0, param_dtype=jnp.complex128)))
    real = shapes(RBM(alpha=1.0))
    with pytest.raises(ValueError, match="BoundState"):
        sampler.init(key, lambda x: real(x))
    with pytest.raises(ValueError, match="RBM"):
        sampler.init(key, shapes(TwoBodyJastrow()))
    with pytest.raises(ValueError, match="visible"):
        BlockGibbsSampler(pl.spaces.SpinSpace(5), 4).init(key, real)


@given(betas=st.lists(st.floats(min_value=-0.5, max_value=1.5, allow_nan=False), min_size=1, max_size=4))
@settings(max_examples=40)
def test_tempering_ladder_validation(betas):
    arr = np.asarray(betas)
    valid = arr[0] == 1.0 and np.all(arr >= 0) and np.all(arr <= 1) and np.all(np.diff(arr) < 0)
    space = pl.spaces.SpinSpace(4)
    if valid:
        assert TemperingSampler(space, 2, betas=betas).n_replicas == len(betas)
    else:
        with pytest.raises(ValueError):
            TemperingSampler(space, 2, betas=betas)


def test_geometric_ladder():
    betas = geometric_betas(5, 0.1)
    np.testing.assert_allclose(betas, 0.1 ** (np.arange(5) / 4))
    with pytest.raises(ValueError, match="beta_min"):
        geometric_betas(3, 1.5)
    with pytest.raises(ValueError, match="SingleFlip"):
        TemperingSampler(pl.spaces.SpinSpace(4, magnetisation=0), 2, move=single_flip)
    with pytest.raises(ValueError, match="SingleFlip"):  # also hidden inside a mixture
        TemperingSampler(pl.spaces.SpinSpace(4, magnetisation=0), 2, move=Mixture((pair_exchange, single_flip), (0.5, 0.5)))
    TemperingSampler(pl.spaces.SpinSpace(4, magnetisation=0), 2, move=Mixture((pair_exchange,), (1.0,)))


# --------------------------------------------------------------------------- stuck chains and R̂


def ferro_jastrow(n_sites, coupling):
    """log ψ = K Σ_<ij> x_i x_j on a ring: for large K two modes, all up and all down (our own state)."""
    lat = pl.lattices.chain(n_sites)
    w = np.zeros((n_sites, n_sites))
    w[lat.bonds[:, 0], lat.bonds[:, 1]] = coupling
    return BoundState(TwoBodyJastrow(), {"params": {"pair": jnp.asarray(w)}})


def test_rhat_flags_chains_stuck_in_two_modes():
    # Split-R̂ > 1.01 means the chains disagree (Vehtari et al. 2021). Half the chains start in
    # the all-up mode, half in the all-down mode; with single flips the barrier e^{−8K} keeps them
    # there. A weakly coupled state started the same way mixes and must not be flagged.
    n, chains = 8, 8
    space = pl.spaces.SpinSpace(n)
    sampler = MetropolisChains(space, chains)
    run = jax.jit(sampler.sample, static_argnums=3)
    x0 = jnp.concatenate([jnp.ones((chains // 2, n)), -jnp.ones((chains // 2, n))])
    results = {}
    for coupling in (1.5, 0.1):
        state = ferro_jastrow(n, coupling)
        xs, _, _, _ = run(jax.random.PRNGKey(5), ChainState(x0, state(x0)), state, 300)
        magnetisation = jnp.mean(xs, axis=-1)  # (T, C)
        results[coupling] = pl.stats.estimate(magnetisation)
    stuck, mixed = results[1.5], results[0.1]
    assert float(stuck.rhat) > 1.5
    assert any("R̂" in w for w in stuck.warnings())
    assert float(mixed.rhat) < 1.01
    assert not any("R̂" in w for w in mixed.warnings())


def test_rhat_flags_frozen_chains():
    # Chains that never move, in two different modes: the bulk R̂ is infinite (no within-chain
    # variance, distinct chain means; Vehtari et al. 2021) and must not be masked by the
    # undefined folded R̂.
    values = np.concatenate([np.ones((100, 4)), -np.ones((100, 4))], axis=1)
    est = pl.stats.estimate(values)
    assert float(est.rhat) > 1.01
    assert any("R̂" in w for w in est.warnings())


# --------------------------------------------------------------------------- training loop integration


def test_training_with_tempering_keeps_chains_and_records_tau_and_rhat():
    # TFIM ring of 6 spins (Pauli); exact energy from free fermions (Pfeuty 1970). The tempering
    # chains (all replicas) persist between steps; the history records τ and (asked for) R̂ of every step.
    lat = pl.lattices.chain(6)
    space = pl.spaces.SpinSpace(6)
    hamiltonian = pl.operators.transverse_field_ising(lat, 1.0, 1.0)
    exact = pl.reference.tfim_ring_energy(6, 1.0, 1.0)
    sampler = TemperingSampler(space, 16, betas=(1.0, 0.5))
    search = pl.train.GroundStateSearch(RBM(alpha=1.0), hamiltonian, sampler, optax.sgd(0.02), n_samples=256,
                                        step_rhat=True)
    state = search.init(jax.random.PRNGKey(2))
    first = state.chains
    state, history = search.run(4, state=state, progress=False)
    assert len(history) == 4
    tau, rhat = history["tau"], history["rhat"]
    assert np.all(np.isfinite(tau)) and np.all(tau > 0)
    assert np.all(np.isfinite(rhat)) and np.all(rhat > 0.9)
    # variational principle: no estimate lies below E0 by more than a few error bars
    assert np.all(history["energy"] > exact - 5 * history["error"] - 1e-9)
    assert isinstance(state.chains, TemperingState)
    assert state.chains.x.shape == (2, 16, 6)
    assert not np.array_equal(np.asarray(state.chains.x), np.asarray(first.x))
    rate = float(state.chains.swap_rate[0])
    assert 0.0 < rate <= 1.0
