"""Learning states from shots: gradients against enumeration, reconstructions against ED.

References: the maximum-likelihood reconstruction from single-shot records follows Torlai,
Mazzola, Carrasquilla, Troyer, Melko & Carleo, Nat. Phys. 14, 447 (2018); targets are exact
ground states (psiloom.reference, checked against closed forms elsewhere in the suite).
"""

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest

import psiloom as pl
from psiloom import tomography as tm
from psiloom.tomography import likelihood as lk

S = pl.states


def _flat(tree):
    return jnp.concatenate([jnp.ravel(leaf) for leaf in jax.tree_util.tree_leaves(tree)])


def _tfim(n, h=1.0):
    H = pl.operators.transverse_field_ising(pl.lattices.chain(n), J=1.0, h=h)
    return H, pl.reference.ground_state(H)[1]


def test_cd_gradient_agrees_in_expectation_with_the_exact_gradient():
    n = 6
    model = S.RBM(alpha=1, init_scale=0.3)
    configs = jnp.asarray(pl.spaces.SpinSpace(n).configurations())
    variables = model.init(jax.random.PRNGKey(0), configs[:1])
    _, target = _tfim(n)
    data = tm.simulate_record(jax.random.PRNGKey(1), target, "Z" * n, 256)
    t = tm.shot_tables(data)
    exact = jax.jit(lambda v: _flat(lk.nll_and_gradient(model, v, t.outcomes, t.sites, t.factors, configs)[1]))
    exact = exact(variables)
    gibbs = jax.jit(lambda key, start, k: lk.gibbs_chains(key, model, variables, start, k), static_argnums=2)
    p = np.exp(2 * np.asarray(model.apply(variables, configs)))
    p /= p.sum()
    n_chains = 2000
    per_chain = jax.jit(jax.vmap(lambda x: _flat(jax.grad(lambda v: 2 * jnp.real(model.apply(v, x[None])[0]))(variables))))
    cd_gradient = jax.jit(lambda chains: _flat(lk.surrogate_gradient(model, variables, t.outcomes, t.sites,
                                                                     t.factors, chains)))

    def model_term_samples(chains):
        return np.asarray(per_chain(chains))

    def check(start, k, key):
        chains = gibbs(key, start, k) if k else start
        cd = cd_gradient(chains)
        # chains are independent: the error of the mean model term is std/√C per component
        err = model_term_samples(chains).std(axis=0, ddof=1) / np.sqrt(n_chains)
        return np.abs(np.asarray(cd - exact)) / (err + 1e-12)

    # chains started at exact draws of |ψ|²: Gibbs updates keep |ψ|², so the estimate is unbiased
    # for any k; 4.5σ over 48 components (two-sided normal tail ≈ 7e-6 each)
    start = configs[jax.random.choice(jax.random.PRNGKey(2), len(p), (n_chains,), p=jnp.asarray(p))]
    assert np.max(check(start, 30, jax.random.PRNGKey(3))) < 4.5
    # CD-k started at the data (what training does): converged after k = 30 updates
    data_starts = tm.simulate_record(jax.random.PRNGKey(4), target, "Z" * n, n_chains).outcomes.astype(float)
    assert np.max(check(jnp.asarray(data_starts), 30, jax.random.PRNGKey(5))) < 4.5
    # the test has power: without updates the "model term" is the data's, far from exact
    assert np.max(check(jnp.asarray(data_starts), 0, None)) > 10


def test_tfim_ground_state_from_z_shots():
    n = 8
    H, v0 = _tfim(n, h=1.0)
    record = tm.simulate_record(jax.random.PRNGKey(11), v0, "Z" * n, 20_000)
    steps = 16 * (18_000 // 500)
    optimizer = optax.adam(optax.cosine_decay_schedule(0.02, steps, 0.1))
    result = tm.learn_from_shots(S.RBM(alpha=1), record, optimizer, jax.random.PRNGKey(12), epochs=16,
                                 batch_size=500, held_out_fraction=0.1, normaliser="exact")
    fid = tm.state_fidelity(result.model, result.variables, v0)
    assert fid >= 0.99, fid
    h = result.history
    assert len(h) == 16 and h["validation_nll"][-1] < h["validation_nll"][0]
    # the learned state predicts what Z shots cannot measure: ⟨σˣ⟩ within a few per cent of ED
    x0 = pl.operators.pauli(n, "X", 0)
    assert abs(tm.state_expectation(result.model, result.variables, x0)
               - pl.reference.expectation(x0, v0)) < 0.03


def _heisenberg_setup():
    n = 6
    H = pl.operators.heisenberg(pl.lattices.chain(n))  # no Marshall rotation: the signs stay in ψ
    v0 = pl.reference.ground_state(H)[1]
    k1, k2 = jax.random.split(jax.random.PRNGKey(3))
    z = tm.simulate_record(k1, v0, "Z" * n, 4000)
    rotated = tm.simulate_record(k2, v0, tm.pair_bases(n, ("XX", "YY")), 400)
    return n, v0, z, rotated


def _phase_model():
    return S.ProductState([S.RBM(alpha=1, init_scale=0.1), S.PurePhase(S.RBM(alpha=0.2, init_scale=0.1))])


def test_sign_structure_needs_rotated_shots():
    n, v0, z, rotated = _heisenberg_setup()
    # the Marshall signs matter: the positive state |ψ0| is far from ψ0
    assert (np.abs(v0) @ v0) ** 2 < 0.5
    both = z.concatenate(rotated)
    epochs = 20

    def learn(record, seed):
        steps = epochs * (int(0.9 * record.n_shots) // 400)
        optimizer = optax.adam(optax.cosine_decay_schedule(0.05, steps, 0.1))
        return tm.learn_from_shots(_phase_model(), record, optimizer, jax.random.PRNGKey(seed), epochs=epochs,
                                   batch_size=400, normaliser="exact")

    full = learn(both, 7)
    assert tm.state_fidelity(full.model, full.variables, v0) >= 0.95
    z_only = learn(z, 7)
    vec = tm.learned_vector(z_only.model, z_only.variables, n)
    # Z shots alone fix |ψ| (its fidelity with |ψ0| is high) but not the signs
    assert pl.reference.fidelity(np.abs(vec), np.abs(v0)) > 0.9
    assert tm.state_fidelity(z_only.model, z_only.variables, v0) < 0.5


@pytest.mark.parametrize("normaliser", ["contrastive", "persistent"])
def test_sampled_gradients_train_an_rbm(normaliser):
    # TFIM L = 6 from Z shots with the model term from block Gibbs chains (CD-2 / PCD-2); the
    # uniform starting state has fidelity (Σ|ψ0|)²/64 ≈ 0.53 with ψ0
    n = 6
    _, v0 = _tfim(n)
    record = tm.simulate_record(jax.random.PRNGKey(0), v0, "Z" * n, 4000)
    epochs, steps = 10, 10 * (3600 // 200)
    optimizer = optax.adam(optax.cosine_decay_schedule(0.02, steps, 0.1))
    result = tm.learn_from_shots(S.RBM(alpha=1), record, optimizer, jax.random.PRNGKey(1), epochs=epochs,
                                 batch_size=200, normaliser=normaliser, gibbs_updates=2)
    assert result.normaliser == normaliser
    assert tm.state_fidelity(result.model, result.variables, v0) > 0.95
