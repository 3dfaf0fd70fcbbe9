"""The forward Laplacian's per-particle block form: closed-form Laplacians and agreement with the
dense form and with the Hessian trace on electron trial states."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from psiloom import electrons as el
from psiloom.electrons.laplacian import forward_laplacian, hessian_laplacian

A, B = 0.7, 0.4  # Gaussian exponents (bohr⁻²) of the hand-written test function
C = np.array([0.3, -0.5, 0.8])


def _gaussian(r2, a):
    return np.exp(-a * r2)


def _gaussian_grad(u, a):  # ∇ e^{−a|u|²} = −2a u e^{−a|u|²}
    return -2.0 * a * u * _gaussian(np.sum(u * u, -1), a)[..., None]


def _gaussian_lap(r2, a):  # ∇² e^{−a r²} = (4a² r² − 6a) e^{−a r²} in three dimensions
    return (4.0 * a * a * r2 - 6.0 * a) * _gaussian(r2, a)


def _hand_written(x):
    """f = Σ_ij G_A(r_i − r_j) G_B(r_j) + (Σ_i c·r_i)² + Σ_{i<j} |r_i − r_j|² + (|r_0|² + |r_1|²)²
    + Σ_i (z_i + x_i)²: a pair factor times a one-particle factor contracted over j, a term mixing
    all particles, a plain pair sum, a slice along the particle axis and a gather of coordinates."""
    d = x[:, None, :] - x[None, :, :]
    pair = jnp.exp(-A * jnp.sum(d * d, -1))
    one = jnp.exp(-B * jnp.sum(x * x, -1))
    mixed = jnp.sum(x @ jnp.asarray(C)) ** 2
    first_two = jnp.sum(x[:2] * x[:2]) ** 2
    gathered = jnp.sum(jnp.sum(x[:, jnp.array([2, 0])], axis=-1) ** 2)
    return jnp.einsum("ij,j->", pair, one) + mixed + 0.5 * jnp.sum(d * d) + first_two + gathered


def _hand_written_exact(x):
    """Gradient and Laplacian of :func:`_hand_written` by calculus (product and chain rules)."""
    n = x.shape[0]
    grad, lap = np.zeros_like(x), 0.0
    for i in range(n):
        for j in range(n):
            bj, gbj = _gaussian(x[j] @ x[j], B), _gaussian_grad(x[j], B)
            if i == j:  # G_A(0) = 1: the term is G_B(r_i)
                grad[i] += gbj
                lap += _gaussian_lap(x[j] @ x[j], B)
                continue
            u = x[i] - x[j]
            a, ga, la = _gaussian(u @ u, A), _gaussian_grad(u, A), _gaussian_lap(u @ u, A)
            grad[i] += ga * bj
            grad[j] += -ga * bj + a * gbj
            # ∇_i² gives ∇²G_A G_B; ∇_j² gives ∇²G_A G_B + G_A ∇²G_B − 2 ∇G_A·∇G_B
            lap += 2.0 * la * bj + a * _gaussian_lap(x[j] @ x[j], B) - 2.0 * ga @ gbj
    s = np.sum(x @ C)
    grad += 2.0 * s * C  # ∇(c·Σr)² = 2 (c·Σr) c for every particle
    lap += 2.0 * n * C @ C
    grad += 2.0 * (n * x - np.sum(x, 0))  # ∇_i Σ_{k<l} |r_k − r_l|² = 2 Σ_j (r_i − r_j)
    lap += 6.0 * n * (n - 1)  # 2·3 per particle of each pair
    s2 = np.sum(x[:2] ** 2)  # ∇S² = 2S ∇S, ∇²S² = 2|∇S|² + 2S ∇²S = 8S + 24S for S = |r_0|² + |r_1|²
    grad[:2] += 4.0 * s2 * x[:2]
    lap += 32.0 * s2
    zx = x[:, 2] + x[:, 0]  # ∇(z + x)² = 2(z + x)(1, 0, 1), ∇² = 4 per particle
    grad[:, 0] += 2.0 * zx
    grad[:, 2] += 2.0 * zx
    lap += 4.0 * n
    return grad, lap


@pytest.mark.parametrize("n", [2, 4])
def test_block_form_matches_closed_form_laplacian(n):
    # Closed forms from the calculus above (no antisymmetry or network involved).
    x = np.random.default_rng(n).normal(scale=0.9, size=(n, 3))
    results = jax.jit(lambda y: [forward_laplacian(_hand_written, y, s) for s in (True, False)])(jnp.asarray(x))
    grad, lap = _hand_written_exact(x)
    for value, g, l in results:
        assert float(value) == pytest.approx(float(_hand_written(jnp.asarray(x))), rel=1e-12)
        np.testing.assert_allclose(np.asarray(g), grad, rtol=1e-11, atol=1e-12)
        assert float(l) == pytest.approx(lap, rel=1e-11, abs=1e-11)


def _states():
    # A small backflow state (compilation dominates the cost) with its neural Jastrow: pair and
    # one-electron blocks, contractions over electrons, concatenated pair features, and
    # electron-axis slices for the two spins. (Analytic orbitals: test_electrons_states.py.)
    li = el.atom("Li")
    neural = el.neural_slater_jastrow(li, n_det=2, width=4, channels=2, layers=0, jastrow_width=4)
    return {"backflow Li": (li, neural)}


_STATES = _states()


@pytest.fixture(scope="module")
def compiled():
    """Per state: (system, params, jitted (x, params) ↦ [(value, grad, lap) blocks, hessian])."""
    out = {}
    for name, (system, model) in _STATES.items():
        params = jax.jit(model.init)(jax.random.PRNGKey(0), jnp.zeros((1, system.n_electrons, 3)))

        def both(y, p, model=model, shape=(system.n_electrons, 3)):
            f = lambda r: model.apply(p, r.reshape(1, *shape))[0]
            return [forward_laplacian(f, y), hessian_laplacian(f, y)]

        out[name] = (system, model, params, jax.jit(both))
    return out


def _perturbed(params, key, scale):
    """Random non-zero values everywhere (the zero-initialised read-outs would hide the backflow)."""
    leaves, tree = jax.tree_util.tree_flatten(params)
    keys = jax.random.split(key, len(leaves))
    return jax.tree_util.tree_unflatten(tree, [l + scale * jax.random.normal(k, l.shape) for l, k in zip(leaves, keys)])


def _finite_difference(f, x, h=1e-3):
    """Central differences: gradient and Laplacian, errors O(h²)."""
    flat = x.reshape(-1)
    grad, lap = np.zeros_like(flat), 0.0
    f0 = f(flat)
    for k in range(flat.size):
        e = np.zeros_like(flat)
        e[k] = h
        fp, fm = f(flat + e), f(flat - e)
        grad[k] = (fp - fm) / (2 * h)
        lap += (fp - 2 * f0 + fm) / h**2
    return grad.reshape(x.shape), lap


@settings(max_examples=4, deadline=None)
@given(st.sampled_from(sorted(_STATES)), st.integers(0, 2**31 - 1), st.floats(0.05, 0.5))
def test_block_form_equals_hessian_trace(compiled, name, seed, scale):
    # Random electron positions and random non-zero parameters: the forward Laplacian (block
    # form) and the trace of the Hessian (jvp of the gradient) agree to rounding.
    system, _, params, both = compiled[name]
    key_x, key_p = jax.random.split(jax.random.PRNGKey(seed))
    x = 1.2 * jax.random.normal(key_x, (system.n_electrons, 3))
    (v1, g1, l1), (v0, g0, l0) = both(x, _perturbed(params, key_p, scale))
    assert float(v1) == pytest.approx(float(v0), abs=1e-12)
    np.testing.assert_allclose(np.asarray(g1), np.asarray(g0), atol=1e-10)
    assert float(l1) == pytest.approx(float(l0), rel=1e-10, abs=1e-10)


def test_neural_state_laplacian_matches_finite_differences(compiled):
    # Both methods against central finite differences on the backflow state.
    system, model, params, both = compiled["backflow Li"]
    params = _perturbed(params, jax.random.PRNGKey(5), 0.1)
    x = jnp.asarray(np.random.default_rng(11).normal(scale=1.2, size=(system.n_electrons, 3)))
    (_, g1, l1), (_, g0, l0) = both(x, params)
    f_np = jax.jit(lambda r: model.apply(params, r.reshape(1, *x.shape))[0])
    g_fd, l_fd = _finite_difference(lambda r: float(f_np(jnp.asarray(r))), np.asarray(x))
    for g, l in ((g1, l1), (g0, l0)):
        np.testing.assert_allclose(np.asarray(g), g_fd, atol=1e-5)
        assert float(l) == pytest.approx(l_fd, abs=1e-3)  # second differences: O(h²) truncation + rounding/h²


def test_sparse_option_is_checked():
    with pytest.raises(ValueError, match="sparse"):
        forward_laplacian(jnp.sum, jnp.zeros((2, 3)), sparse="yes")
