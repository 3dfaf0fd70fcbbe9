"""Metropolis sampling: move invariants, convergence to |ψ|², chain persistence, bad input.

The sampled distribution is checked with Pearson's chi-square goodness-of-fit test
(scipy.stats.chisquare) against |ψ(x)|²/Σ|ψ|² computed exactly on all basis states. Each
chain contributes only its final configuration after a burn-in of many sweeps, so the counts
are multinomial draws from independent chains and the chi-square statistic has its textbook
null distribution (no autocorrelation correction needed). At a fixed seed the test asserts
p > 1e-3; the same counts are also shown to be incompatible (p < 1e-8) with a wrong target,
|ψ| instead of |ψ|², so the test is able to fail.
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.stats import binomtest, chisquare

from psiloom import lattices
from psiloom.sampling import (
    BondExchange,
    MetropolisChains,
    SingleFlip,
    metropolis_step,
    pair_exchange,
    single_flip,
)
from psiloom.spaces import SpinSpace, codes
from psiloom.states import RBM, BoundState, fast_updates_of

seeds = st.integers(0, 2**31 - 1)


def random_configs(seed: int, n_chains: int, n_sites: int, polarised_rows: bool = False) -> jnp.ndarray:
    rng = np.random.default_rng(seed)
    x = rng.choice([-1.0, 1.0], size=(n_chains, n_sites))
    if polarised_rows:
        x[0] = 1.0
        x[1] = -1.0
    return jnp.asarray(x)


# --------------------------------------------------------------------------- moves

N_MOVE = 9
CHAINS = 12
ring = lattices.chain(N_MOVE)
_bond_move = BondExchange(ring.bonds)
moves = {
    "single_flip": jax.jit(single_flip),
    "bond_exchange": jax.jit(_bond_move),
    "pair_exchange": jax.jit(pair_exchange),
}


@given(seed=seeds, key=seeds)
def test_exchange_moves_conserve_magnetisation_and_report_sites(seed, key):
    x = random_configs(seed, CHAINS, N_MOVE, polarised_rows=True)
    k = jax.random.PRNGKey(key)
    for name in ("bond_exchange", "pair_exchange"):
        new, sites = moves[name](k, x)
        new, sites, old = np.asarray(new), np.asarray(sites), np.asarray(x)
        np.testing.assert_array_equal(new.sum(axis=1), old.sum(axis=1))
        assert sites.shape == (CHAINS, 2) and sites.dtype == np.int32
        for c in range(CHAINS):
            changed = set(np.flatnonzero(new[c] != old[c]).tolist())
            listed = set(sites[c].tolist()) - {-1}
            i, j = sites[c]
            if name == "bond_exchange":
                assert tuple(sorted((i, j))) in {tuple(b) for b in ring.bonds.tolist()}
            if i >= 0 and old[c, i] != old[c, j]:
                # a swap of opposite spins changes exactly the two listed sites
                assert changed == listed and len(listed) == 2
                assert new[c, i] == old[c, j] and new[c, j] == old[c, i]
            else:
                assert changed == set()  # equal spins or a polarised chain: null move
        # pair exchange always swaps an up and a down spin unless the chain is polarised
        if name == "pair_exchange":
            polarised = np.all(old == old[:, :1], axis=1)
            assert polarised[0] and polarised[1]
            np.testing.assert_array_equal(np.all(sites == -1, axis=1), polarised)
            assert np.all(sites[~polarised] >= 0)


@given(seed=seeds, key=seeds)
def test_single_flip_changes_one_site_and_magnetisation_by_two(seed, key):
    x = random_configs(seed, CHAINS, N_MOVE)
    new, sites = moves["single_flip"](jax.random.PRNGKey(key), x)
    new, sites, old = np.asarray(new), np.asarray(sites), np.asarray(x)
    assert sites.shape == (CHAINS, 1)
    for c in range(CHAINS):
        assert np.flatnonzero(new[c] != old[c]).tolist() == [sites[c, 0]]
    np.testing.assert_array_equal(np.abs(new.sum(axis=1) - old.sum(axis=1)), 2)


def test_bond_exchange_rejects_sites_outside_configuration():
    move = BondExchange([[0, 12]])
    with pytest.raises(ValueError, match="12"):
        move(jax.random.PRNGKey(0), jnp.ones((2, 5)))
    with pytest.raises(ValueError, match="at least one entry"):
        BondExchange(np.zeros((0, 2)))


@given(bonds=st.lists(st.tuples(st.integers(-12, 12), st.integers(-12, 12)), min_size=1, max_size=5),
       n_sites=st.integers(2, 10), sampler=st.sampled_from(["metropolis", "tempering"]))
def test_bad_bonds_raise_naming_them(bonds, n_sites, sampler):
    """Negative, out-of-range or self-paired bond sites are refused up front, naming a bad bond
    (a negative site once wrapped around on the JAX path but counted as padding on the fast
    path: two different, both wrong, distributions)."""
    from psiloom.sampling import TemperingSampler

    make = MetropolisChains if sampler == "metropolis" else TemperingSampler
    bad = [b for b in bonds if min(b) < 0 or max(b) >= n_sites or b[0] == b[1]]
    for space in (SpinSpace(n_sites), SpinSpace(n_sites, magnetisation=0 if n_sites % 2 == 0 else 0.5)):
        if bad:
            with pytest.raises(ValueError) as err:
                make(space, 2, bonds=bonds)
            assert any(str(list(b)) in str(err.value) for b in bad)
        elif space.is_sector and len({s for bond in bonds for s in bond}) < n_sites:
            # valid bonds that leave a site untouched cannot be the sector's move (a chain would
            # keep that site at its start): refused, naming the sites
            with pytest.raises(ValueError, match="never moves sites"):
                make(space, 2, bonds=bonds)
        else:
            made = make(space, 2, bonds=bonds)
            if space.is_sector:
                assert made.move == BondExchange(bonds)
    if bad:
        with pytest.raises(ValueError):
            BondExchange(bonds).check(n_sites)
            BondExchange(bonds).ordered(n_sites).check(n_sites)


# --------------------------------------------------------------------------- convergence to |ψ|²


@functools.lru_cache(maxsize=None)
def rbm_state(n_sites: int, seed: int, scale: float, bound: bool = False):
    """log ψ of an RBM with random parameters: a plain function (generic path), or with
    ``bound`` the bound state (fast updates and, on the CPU, compiled sweeps)."""
    model = RBM(alpha=1.0)

    @jax.jit
    def make(key):
        k1, k2 = jax.random.split(key)
        v = model.init(k1, jnp.ones((1, n_sites)))
        return jax.tree_util.tree_map(lambda a: scale * jax.random.normal(k2, a.shape), v)

    variables = make(jax.random.PRNGKey(seed))
    if bound:
        return BoundState(model, variables)
    return jax.jit(lambda x: model.apply(variables, x))


def final_configurations(sampler: MetropolisChains, log_amp, seed: int) -> np.ndarray:
    @jax.jit
    def run(key):
        k_init, k_run = jax.random.split(key)
        state = sampler.init(k_init, log_amp)
        xs, _, _, acc = sampler.sample(k_run, state, log_amp, 1)
        return xs[0], acc

    x, acc = run(jax.random.PRNGKey(seed))
    assert 0.0 < float(acc) <= 1.0
    return np.asarray(x)


def goodness_of_fit(samples: np.ndarray, space: SpinSpace, probabilities: np.ndarray) -> float:
    """Pearson chi-square p-value; bins with expected count < 5 are pooled (common practice)."""
    states = space.configurations()
    index = np.searchsorted(codes(states), codes(samples))
    assert np.array_equal(codes(states)[index], codes(samples)), "sample outside the space"
    counts = np.bincount(index, minlength=len(states)).astype(float)
    expected = probabilities / probabilities.sum() * counts.sum()
    small = expected < 5
    obs = np.append(counts[~small], counts[small].sum())
    exp = np.append(expected[~small], expected[small].sum())
    if exp[-1] == 0:
        obs, exp = obs[:-1], exp[:-1]
    return float(chisquare(obs, exp).pvalue)


@pytest.mark.parametrize(
    "name,n_sites,magnetisation,move,order",
    [
        ("single-flip", 8, None, None, "random"),
        ("bond-exchange", 10, 0, "bonds", "random"),
        ("pair-exchange", 8, 1, "pairs", "random"),
        ("sequential-flip", 8, None, None, "sequential"),
        ("sequential-exchange", 10, 0, "bonds", "sequential"),
        ("compiled-flip", 8, None, None, "random"),
        ("compiled-sequential-exchange", 10, 0, "bonds", "sequential"),
    ],
)
def test_histogram_converges_to_psi_squared(name, n_sites, magnetisation, move, order):
    space = SpinSpace(n_sites, magnetisation=magnetisation)
    log_amp = rbm_state(n_sites, 3, 0.25, bound=name.startswith("compiled"))
    if name.startswith("compiled"):  # the compiled sweep kernel, checked against |ψ|² itself
        assert fast_updates_of(log_amp).dense_rbm is not None
    mv = {None: None, "bonds": BondExchange(lattices.chain(n_sites).bonds), "pairs": pair_exchange}[move]
    sampler = MetropolisChains(space, n_chains=6000, move=mv, burn_in=30, order=order)
    samples = final_configurations(sampler, log_amp, seed=7)
    log_psi = np.asarray(log_amp(jnp.asarray(space.configurations())))
    target = np.exp(2 * (log_psi - log_psi.max()))
    assert goodness_of_fit(samples, space, target) > 1e-3
    # the same counts reject a wrong target |ψ| (not squared): the test has power
    assert goodness_of_fit(samples, space, np.sqrt(target)) < 1e-8


def test_metropolis_acceptance_probability():
    """One spin with ψ(↑) = 1, ψ(↓) = e^{−a}: from ↑ a flip is accepted with probability
    min(1, |ψ(↓)/ψ(↑)|²) = e^{−2a} (Metropolis et al. 1953); from ↓ always."""
    a = 0.4
    log_amp = lambda x: -a * (x[:, 0] < 0)
    step = jax.jit(lambda k, s: metropolis_step(single_flip)(k, s, log_amp))
    from psiloom.sampling import ChainState

    n = 20000
    up = jnp.ones((n, 1))
    state, info = step(jax.random.PRNGKey(0), ChainState(up, log_amp(up)))
    accepted = int(np.sum(np.asarray(info.accepted)))
    assert binomtest(accepted, n, np.exp(-2 * a)).pvalue > 1e-3
    np.testing.assert_allclose(np.asarray(info.log_ratio), -2 * a)
    # the cached log-amplitudes follow the accepted moves
    np.testing.assert_allclose(np.asarray(state.log_amp), np.asarray(log_amp(state.x)))
    down = -up
    _, info = step(jax.random.PRNGKey(1), ChainState(down, log_amp(down)))
    assert bool(jnp.all(info.accepted))


# --------------------------------------------------------------------------- persistence, acceptance


def test_chains_persist_between_sample_calls():
    space = SpinSpace(8)
    log_amp = rbm_state(8, 3, 0.25)
    sampler = MetropolisChains(space, n_chains=64, sweep=1)

    @jax.jit
    def draw(key, state):
        return sampler.sample(key, state, log_amp, 5)

    state = sampler.init(jax.random.PRNGKey(0), log_amp)
    xs, logs, state1, acc = draw(jax.random.PRNGKey(1), state)
    assert xs.shape == (5, 64, 8) and logs.shape == (5, 64)
    np.testing.assert_array_equal(np.asarray(state1.x), np.asarray(xs[-1]))
    np.testing.assert_allclose(np.asarray(state1.log_amp), np.asarray(log_amp(state1.x)), rtol=1e-12)
    np.testing.assert_allclose(np.asarray(logs), np.asarray(log_amp(xs.reshape(-1, 8))).reshape(5, 64), rtol=1e-12)
    # consecutive stored samples (one proposal apart) differ by at most one flip ...
    xs = np.asarray(xs)
    assert np.all(np.sum(xs[1:] != xs[:-1], axis=-1) <= 1)
    # ... and so does the first sample of the next call from the last of this one
    xs2, _, _, _ = draw(jax.random.PRNGKey(2), state1)
    assert np.all(np.sum(np.asarray(xs2[0]) != xs[-1], axis=-1) <= 1)
    assert 0.0 <= float(acc) <= 1.0


def test_refresh_recomputes_cached_log_amplitudes():
    space = SpinSpace(8)
    sampler = MetropolisChains(space, n_chains=4)
    old, new = rbm_state(8, 3, 0.25), rbm_state(8, 4, 0.25)
    state = sampler.init(jax.random.PRNGKey(0), old)
    refreshed = sampler.refresh(state, new)
    np.testing.assert_array_equal(np.asarray(refreshed.x), np.asarray(state.x))
    np.testing.assert_allclose(np.asarray(refreshed.log_amp), np.asarray(new(state.x)))


def test_constant_amplitude_accepts_everything():
    # |ψ(x')/ψ(x)|² = 1 for every proposal (null swaps of equal spins included): acceptance 1
    space = SpinSpace(6, magnetisation=0)
    sampler = MetropolisChains(space, n_chains=8, bonds=lattices.chain(6).bonds, burn_in=1)
    flat = lambda x: jnp.zeros(x.shape[0])
    state = sampler.init(jax.random.PRNGKey(0), flat)
    xs, _, _, acc = jax.jit(lambda k, s: sampler.sample(k, s, flat, 3))(jax.random.PRNGKey(1), state)
    assert float(acc) == 1.0
    assert np.all(space.contains(np.asarray(xs).reshape(-1, 6)))


@given(st.integers(0, 40))
def test_ordered_moves_visit_their_table_in_every_chain(position):
    x = SpinSpace(6).random(jax.random.PRNGKey(position), 5)
    bonds = lattices.chain(6).bonds
    x_new, sites = BondExchange(bonds).ordered(0)(position, x)
    i, j = bonds[position % len(bonds)]
    assert sites.shape == (2,) and tuple(np.asarray(sites)) == (i, j)
    expected = np.asarray(x).copy()
    expected[:, [i, j]] = expected[:, [j, i]]
    np.testing.assert_array_equal(np.asarray(x_new), expected)
    x_flip, site = SingleFlip().ordered(6)(position, x)
    expected = np.asarray(x).copy()
    expected[:, position % 6] *= -1
    np.testing.assert_array_equal(np.asarray(x_flip), expected)
    assert int(site[0]) == position % 6
    # the fast scan's view of the same proposals: its sites and the values written there
    for move, moved in ((BondExchange(bonds).ordered(0), x_new), (SingleFlip().ordered(6), x_flip)):
        at = np.asarray(move.sites_at(jnp.asarray([position, position + 7])))
        assert at.shape == (2, move.array.shape[1])
        written = np.asarray(x).copy()
        written[:, at[0]] = np.asarray(move.proposed_values(x[:, at[0]]))
        np.testing.assert_array_equal(written, np.asarray(moved))
        np.testing.assert_array_equal(at[1], move.array[(position + 7) % move.n_positions])


def test_sequential_order_needs_an_orderable_move():
    with pytest.raises(ValueError, match="order='sequential'"):
        MetropolisChains(SpinSpace(4, magnetisation=0), order="sequential")  # pair exchange by default
    with pytest.raises(ValueError, match="'diagonal'"):
        MetropolisChains(SpinSpace(4), order="diagonal")
    ordered = MetropolisChains(SpinSpace(4, magnetisation=0), bonds=lattices.chain(4).bonds, order="sequential")
    assert ordered.ordered.kind == "exchange" and ordered.ordered.n_positions == 4
    # an ordered move given to a random-order sampler falls back to its randomised version
    assert MetropolisChains(SpinSpace(4), move=SingleFlip().ordered(4)).move == single_flip


def test_default_moves():
    assert MetropolisChains(SpinSpace(4)).move == single_flip
    assert MetropolisChains(SpinSpace(4, magnetisation=0)).move == pair_exchange
    assert MetropolisChains(SpinSpace(4, magnetisation=0)).sweep == 4


# --------------------------------------------------------------------------- bad input


@given(st.one_of(st.integers(max_value=0), st.just(2.5), st.just(True)))
def test_bad_chain_count_raises(n_chains):
    with pytest.raises(ValueError) as err:
        MetropolisChains(SpinSpace(4), n_chains=n_chains)
    assert repr(n_chains) in str(err.value)


@given(st.integers(max_value=-1))
def test_negative_counts_raise(count):
    with pytest.raises(ValueError) as err:
        MetropolisChains(SpinSpace(4), burn_in=count)
    assert str(count) in str(err.value)
    with pytest.raises(ValueError) as err:
        MetropolisChains(SpinSpace(4), sweep=count)
    assert str(count) in str(err.value)
    sampler = MetropolisChains(SpinSpace(4), n_chains=2)
    flat = lambda x: jnp.zeros(x.shape[0])
    state = sampler.init(jax.random.PRNGKey(0), flat)
    with pytest.raises(ValueError) as err:
        sampler.sample(jax.random.PRNGKey(1), state, flat, count)
    assert str(count) in str(err.value)


def test_zero_samples_per_chain_raises():
    sampler = MetropolisChains(SpinSpace(4), n_chains=2)
    flat = lambda x: jnp.zeros(x.shape[0])
    with pytest.raises(ValueError, match="n_per_chain"):
        sampler.sample(jax.random.PRNGKey(1), sampler.init(jax.random.PRNGKey(0), flat), flat, 0)


@given(st.integers(2, 12).filter(lambda n: n % 2 == 0))
def test_single_flip_on_constrained_space_raises(n):
    with pytest.raises(ValueError) as err:
        MetropolisChains(SpinSpace(n, magnetisation=0), move=single_flip)
    assert "magnetisation=0.0" in str(err.value)


def test_bonds_that_never_move_a_site_are_refused():
    """An exchange over bonds that miss a site would keep that site at its starting value in every
    chain (a wrong distribution without a word): refused, naming the sites."""
    space = SpinSpace(6, magnetisation=0)
    with pytest.raises(ValueError, match=r"never moves sites \[4, 5\]"):
        MetropolisChains(space, n_chains=4, bonds=[(0, 1), (1, 2), (2, 3)])
    with pytest.raises(ValueError, match=r"never moves sites \[5\]"):
        MetropolisChains(space, n_chains=4, bonds=[(0, 1), (1, 2), (2, 3), (3, 4)], order="sequential")
    MetropolisChains(space, n_chains=4, bonds=[(0, 1), (1, 2), (2, 3), (3, 4), (4, 5)])  # an open chain: fine
