"""Trial states checked against their defining formulas, and the one-method extension contract."""

from __future__ import annotations

import itertools
import math

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from hypothesis import assume, given
from hypothesis import strategies as st

import psiloom as pl
from psiloom.spaces import SpinSpace
from psiloom.states import (
    RBM,
    FeedForward,
    ProductState,
    TrialState,
    TwoBodyJastrow,
    check_input_size,
    count_real_parameters,
    init_parameters,
    log_two_cosh,
    sum_log_two_cosh,
)


def randomize(variables, key, scale):
    """Replace every parameter by N(0, scale²) draws (complex: independent real/imag parts)."""
    leaves, treedef = jax.tree_util.tree_flatten(variables)
    keys = jax.random.split(key, 2 * len(leaves))
    new = []
    for k, leaf in enumerate(leaves):
        re = scale * jax.random.normal(keys[2 * k], leaf.shape)
        if jnp.iscomplexobj(leaf):
            re = re + 1j * scale * jax.random.normal(keys[2 * k + 1], leaf.shape)
        new.append(re.astype(leaf.dtype))
    return jax.tree_util.tree_unflatten(treedef, new)


def random_variables(model, n_sites: int, seed: int, scale: float):
    """Parameters of ``model`` for ``n_sites`` spins, redrawn with standard deviation ``scale``
    (compiled as one function: much cheaper than op-by-op execution)."""

    @jax.jit
    def make(key):
        k_init, k_draw = jax.random.split(key)
        return randomize(model.init(k_init, jnp.ones((1, n_sites))), k_draw, scale)

    return make(jax.random.PRNGKey(seed))


# --------------------------------------------------------------------------- RBM


@pytest.mark.parametrize("complex_params", [False, True])
@pytest.mark.parametrize("alpha,biases", [(1.0, (True, True)), (1.5, (False, True)), (0.5, (True, False))])
def test_rbm_equals_explicit_sum_over_hidden_units(complex_params, alpha, biases):
    """Definition of the RBM (Smolensky 1986; Carleo & Troyer 2017):
    ψ(x) = Σ_{h ∈ {±1}^M} exp(Σ_i a_i x_i + Σ_j b_j h_j + Σ_ij x_i W_ij h_j)."""
    n = 4
    model = RBM(alpha=alpha, complex_params=complex_params, visible_bias=biases[0], hidden_bias=biases[1])
    space = SpinSpace(n)
    variables = random_variables(model, n, 0, 0.4)
    p = jax.tree_util.tree_map(np.asarray, variables)["params"]
    w = p["kernel"]
    m = w.shape[1]
    assert m == max(1, round(alpha * n))
    a = p.get("visible_bias", np.zeros(n))
    b = p.get("hidden_bias", np.zeros(m))
    x = space.configurations()
    expected = np.zeros(len(x), dtype=complex)
    for h in itertools.product([-1.0, 1.0], repeat=m):
        h = np.array(h)
        expected += np.exp(x @ a + b @ h + x @ w @ h)
    log_psi = np.asarray(model.apply(variables, x))
    # compare amplitudes: log ψ is defined only modulo 2πi for complex parameters
    np.testing.assert_allclose(np.exp(log_psi), expected, rtol=1e-12)
    if not complex_params:
        assert log_psi.dtype == np.float64
        np.testing.assert_allclose(log_psi, np.log(expected.real), rtol=1e-12)
    else:
        assert log_psi.dtype == np.complex128


_CONVEX_N = 6
_convex_rbm_apply = jax.jit(RBM(alpha=2.0).apply)  # one compilation for all examples


@given(st.integers(0, 2**31 - 1), st.floats(0.0, 1.0), st.floats(0.05, 2.0))
def test_real_rbm_log_amplitude_is_convex(seed, lam, scale):
    """log ψ of a real RBM, a·x + Σ_j log 2cosh(w_j·x + b_j), is a sum of convex functions of
    affine forms of x, hence convex on R^N (Boyd & Vandenberghe, Convex Optimization, §3.2):
    it cannot fall again towards extreme configurations, the reason ``evaluate(starts=...)``
    exists. Checked as f(λx + (1−λ)y) ≤ λf(x) + (1−λ)f(y) at random real points."""
    n, m = _CONVEX_N, 2 * _CONVEX_N
    rng = np.random.default_rng(seed)
    variables = {"params": {"kernel": scale * rng.normal(size=(n, m)), "hidden_bias": scale * rng.normal(size=m),
                            "visible_bias": scale * rng.normal(size=n)}}
    x, y = 3 * rng.normal(size=(1, n)), 3 * rng.normal(size=(1, n))
    f = lambda z: float(_convex_rbm_apply(variables, jnp.asarray(z))[0])  # noqa: E731
    chord = lam * f(x) + (1 - lam) * f(y)
    assert f(lam * x + (1 - lam) * y) <= chord + 1e-9 * (1 + abs(chord))


def test_rbm_parameter_count():
    model = RBM(alpha=2, complex_params=True)
    v = jax.eval_shape(model.init, jax.random.PRNGKey(0), jax.ShapeDtypeStruct((1, 5), jnp.float64))
    # N·M + M + N complex numbers, each two real parameters
    assert count_real_parameters(v) == 2 * (5 * 10 + 10 + 5)


@given(st.floats(-20, 20), st.floats(-20, 20))
def test_log_two_cosh_matches_definition(re, im):
    z = complex(re, im)
    assume(abs(np.cosh(z)) > 1e-6)  # near the zeros of cosh the relative comparison is ill-posed
    value = complex(log_two_cosh(jnp.asarray(z)))
    # exp(log(2 cosh z)) = 2 cosh z (the logarithm is defined modulo 2πi)
    reference = 2.0 * np.cosh(z)
    np.testing.assert_allclose(np.exp(value), reference, rtol=1e-10, atol=1e-300)
    assert value.real == pytest.approx(np.log(abs(reference)), rel=1e-12, abs=1e-12)
    real_value = float(log_two_cosh(jnp.asarray(re)))
    assert real_value == pytest.approx(math.log(2.0 * math.cosh(re)), rel=1e-13)


@pytest.mark.parametrize("z", [800.0, -800.0, 1e5, -1e5, 700.0 + 2.5j, -750.0 + 1.0j])
def test_log_two_cosh_is_stable_for_large_arguments(z):
    # for |Re z| ≫ 1: 2 cosh z = e^{|z|} (1 + e^{−2|z|}) → log(2cosh z) = ±z (np.cosh overflows here)
    w = z if np.real(z) > 0 else -z
    value = complex(log_two_cosh(jnp.asarray(z)))
    assert np.isfinite(value.real) and np.isfinite(value.imag)
    assert value.real == pytest.approx(np.real(w), rel=1e-15)
    assert value.imag == pytest.approx(np.imag(w), abs=1e-12)
    # the derivative tanh z stays finite too
    if np.isrealobj(z):
        assert float(jax.grad(log_two_cosh)(jnp.asarray(z))) == pytest.approx(np.sign(z))


@given(st.lists(st.floats(-800, 800), min_size=1, max_size=40), st.integers(1, 3))
def test_sum_log_two_cosh_matches_elementwise_sum(values, rows):
    """The real-valued sum equals Σ log(2 cosh z) computed term by term with
    NumPy, log(2cosh z) = |z| + log1p(e^{−2|z|}), at any |z|; its gradient is tanh z."""
    z = np.tile(np.asarray(values), (rows, 1)) * np.linspace(1.0, 0.5, rows)[:, None]
    expected = np.sum(np.abs(z) + np.log1p(np.exp(-2.0 * np.abs(z))), axis=-1)
    got = np.asarray(sum_log_two_cosh(jnp.asarray(z)))
    np.testing.assert_allclose(got, expected, rtol=1e-13, atol=1e-12)
    grad = np.asarray(jax.grad(lambda t: jnp.sum(sum_log_two_cosh(t)))(jnp.asarray(z)))
    np.testing.assert_allclose(grad, np.tanh(z), rtol=1e-12, atol=1e-12)
    # a tuple of trailing axes sums them together; complex input takes the elementwise path
    cube = jnp.asarray(z)[:, :, None] * jnp.array([1.0, -0.5])
    np.testing.assert_allclose(np.asarray(sum_log_two_cosh(cube, axis=(1, 2))),
                               np.sum(np.abs(cube) + np.log1p(np.exp(-2 * np.abs(cube))), axis=(1, 2)), rtol=1e-13)
    zc = jnp.asarray(z) + 0.3j
    np.testing.assert_allclose(np.asarray(sum_log_two_cosh(zc)), np.asarray(jnp.sum(log_two_cosh(zc), axis=-1)),
                               rtol=1e-13)


# --------------------------------------------------------------------------- Jastrow, products


@pytest.mark.parametrize("complex_params,one_body", [(False, False), (True, True), (False, True)])
def test_jastrow_equals_double_sum(complex_params, one_body):
    # log ψ(x) = Σ_{i<j} x_i W_ij x_j + Σ_i f_i x_i (definition of the two-body Jastrow factor)
    n = 5
    model = TwoBodyJastrow(complex_params=complex_params, one_body=one_body)
    space = SpinSpace(n)
    v = random_variables(model, n, 2, 0.5)
    p = jax.tree_util.tree_map(np.asarray, v)["params"]
    x = space.configurations()
    expected = np.zeros(len(x), dtype=complex)
    for i in range(n):
        for j in range(i + 1, n):
            expected += x[:, i] * p["pair"][i, j] * x[:, j]
        if one_body:
            expected += p["field"][i] * x[:, i]
    out = np.asarray(model.apply(v, x))
    np.testing.assert_allclose(out, expected if complex_params else expected.real, atol=1e-12)
    assert out.dtype == (np.complex128 if complex_params else np.float64)
    # only the strict upper triangle is a parameter that matters
    lower = jax.tree_util.tree_map(lambda a: a, v)
    lower["params"]["pair"] = v["params"]["pair"] + jnp.tril(jnp.ones((n, n)))
    np.testing.assert_allclose(np.asarray(model.apply(lower, x)), out, atol=1e-12)


def test_product_state_is_sum_of_factors():
    n = 6
    factors = (RBM(alpha=1.0, complex_params=True), TwoBodyJastrow(), FeedForward(hidden=(1.0,)))
    model = ProductState(factors)
    space = SpinSpace(n)
    v = random_variables(model, n, 4, 0.3)
    x = space.configurations()
    total = jax.jit(model.apply)(v, x)
    parts = [jax.jit(f.apply)({"params": v["params"][f"factors_{k}"]}, x) for k, f in enumerate(factors)]
    np.testing.assert_allclose(np.asarray(total), np.asarray(sum(parts)), atol=1e-12)
    assert total.dtype == jnp.complex128  # one complex factor makes the product complex


def test_empty_product_raises():
    with pytest.raises(ValueError, match="at least one factor"):
        ProductState(()).init(jax.random.PRNGKey(0), jnp.ones((1, 3)))


@pytest.mark.parametrize(
    "model,dtype",
    [
        (RBM(), jnp.float64),
        (RBM(complex_params=True), jnp.complex128),
        (TwoBodyJastrow(complex_params=True), jnp.complex128),
        (FeedForward(), jnp.float64),
        (FeedForward(complex_output=True), jnp.complex128),
    ],
)
def test_output_dtypes_and_leading_shapes(model, dtype):
    space = SpinSpace(4)
    v = random_variables(model, 4, 0, 0.3)
    x = jnp.asarray(space.configurations()[:6])
    out = model.apply(v, x)
    assert out.shape == (6,) and out.dtype == dtype
    # any leading batch shape, and a single configuration, give the same values
    np.testing.assert_allclose(np.asarray(model.apply(v, x.reshape(2, 3, 4))), np.asarray(out).reshape(2, 3))
    np.testing.assert_allclose(np.asarray(model.apply(v, x[0])), np.asarray(out)[0])
    with pytest.raises(ValueError, match="scalar"):
        model.apply(v, jnp.asarray(1.0))


def test_feedforward_phase_head_is_the_imaginary_part():
    # log ψ = w_r·h + i w_φ·h: switching the phase head off keeps the modulus (real part)
    space = SpinSpace(5)
    cplx = FeedForward(hidden=(1.0,), complex_output=True)
    v = init_parameters(cplx, space, jax.random.PRNGKey(8))
    real_v = {"params": {k: w for k, w in v["params"].items() if k != "phase"}}
    x = space.configurations()
    np.testing.assert_allclose(np.real(cplx.apply(v, x)), FeedForward(hidden=(1.0,)).apply(real_v, x), atol=1e-13)
    assert float(jnp.max(jnp.abs(jnp.imag(cplx.apply(v, x))))) > 0


# --------------------------------------------------------------------------- user-defined trial state


class FieldProduct(TrialState):
    """A user's own trial state: ψ(x) = Π_i exp(a_i x_i), one real field per site."""

    start: float = 0.3

    @nn.compact
    def log_amplitude(self, x):
        a = self.param("field", nn.initializers.constant(self.start), (x.shape[-1],), jnp.float64)
        return x @ a


def test_user_defined_trial_state_end_to_end():
    """A subclass implementing only ``log_amplitude`` runs through sampling, local energy, SR
    training and evaluation unchanged.

    Physics check (elementary mean-field theory of the transverse-field Ising model, from
    memory): ψ = Π_i exp(a x_i) is the product of spinors with ⟨σᶻ⟩ = tanh 2a and
    ⟨σˣ⟩ = 1/cosh 2a, so on a ring ⟨H⟩/N = −J tanh²(2a) − h/cosh(2a), minimal at
    cosh 2a = 2J/h with ⟨H⟩/N = −J − h²/(4J) = −1.25 for J = h = 1 (when h < 2J).
    """
    L, J, h = 8, 1.0, 1.0
    lat = pl.lattices.chain(L)
    H = pl.operators.transverse_field_ising(lat, J, h)
    space = SpinSpace(L)
    sampler = pl.sampling.MetropolisChains(space, n_chains=32, burn_in=2)
    opt = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-3), optax.sgd(0.1))
    run = pl.train.GroundStateSearch(FieldProduct(), H, sampler, opt, n_samples=512)
    state = run.init(jax.random.PRNGKey(0))
    lines = []
    state, hist = run.run(40, state=state, progress=lines.append, print_every=20)
    assert len(hist) == 40 and len(lines) == 3  # steps 1, 20, 40
    a = np.asarray(state.params["params"]["field"])
    a_opt = 0.5 * math.acosh(2 * J / h)
    np.testing.assert_allclose(a, a_opt, atol=0.05)
    est, acc = run.evaluate(state, 8192)
    assert 0.0 < acc <= 1.0
    e_mf = L * (-J - h * h / (4 * J))
    # variational: the mean-field energy lies above the exact one (Pfeuty 1970)
    assert e_mf > pl.reference.tfim_ring_energy(L, J, h)
    assert abs(float(est.mean) - e_mf) < 5 * float(est.error) + 0.01
    # the same state's local energy on all configurations averaged with |ψ|² gives ⟨H⟩ exactly
    x = space.configurations()
    log_amp = lambda c: run.model.apply(state.params, c)
    p = np.exp(2 * np.asarray(log_amp(x)))
    e_loc = np.asarray(H.local_energy(log_amp, jnp.asarray(x)))
    exact_mean = float(np.sum(p * e_loc) / np.sum(p))
    t = np.tanh(2 * a)  # per-site ⟨σᶻ_i⟩; ⟨σˣ_i⟩ = sqrt(1 − t_i²)
    product_energy = -J * sum(t[i] * t[j] for i, j in lat.bonds) - h * np.sum(np.sqrt(1 - t * t))
    assert exact_mean == pytest.approx(product_energy, rel=1e-12)
    assert abs(float(est.mean) - exact_mean) < 5 * float(est.error)


# --------------------------------------------------------------------------- input size mismatch


@pytest.mark.parametrize("model", [RBM(alpha=1.0), TwoBodyJastrow(), FeedForward()],
                         ids=["rbm", "jastrow", "feedforward"])
@given(n_params=st.integers(1, 12), n_space=st.integers(1, 12))
def test_input_size_mismatch_raises_naming_sizes(model, n_params, n_space):
    # parameter shapes only (abstract evaluation): no compilation per drawn size
    shapes = jax.eval_shape(model.init, jax.random.PRNGKey(0), jax.ShapeDtypeStruct((1, n_params), jnp.float64))
    variables = jax.tree_util.tree_map(lambda s: np.zeros(s.shape, s.dtype), shapes)
    space = SpinSpace(n_space)
    if n_params == n_space:
        check_input_size(model, variables, space)  # fine
        return
    with pytest.raises(ValueError) as err:
        check_input_size(model, variables, space)
    msg = str(err.value)
    assert f"{n_space} sites" in msg and f"({n_params}, " in msg
    assert type(model).__name__ in msg


def test_ground_state_search_init_rejects_foreign_parameters():
    model = RBM(alpha=1.0)
    shapes = jax.eval_shape(model.init, jax.random.PRNGKey(0), jax.ShapeDtypeStruct((1, 6), jnp.float64))
    params = jax.tree_util.tree_map(lambda s: np.zeros(s.shape, s.dtype), shapes)
    lat = pl.lattices.chain(8)
    sampler = pl.sampling.MetropolisChains(SpinSpace(8), n_chains=4)
    run = pl.train.GroundStateSearch(model, pl.operators.transverse_field_ising(lat), sampler, optax.sgd(0.1),
                                     n_samples=8)
    with pytest.raises(ValueError) as err:
        run.init(jax.random.PRNGKey(1), params=params)
    assert "8 sites" in str(err.value) and "(6, 6)" in str(err.value)


def test_pure_phase_has_unit_modulus_and_the_inner_output_as_its_phase():
    from psiloom.states import PurePhase

    inner = RBM(alpha=1, init_scale=0.3)
    model = PurePhase(inner)
    x = jnp.where(jax.random.bernoulli(jax.random.PRNGKey(1), 0.5, (7, 5)), 1.0, -1.0)
    variables = model.init(jax.random.PRNGKey(0), x[:1])
    out = model.apply(variables, x)
    np.testing.assert_allclose(jnp.real(out), 0.0, atol=0)
    np.testing.assert_allclose(jnp.imag(out), inner.apply({"params": variables["params"]["inner"]}, x), rtol=1e-14)
