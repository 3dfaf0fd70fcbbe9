"""The training loop: bit-identical resume, non-finite stops, history round trips, bad input."""

from __future__ import annotations

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from hypothesis import given
from hypothesis import strategies as st

import psiloom as pl
from psiloom.spaces import SpinSpace
from psiloom.states import RBM, TrialState
from psiloom.testing import trees_equal
from psiloom.train import GroundStateSearch, History, NonFiniteError, load_checkpoint, save_checkpoint

L = 6


def make_search(model=None, optimizer=None, n_samples=64, n_chains=8):
    lat = pl.lattices.chain(L)
    space = SpinSpace(L, magnetisation=0)
    sampler = pl.sampling.MetropolisChains(space, n_chains=n_chains, bonds=lat.bonds, burn_in=1)
    if optimizer is None:
        optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05))
    model = RBM(alpha=1.0, complex_params=True, init_scale=0.05) if model is None else model
    return GroundStateSearch(model, pl.operators.heisenberg(lat), sampler, optimizer, n_samples=n_samples)


def test_trees_equal_is_bit_exact_and_counts_nan_as_equal():
    a = {"w": np.array([1.0, np.nan]), "n": np.array([3], np.int32)}
    assert trees_equal(a, {"w": np.array([1.0, np.nan]), "n": np.array([3], np.int32)})
    assert not trees_equal(a, {"w": np.array([np.nextafter(1.0, 2.0), np.nan]), "n": np.array([3], np.int32)})
    assert not trees_equal(a, {"w": np.array([1.0, np.nan])})  # a leaf fewer
    assert not trees_equal(a, {"w": np.array([1.0, 0.0]), "n": np.array([3], np.int32)})


@pytest.fixture(scope="module")
def search():
    # one instance (one compilation) shared by the tests that only run it
    return make_search()


@pytest.fixture(scope="module")
def start(search):
    return search.init(jax.random.PRNGKey(42))


def test_resume_from_checkpoint_is_bit_identical(search, start, tmp_path):
    straight, hist_straight = search.run(6, state=start, progress=False)

    path = str(tmp_path / "run.ckpt")
    half, _ = search.run(3, state=start, progress=False, checkpoint=path, checkpoint_every=3)
    loaded, hist_loaded = search.resume(path)
    assert int(loaded.step) == 3 and len(hist_loaded) == 3
    assert trees_equal(loaded, half)
    resumed, hist_resumed = search.run(6, state=loaded, history=hist_loaded, progress=False)

    assert int(resumed.step) == int(straight.step) == 6
    assert trees_equal(resumed.params, straight.params)
    assert trees_equal(resumed.opt_state, straight.opt_state)
    assert trees_equal(resumed.chains, straight.chains)
    assert trees_equal(resumed.key, straight.key)
    for column in ("step", "energy", "error", "variance", "acceptance", "grad_norm"):
        np.testing.assert_array_equal(hist_resumed[column], hist_straight[column])
    # the run actually moved: an unchanged state would make the comparison vacuous
    assert not trees_equal(straight.params, start.params)


def test_history_save_and_load_round_trip(search, start, tmp_path):
    _, hist = search.run(3, state=start, progress=False)
    path = str(tmp_path / "history.json")
    hist.save(path)
    back = History.load(path)
    assert list(back.columns) == list(hist.columns)
    for name, column in hist.columns.items():  # nan (R̂ not computed) round-trips as nan
        np.testing.assert_array_equal(np.asarray(back[name]), np.asarray(column), err_msg=name)
    assert len(back) == 3 and list(back["step"]) == [1, 2, 3]  # 1-based: the state's step after the update
    assert np.all(np.isfinite(back["energy"])) and np.all(back["error"] >= 0)
    assert np.all((back["acceptance"] >= 0) & (back["acceptance"] <= 1))


def test_checkpoint_round_trip_preserves_dtypes(start, tmp_path):
    state = start
    path = str(tmp_path / "s.ckpt")
    save_checkpoint(path, state)
    back, hist = load_checkpoint(path, start)
    assert len(hist) == 0
    for a, b in zip(jax.tree_util.tree_leaves(state), jax.tree_util.tree_leaves(back)):
        assert np.asarray(a).dtype == np.asarray(b).dtype
        np.testing.assert_array_equal(np.asarray(a), np.asarray(b))


# --------------------------------------------------------------------------- non-finite stops


class BreaksAtThreshold(TrialState):
    """log ψ = w·x + log(T − c): finite while the scalar parameter c < T, NaN beyond."""

    threshold: float = 3.5

    @nn.compact
    def log_amplitude(self, x):
        w = self.param("w", nn.initializers.normal(0.1), (x.shape[-1],), jnp.float64)
        c = self.param("counter", nn.initializers.zeros, (), jnp.float64)
        return x @ w + jnp.log(self.threshold - c)


def count_steps() -> optax.GradientTransformation:
    """Ignore the gradient of ``counter`` and raise it by one per step; plain SGD for the rest."""

    def init(params):
        return optax.EmptyState()

    def update(grads, state, params=None):
        upd = jax.tree_util.tree_map(lambda g: -0.01 * g, grads)
        upd["params"]["counter"] = jnp.ones_like(grads["params"]["counter"])
        return upd, state

    return optax.GradientTransformation(init, update)


def test_step_rhat_only_adds_the_rhat_column(search, start):
    # R̂ per training step is opt-in (step_rhat=True); it is a diagnostic, so switching it on
    # must leave the run itself bit-identical: same energies, errors and final parameters.
    _, plain = search.run(3, state=start, progress=False)
    with_rhat = GroundStateSearch(search.model, search.hamiltonian, search.sampler, optax.chain(
        pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05)), n_samples=64, step_rhat=True)
    _, diagnosed = with_rhat.run(3, state=start, progress=False)
    assert np.all(np.isnan(plain["rhat"]))
    # 8 chains of 8 samples, split: R̂ is finite and near 1 for chains that move (Vehtari et al.
    # 2021 call chains mixed below 1.01; 2 is far outside anything mixed chains give)
    assert np.all(np.isfinite(diagnosed["rhat"])) and np.all((diagnosed["rhat"] > 0.8) & (diagnosed["rhat"] < 2.0))
    for column in ("energy", "error", "variance", "tau", "acceptance", "grad_norm"):
        assert np.array_equal(plain[column], diagnosed[column]), column


@pytest.mark.parametrize("bad", [1, "yes", None])
def test_step_rhat_must_be_a_bool(bad):
    lat = pl.lattices.chain(L)
    space = SpinSpace(L, magnetisation=0)
    sampler = pl.sampling.MetropolisChains(space, n_chains=8, bonds=lat.bonds)
    with pytest.raises(ValueError, match="step_rhat"):
        GroundStateSearch(RBM(alpha=1.0), pl.operators.heisenberg(lat), sampler, optax.sgd(0.1), n_samples=64,
                          step_rhat=bad)


def test_nan_stops_run_and_keeps_last_good_checkpoint(tmp_path):
    run = make_search(model=BreaksAtThreshold(), optimizer=count_steps())
    path = str(tmp_path / "nan.ckpt")
    start = run.init(jax.random.PRNGKey(5))
    # steps 1..4 see counter = 0..3 < 3.5: finite; step 5 (state.step 4 -> 5) sees counter = 4:
    # log of a negative
    good, _ = run.run(4, state=start, progress=False)
    with pytest.raises(NonFiniteError) as err:
        run.run(10, state=start, progress=False, checkpoint=path, checkpoint_every=1)
    assert err.value.step == 5
    assert "step 5" in str(err.value)
    saved, hist = run.resume(path)
    assert int(saved.step) == 4 and len(hist) == 4
    assert trees_equal(saved.params, good.params)
    assert float(saved.params["params"]["counter"]) == 4.0
    # resuming from the bad point fails again and leaves the file byte-for-byte untouched
    before = open(path, "rb").read()
    with pytest.raises(NonFiniteError, match="step 5"):
        run.run(10, state=saved, history=hist, progress=False, checkpoint=path, checkpoint_every=1)
    assert open(path, "rb").read() == before


def test_infinite_energy_names_step():
    # an energy wrapper returning inf from a fixed step on, driven by the parameter counter
    lat = pl.lattices.chain(L)
    base = pl.operators.heisenberg(lat)

    class Wrapped:
        n_sites = L

        def local_energy(self, log_amplitude, x, log_amp_x=None, chunk=None):
            e = base.local_energy(log_amplitude, x, log_amp_x, chunk)
            counter = jnp.exp(-log_amplitude(jnp.zeros((1, L)))[0])  # = 1/(T − c) for x = 0
            return jnp.where(counter > 1.0 / 2.5, jnp.inf, e)  # c > 7.5 → inf (step 9 sees c = 8)

    space = SpinSpace(L, magnetisation=0)
    sampler = pl.sampling.MetropolisChains(space, n_chains=8, bonds=lat.bonds)
    run = GroundStateSearch(BreaksAtThreshold(threshold=10.0), Wrapped(), sampler, count_steps(), n_samples=64)
    with pytest.raises(NonFiniteError) as err:
        run.run(20, key=jax.random.PRNGKey(1), progress=False)
    assert err.value.step == 9 and "step 9" in str(err.value) and err.value.what == "energy"


# --------------------------------------------------------------------------- bad input


bad_counts = st.one_of(st.integers(max_value=0), st.just(2.5), st.just(True), st.just("64"))


@given(bad_counts)
def test_bad_n_samples_raises(n_samples):
    with pytest.raises(ValueError) as err:
        make_search(n_samples=n_samples)
    assert repr(n_samples) in str(err.value)


@given(st.integers(1, 200).filter(lambda n: n % 8))
def test_n_samples_not_multiple_of_chains_raises(n_samples):
    with pytest.raises(ValueError) as err:
        make_search(n_samples=n_samples, n_chains=8)
    assert f"n_samples={n_samples}" in str(err.value) and "n_chains=8" in str(err.value)


@given(st.one_of(st.integers(max_value=-1), st.just(1.5), st.just(True)))
def test_bad_n_steps_raises(search, start, n_steps):
    with pytest.raises(ValueError) as err:
        search.run(n_steps, state=start, progress=False)
    assert repr(n_steps) in str(err.value)


@given(bad_counts)
def test_bad_evaluation_samples_raises(search, start, n_samples):
    with pytest.raises(ValueError) as err:
        search.evaluate(start, n_samples)
    assert repr(n_samples) in str(err.value)


def test_hamiltonian_and_space_sizes_must_agree():
    sampler = pl.sampling.MetropolisChains(SpinSpace(4), n_chains=2)
    with pytest.raises(ValueError, match="6 sites.*4"):
        GroundStateSearch(RBM(), pl.operators.heisenberg(pl.lattices.chain(6)), sampler, optax.sgd(0.1), n_samples=4)


# ---------------------------------------------------------------- dispersed starts (evaluate)
N_SPIKE = 60


def spike_search(weight: float):
    """A search over 60 unconstrained spins (TFIM ring) whose RBM (one hidden unit, all-up
    direction u) has, with m = u·x/N,

        log ψ = log 2cosh(wN(m − 0.7)) + wNm ≈ 0.7wN (m < 0.7),  2wNm − 0.7wN (m > 0.7):

    flat over the bulk, rising steeply above m = 0.7. For w = 1 the all-up corner outweighs the
    whole bulk by e^{N(1.2w − ln 2)} ≈ e^{30} in |ψ|², yet a chain started in the bulk reaches
    m > 0.7 only against an entropy barrier of N(ln 2 − H((1 + 0.7)/2)) ≈ 16 nats (H the binary
    entropy in nats): once per ~10^7 sweeps. w = 0 is a healthy (uniform) state."""
    lat = pl.lattices.chain(N_SPIKE)
    space = SpinSpace(N_SPIKE)
    sampler = pl.sampling.MetropolisChains(space, n_chains=8)
    model = RBM(alpha=1.0 / N_SPIKE)
    search = GroundStateSearch(model, pl.operators.transverse_field_ising(lat, J=1.0, h=0.5), sampler,
                               optax.sgd(0.0), n_samples=64)
    params = {"params": {"kernel": jnp.full((N_SPIKE, 1), weight),
                         "hidden_bias": jnp.full((1,), -0.7 * N_SPIKE * weight),
                         "visible_bias": jnp.full((N_SPIKE,), weight)}}
    return search, search.init(jax.random.PRNGKey(3), params=params)


def test_dispersed_starts_reveal_weight_the_training_chains_never_saw():
    # Gelman & Rubin (Stat. Sci. 7, 457 (1992)): chains from overdispersed starting points expose
    # parts of the distribution that chains from one region miss; R-hat threshold 1.01 common practice.
    search, state = spike_search(1.0)
    plain, _ = search.evaluate(state, 2048, burn_in_sweeps=20)
    # the chains that continue from the random start stay in the flat bulk and agree with each other
    assert float(plain.rhat) < 1.05 and not any("not mixed" in w for w in plain.warnings())
    # flat bulk: ψ uniform there, so <σˣ> = 1 and <σᶻσᶻ> = 0 per bond: E = −hN = −30 (fluctuating by ~sqrt(N))
    assert abs(float(np.real(plain.mean)) + 0.5 * N_SPIKE) < 5.0
    up = np.ones((2, N_SPIKE))
    dispersed, _ = search.evaluate(state, 2048, burn_in_sweeps=20, starts=up)
    # two of eight chains start at the all-up corner and stay there (E_loc ≈ −N J = −60)
    assert float(dispersed.rhat) > 1.5
    assert any("not mixed" in w for w in dispersed.warnings())


def test_dispersed_starts_relax_in_a_healthy_state():
    search, state = spike_search(0.0)  # ψ uniform: a chain from the corner forgets it in a few sweeps
    est, _ = search.evaluate(state, 2048, burn_in_sweeps=20, starts=np.ones((2, N_SPIKE)))
    assert float(est.rhat) < 1.05


@pytest.mark.parametrize("bad", [np.ones((1, L + 1)), np.ones((9, L)), np.ones((0, L)), np.ones((2, 2, L))],
                         ids=["sites", "more-than-chains", "none", "ndim"])
def test_dispersed_starts_reject_bad_shapes(search, start, bad):
    with pytest.raises(ValueError, match=r"starts must have shape \(k, 6\)"):
        search.evaluate(start, 64, starts=bad)


@given(st.integers(0, L - 1), st.floats(allow_nan=True, allow_infinity=True).filter(lambda v: v not in (1.0, -1.0)))
def test_dispersed_starts_reject_configurations_outside_the_space(search, start, site, value):
    row = np.tile([1.0, -1.0], L // 2)
    row[site] = value  # not a spin value
    with pytest.raises(ValueError, match="starts row 1 is not a configuration"):
        search.evaluate(start, 64, starts=np.stack([np.tile([-1.0, 1.0], L // 2), row]))


def test_dispersed_starts_reject_the_wrong_magnetisation(search, start):
    four_up = np.where(np.arange(L) <= L // 2, 1.0, -1.0)  # spins ±1 but total Sz = 1, not 0
    with pytest.raises(ValueError, match="starts row 0 is not a configuration"):
        search.evaluate(start, 64, starts=four_up)


def test_measure_matches_the_exact_state_vector(search):
    """``measure`` on a state with random parameters agrees with ⟨v|O|v⟩ of the same state's exact
    vector (full enumeration of the Sᶻ = 0 sector) within 5 error bars (5σ: common practice)."""
    state = search.init(jax.random.PRNGKey(3))
    m_s = pl.operators.staggered_magnetization_z(pl.lattices.chain(L))
    ops = {"nn": pl.operators.spin_correlation(L, 0, 1), "far": pl.operators.spin_correlation(L, 0, 3),
           "m_s2": m_s * m_s}
    out = search.measure(state, ops, n_samples=4096, burn_in_sweeps=4)
    assert set(out) == set(ops)
    space = search.sampler.space
    vector = pl.reference.state_vector(search.vmc.bind(state.params), space)
    for name, op in ops.items():
        exact = pl.reference.expectation(op, vector, space)
        est = out[name]
        assert abs(float(np.real(est.mean)) - exact) < 5 * float(est.error) + 1e-12, (name, est, exact)


def test_measure_and_evaluate_say_when_samples_are_rounded(search):
    state = search.init(jax.random.PRNGKey(3))
    with pytest.warns(UserWarning, match="n_samples=60 is not a multiple of n_chains=8: 64 samples"):
        search.evaluate(state, n_samples=60)
    with pytest.raises(ValueError, match="observables"):
        search.measure(state, {}, n_samples=64)


def test_evaluation_programs_are_bounded(search):
    """Many distinct evaluation sizes keep at most EVALUATION_PROGRAMS compiled passes (the least
    recently used are dropped), and a kept one is reused, not recompiled."""
    state = search.init(jax.random.PRNGKey(4))
    sizes = [8 * k for k in range(1, search.EVALUATION_PROGRAMS + 3)]
    for n in sizes:
        search.evaluate(state, n_samples=n)
    kept = [tag for tag in search._programs if tag[0] == "evaluate"]
    assert len(search._programs) <= search.EVALUATION_PROGRAMS
    assert kept[-1] == ("evaluate", sizes[-1] // 8, 0)
    program = search._program("evaluate", sizes[-1] // 8, 0)
    search.evaluate(state, n_samples=sizes[-1])
    assert program._cache_size() == 1
