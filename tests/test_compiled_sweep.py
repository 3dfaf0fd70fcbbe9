"""Compiled Metropolis sweeps of the RBM (psiloom.sampling.compiled).

References: the RBM amplitude ψ(x) = e^{a·x} Π_j 2cosh(θ_j), θ = xW + b (Carleo & Troyer,
Science 355, 602 (2017), Eq. 2), evaluated here straight from the formula with NumPy; the
Metropolis rule min(1, |ψ(x')/ψ(x)|²) (Metropolis et al. 1953), whose chains the compiled kernel
must reproduce proposal for proposal from the same random numbers as the JAX path.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import psiloom as pl
from psiloom.sampling import compiled
from psiloom.states import RBM, BoundState, fast_updates_of

pytestmark = pytest.mark.skipif(not compiled.available(), reason="compiled sweeps need Numba and the CPU backend")

EPS32 = float(np.finfo(np.float32).eps)


def _numpy_log_psi(params, x):
    """log ψ from the RBM formula in NumPy; log 2cosh θ = |θ| + log1p(e^{−2|θ|}) (exact rewrite)."""
    p = jax.tree_util.tree_map(np.asarray, params)
    theta = x @ p["kernel"] + p.get("hidden_bias", 0.0)
    out = np.sum(np.abs(theta) + np.log1p(np.exp(-2.0 * np.abs(theta))), axis=-1)
    return out + (x @ p["visible_bias"] if "visible_bias" in p else 0.0)


def _setup(n_sites, constrained, scale, seed, visible_bias=True, hidden_bias=True, cache_dtype=None):
    space = pl.spaces.SpinSpace(n_sites, magnetisation=0 if constrained else None)
    model = RBM(alpha=2, init_scale=scale, visible_bias=visible_bias, hidden_bias=hidden_bias,
                cache_dtype=cache_dtype)
    variables = model.init(jax.random.PRNGKey(seed), space.random(jax.random.PRNGKey(seed + 1), 1))
    return space, model, variables


def _run(space, model, variables, order, compiled, n_chains=6, n_per_chain=5, burn_in=2, seed=0):
    lattice = pl.lattices.chain(space.n_sites)
    sampler = pl.sampling.MetropolisChains(space, n_chains=n_chains, order=order, burn_in=burn_in,
                                            bonds=lattice.bonds if space.is_sector else None,
                                            compiled_sweeps=compiled)
    amp = BoundState(model, variables)
    state = sampler.init(jax.random.PRNGKey(seed), amp)
    return jax.jit(lambda s, k: sampler.sample(k, s, amp, n_per_chain))(state, jax.random.PRNGKey(seed + 1))


# hidden fields from small to huge: groups of 32 factors (d_max ≈ 1), a few factors per group
# (d_max ≈ 20), and one factor at a time with renormalisation after each (d_max ≈ 200 for
# scale 15; larger scales push |θ| past ~354, where the pair cache itself underflows: see rbm.py)
@settings(max_examples=10, deadline=None)
@given(scale=st.sampled_from([0.05, 0.3, 3.0, 15.0]), seed=st.integers(0, 10_000),
       constrained=st.booleans(), order=st.sampled_from(["random", "sequential"]),
       biases=st.sampled_from([(True, True), (False, True), (True, False), (False, False)]))
def test_compiled_log_amplitudes_follow_the_formula(scale, seed, constrained, order, biases):
    """After every sweep the carried log ψ equals the NumPy formula at the sampled configuration:
    accumulated Δ log ψ stay exact (to float64 rounding of the accumulated sum) at any |W|."""
    space, model, variables = _setup(10, constrained, scale, seed, *biases)
    xs, logs, end, acc = _run(space, model, variables, order, True, seed=seed)
    xs, logs = np.asarray(xs), np.asarray(logs)
    expected = _numpy_log_psi(variables["params"], xs)
    assert np.all(np.isfinite(logs))
    scale_of_terms = np.abs(np.asarray(variables["params"]["kernel"])).sum() * 2 + 1.0  # ≥ Σ_j |θ_j| bound
    np.testing.assert_allclose(logs, expected, rtol=0, atol=1e-11 * scale_of_terms * 40)
    if space.is_sector:
        np.testing.assert_array_equal(xs.sum(-1), 0)  # exchanges conserve the magnetisation
    fresh = model.apply(variables, method="fast_updates").init(end.x)
    np.testing.assert_allclose(np.asarray(end.cache.plus), np.asarray(fresh.plus), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(np.asarray(end.cache.minus), np.asarray(fresh.minus), rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("constrained, order", [(False, "random"), (True, "sequential"), (True, "random")])
def test_huge_weights_chain_equals_jax_path(constrained, order):
    """With |W| ~ 15 (every factor renormalised separately) the compiled and JAX fast paths still
    make the same decisions: the chains agree, and the log ψ with them."""
    space, model, variables = _setup(10, constrained, 15.0, 3)
    a = _run(space, model, variables, order, True, seed=4)
    b = _run(space, model, variables, order, False, seed=4)
    np.testing.assert_array_equal(np.asarray(a[0]), np.asarray(b[0]))
    scale_of_terms = np.abs(np.asarray(variables["params"]["kernel"])).sum()
    np.testing.assert_allclose(np.asarray(a[1]), np.asarray(b[1]), rtol=0, atol=1e-13 * scale_of_terms * 40)
    assert float(a[3]) == float(b[3])


@pytest.mark.parametrize("order", ["random", "sequential"])
def test_float32_cache_compiled_chain_follows_the_formula(order):
    """Float32 cache: the compiled chain's log ψ stay within the float32 rounding bound of the
    formula, 4 M ε₃₂ per accepted update summed over the updates (common practice), and the
    chain equals the JAX float32 path's."""
    space, model, variables = _setup(12, True, 0.3, 5, cache_dtype=jnp.float32)
    a = _run(space, model, variables, order, True, n_per_chain=4, seed=6)
    b = _run(space, model, variables, order, False, n_per_chain=4, seed=6)
    np.testing.assert_array_equal(np.asarray(a[0]), np.asarray(b[0]))
    assert np.asarray(a[2].cache.plus).dtype == np.float32 and np.asarray(a[1]).dtype == np.float64
    expected = _numpy_log_psi(variables["params"], np.asarray(a[0]))
    m = 24
    n_updates = (2 + 4) * 12  # at most one accepted update per proposal: sweeps × proposals per sweep
    np.testing.assert_allclose(np.asarray(a[1]), expected, rtol=0, atol=4 * m * EPS32 * n_updates)


def test_translation_invariant_rbm_uses_compiled_sweeps():
    lattice = pl.lattices.chain(10)
    space = pl.spaces.SpinSpace(10, magnetisation=0)
    model = pl.states.TranslationInvariantRBM(pl.symmetry.translations(lattice), alpha=2, init_scale=0.5)
    variables = model.init(jax.random.PRNGKey(1), space.random(jax.random.PRNGKey(2), 1))
    assert fast_updates_of(BoundState(model, variables)).dense_rbm is not None
    a = _run(space, model, variables, "sequential", True)
    b = _run(space, model, variables, "sequential", False)
    np.testing.assert_array_equal(np.asarray(a[0]), np.asarray(b[0]))
    np.testing.assert_allclose(np.asarray(a[1]), np.asarray(b[1]), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(np.asarray(a[1]), np.asarray(model.apply(variables, a[0])), rtol=1e-12, atol=1e-11)


def test_moves_without_an_entry_table_keep_the_jax_path():
    """Pair exchange picks its sites from x, so a kernel cannot draw them: the JAX path runs."""
    space, model, variables = _setup(8, True, 0.3, 2)
    sampler = pl.sampling.MetropolisChains(space, n_chains=4, move=pl.sampling.pair_exchange)
    assert sampler.move.entry_table(8) is None
    amp = BoundState(model, variables)
    xs, logs, _, _ = sampler.sample(jax.random.PRNGKey(0), sampler.init(jax.random.PRNGKey(1), amp), amp, 3)
    np.testing.assert_allclose(np.asarray(logs), _numpy_log_psi(variables["params"], np.asarray(xs)), atol=1e-11)


def test_sample_vmaps_over_keys():
    """The host call is vmappable (one kernel call per batch entry)."""
    space, model, variables = _setup(8, False, 0.3, 2)
    sampler = pl.sampling.MetropolisChains(space, n_chains=4, order="sequential", compiled_sweeps=True)
    amp = BoundState(model, variables)
    state = sampler.init(jax.random.PRNGKey(1), amp)
    keys = jax.random.split(jax.random.PRNGKey(2), 3)
    xs = jax.vmap(lambda k: sampler.sample(k, state, amp, 2)[0])(keys)
    for i in range(3):
        np.testing.assert_array_equal(np.asarray(xs[i]), np.asarray(sampler.sample(keys[i], state, amp, 2)[0]))


def test_bad_inputs_are_refused():
    space, model, variables = _setup(6, False, 0.3, 2)
    fast = fast_updates_of(BoundState(model, variables))
    x = space.random(jax.random.PRNGKey(0), 3)
    cache, log_amp = fast.init(x), model.apply(variables, x)
    log_u = jnp.zeros((1, 2, 3))
    positions = jnp.zeros((1, 2, 1), jnp.int32)
    with pytest.raises(ValueError, match="kind='diagonal'"):
        compiled.run_sweeps(fast.dense_rbm, x, cache, log_amp, np.zeros((6, 1), int), positions, log_u, "diagonal")
    with pytest.raises(ValueError, match="kind='exchange'"):
        compiled.run_sweeps(fast.dense_rbm, x, cache, log_amp, np.zeros((6, 1), int), positions, log_u, "exchange")
    with pytest.raises(ValueError, match="outside the 6-site"):
        compiled.run_sweeps(fast.dense_rbm, x, cache, log_amp, np.array([[0], [6]]), positions, log_u, "flip")
    with pytest.raises(ValueError, match=r"positions must have shape"):
        compiled.run_sweeps(fast.dense_rbm, x, cache, log_amp, np.arange(6)[:, None], jnp.zeros((1, 2, 2), jnp.int32), log_u, "flip")
    for bad in ("yes", 1, None):
        with pytest.raises(ValueError, match="compiled_sweeps must be True, False or .auto."):
            pl.sampling.MetropolisChains(space, compiled_sweeps=bad)


def test_complex_rbm_offers_no_compiled_sweeps():
    space = pl.spaces.SpinSpace(6)
    model = RBM(alpha=1, complex_params=True)
    variables = model.init(jax.random.PRNGKey(0), space.random(jax.random.PRNGKey(1), 1))
    fast = fast_updates_of(BoundState(model, variables))
    assert fast is not None and fast.dense_rbm is None


_NAN_SCRIPT = """
import jax, jax.numpy as jnp, numba
jax.config.update("jax_enable_x64", True)
import psiloom as pl
from psiloom.states import RBM, BoundState
space = pl.spaces.SpinSpace(6)
model = RBM(alpha=2, init_scale=0.3)
variables = model.init(jax.random.PRNGKey(0), space.random(jax.random.PRNGKey(1), 1))
params = dict(variables["params"])
params["kernel"] = params["kernel"].at[0, 0].set(jnp.nan)
amp = BoundState(model, {"params": params})
sampler = pl.sampling.MetropolisChains(space, n_chains=4, compiled_sweeps=True)
state = sampler.init(jax.random.PRNGKey(2), amp)
try:
    sampler.sample(jax.random.PRNGKey(3), state, amp, 2)
except Exception as err:
    print("raised", type(err).__name__, "non-finite" in str(err))
else:
    print("no exception")
print("cache dir", numba.config.CACHE_DIR)  # set when the kernel's module was imported (by the call)
"""


def test_nan_parameter_raises_instead_of_killing_python(tmp_path):
    """A NaN weight once turned into int(NaN) and a modulo by zero inside the kernel (SIGFPE, the
    interpreter died). Now the host call refuses non-finite input with an exception; run in a
    subprocess so that a signal death would show as a negative return code. The same run checks
    that Numba's disk cache goes under the user's cache dir (XDG_CACHE_HOME), not the package."""
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}
    env["XDG_CACHE_HOME"] = str(tmp_path)
    env["PYTHONPATH"] = os.pathsep.join([os.path.dirname(os.path.dirname(pl.__file__)), env.get("PYTHONPATH", "")])
    done = subprocess.run([sys.executable, "-c", _NAN_SCRIPT], env=env, capture_output=True, text=True,
                          timeout=600, cwd=tmp_path)
    assert done.returncode == 0, (done.returncode, done.stderr[-2000:])
    assert "raised" in done.stdout and "True" in done.stdout, done.stdout
    assert f"cache dir {tmp_path / 'psiloom' / 'numba'}" in done.stdout, done.stdout


def test_hidden_fields_beyond_the_pair_cache_limit_raise():
    """|θ| beyond ~354 (float64) underflows the smaller member of (1 ± tanh θ) and the fast update
    then loses log ψ (see rbm.py); the compiled sweeps refuse instead of returning a finite but
    wrong log ψ. One hidden unit with W = 200: |θ| = 200 |Σx| ≥ 400 at the start."""
    space = pl.spaces.SpinSpace(6, magnetisation=1)
    model = RBM(alpha=1 / 6, visible_bias=False, hidden_bias=False)
    variables = {"params": {"kernel": jnp.full((6, 1), 200.0)}}
    assert compiled.pair_cache_limit(np.float64) == pytest.approx(354.5, abs=0.1)
    amp = BoundState(model, variables)
    sampler = pl.sampling.MetropolisChains(space, n_chains=4, bonds=pl.lattices.chain(6).bonds, compiled_sweeps=True)
    state = sampler.init(jax.random.PRNGKey(0), amp)
    with pytest.raises(Exception, match="pair cache"):
        sampler.sample(jax.random.PRNGKey(1), state, amp, 2)
    # a start inside the limit (Σx = 0, θ = 0) whose chains walk beyond it (|θ| = 100·|Σx| → 400):
    # caught by the per-update check inside the kernel
    variables = {"params": {"kernel": jnp.full((6, 1), 100.0)}}
    amp = BoundState(model, variables)
    sampler = pl.sampling.MetropolisChains(pl.spaces.SpinSpace(6), n_chains=4, compiled_sweeps=True)
    x0 = space.__class__(6, magnetisation=0).random(jax.random.PRNGKey(2), 4)
    state = sampler.refresh(pl.sampling.ChainState(x0, amp(x0)), amp)
    with pytest.raises(Exception, match="pair cache"):
        sampler.sample(jax.random.PRNGKey(3), state, amp, 2)


def test_sampling_program_has_no_python_callback():
    """The kernel is called as a named XLA foreign function, not through a Python callback: JAX's
    persistent cache refuses programs with host callbacks ("Not writing persistent cache entry ...
    because it uses host callbacks"), which made every process compile the training step again."""
    space, model, variables = _setup(8, False, 0.3, 2)
    sampler = pl.sampling.MetropolisChains(space, n_chains=4, compiled_sweeps=True)
    amp = BoundState(model, variables)
    state = sampler.init(jax.random.PRNGKey(1), amp)
    text = jax.jit(lambda k: sampler.sample(k, state, amp, 2)[0]).lower(jax.random.PRNGKey(2)).as_text()
    assert "psiloom_rbm_sweeps_float64_serial" in text  # 4 chains: the serial kernel
    assert "callback" not in text.lower()


def test_parallel_kernel_chain_equals_jax_path():
    """Enough chains × hidden units (≥ compiled.PARALLEL_WORK) select the kernel whose chain blocks
    run on several threads: its chains equal the JAX fast path's as the serial kernel's do."""
    space, model, variables = _setup(16, True, 0.3, 7)  # M = 32 hidden units
    n_chains = -(-compiled.PARALLEL_WORK // 32)
    a = _run(space, model, variables, "random", True, n_chains=n_chains, n_per_chain=2, seed=8)
    b = _run(space, model, variables, "random", False, n_chains=n_chains, n_per_chain=2, seed=8)
    text = jax.jit(lambda: _run(space, model, variables, "random", True, n_chains=n_chains, n_per_chain=2,
                                seed=8)[0]).lower().as_text()
    assert "psiloom_rbm_sweeps_float64_parallel" in text
    np.testing.assert_array_equal(np.asarray(a[0]), np.asarray(b[0]))
    np.testing.assert_allclose(np.asarray(a[1]), np.asarray(b[1]), rtol=0, atol=1e-10)
