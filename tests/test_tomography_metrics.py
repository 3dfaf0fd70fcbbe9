"""Metrics of learned states and estimates from shots, autoregressive likelihoods, bad input."""

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest

import psiloom as pl
from psiloom import tomography as tm

S = pl.states


def _tfim_state(n=5, h=1.0):
    H = pl.operators.transverse_field_ising(pl.lattices.chain(n), J=1.0, h=h)
    return pl.reference.ground_state(H)[1]


def test_estimates_from_shots_agree_with_exact_values_within_their_error_bars():
    n = 5
    v0 = _tfim_state(n)
    record = tm.simulate_record(jax.random.PRNGKey(0), v0, ["Z" * n, "X" * n, "ZYYZZ"], 4000)
    zz = pl.operators.pauli(n, "ZZ", (0, 1))
    x = sum((pl.operators.pauli(n, "X", i) for i in range(n)), pl.operators.PauliSum(n))
    mixed = zz + 0.5 * x + pl.operators.pauli(n, "YY", (1, 2))
    for op in (zz, x, mixed):
        est = tm.shot_expectation(record, op)
        exact = pl.reference.expectation(op, v0)
        assert abs(est.mean - exact) < 4 * est.error, (est, exact)
    assert tm.shot_expectation(record, zz).n_shots == 4000
    with pytest.raises(ValueError, match="cannot be estimated"):
        tm.shot_expectation(record, pl.operators.pauli(n, "XZ", (0, 1)))


def test_born_probabilities_match_expectations_and_kl_vanishes_for_the_target():
    n = 4
    v0 = _tfim_state(n)
    p = tm.measurement_probabilities(v0, "XXZZ")
    configs = pl.spaces.SpinSpace(n).configurations()
    xx = pl.operators.pauli(n, "XX", (0, 1))
    assert np.isclose(p @ (configs[:, 0] * configs[:, 1]), pl.reference.expectation(xx, v0))
    # a trial state equal to ψ0 (ψ0 > 0 for the TFIM: log ψ0 as a table) has KL = 0 and F = 1
    table = jnp.log(jnp.abs(jnp.asarray(v0)) + 1e-300)

    class Table(S.TrialState):
        def log_amplitude(self, x):
            bits = (x > 0).astype(jnp.int32)  # configuration order: site 0 most significant
            return table[bits @ (1 << jnp.arange(n - 1, -1, -1))]

    model = Table()
    variables = model.init(jax.random.PRNGKey(0), jnp.ones((1, n)))
    kl = tm.measured_kl(model, variables, v0, ["ZZZZ", "XXZZ", "YXYX"])
    assert max(abs(k) for k in kl.values()) < 1e-10
    assert np.isclose(tm.state_fidelity(model, variables, v0), 1.0)


def test_autoregressive_state_learns_with_its_exact_likelihood():
    n = 6
    v0 = _tfim_state(n)
    record = tm.simulate_record(jax.random.PRNGKey(1), v0, "Z" * n, 4000)
    model = S.ChainRuleState(features=2)
    result = tm.learn_from_shots(model, record, optax.adam(0.02), jax.random.PRNGKey(2), epochs=6,
                                 batch_size=250)
    assert result.normaliser == "normalised"
    # log Z = 0 by construction, so the likelihood needs no normaliser
    configs = jnp.asarray(pl.spaces.SpinSpace(n).configurations())
    assert abs(float(tm.log_normaliser(model, result.variables, configs))) < 1e-10
    h = result.history
    assert h["validation_nll"][-1] < h["validation_nll"][0]
    assert tm.state_fidelity(model, result.variables, v0) > 0.97


def test_bad_training_input_is_refused():
    n = 4
    record = tm.MeasurementRecord.from_arrays(np.ones((20, n)))
    key = jax.random.PRNGKey(0)
    opt = optax.adam(1e-2)
    for fraction in (0.0, 1.0, 2.0):
        with pytest.raises(ValueError, match="held_out_fraction"):
            tm.learn_from_shots(S.RBM(), record, opt, key, held_out_fraction=fraction)
    with pytest.raises(ValueError, match="real RBM|complex"):
        tm.learn_from_shots(S.RBM(complex_params=True), record, opt, key, normaliser="contrastive")
    with pytest.raises(ValueError, match="ChainRuleState"):
        tm.learn_from_shots(S.RBM(), record, opt, key, normaliser="normalised")
    with pytest.raises(ValueError, match="held-out"):
        tm.learn_from_shots(S.RBM(), record, opt, key, held_out_fraction=None, patience=2)
    with pytest.raises(ValueError, match="normaliser"):
        tm.learn_from_shots(S.RBM(), record, opt, key, normaliser="guess")
    with pytest.raises(TypeError):
        tm.learn_from_shots(S.RBM(), np.ones((20, n)), opt, key)
    with pytest.raises(ValueError, match="target"):
        tm.learn_from_shots(S.RBM(), record, opt, key, target=np.ones(3))
    with pytest.raises(ValueError, match="cannot be enumerated"):
        tm.learned_vector(S.RBM(), None, 30)
    with pytest.raises(ValueError, match="2\\^N"):
        tm.simulate_record(key, np.ones(6), "ZZ", 10)
    with pytest.raises(ValueError, match="unknown letter"):
        tm.simulate_record(key, np.ones(4), "ZQ", 10)
    with pytest.raises(ValueError, match="n_shots"):
        tm.simulate_record(key, np.ones(4), "ZZ", 0)


def test_early_stopping_keeps_the_best_epoch():
    # a zero learning rate never improves the validation NLL after the first epoch
    n = 4
    record = tm.simulate_record(jax.random.PRNGKey(0), _tfim_state(n), "Z" * n, 200)
    result = tm.learn_from_shots(S.RBM(alpha=1), record, optax.sgd(0.0), jax.random.PRNGKey(1), epochs=10,
                                 batch_size=50, patience=2)
    assert len(result.history) == 3 and result.best_epoch == 1
    np.testing.assert_allclose(result.history["validation_nll"], result.history["validation_nll"][0])
    # the NLL of a record against the Born probabilities of the enumerated learned state
    p = np.abs(tm.learned_vector(result.model, result.variables, n)) ** 2
    expected = -np.mean(np.log(p[pl.spaces.codes(record.outcomes)]))
    assert np.isclose(tm.record_nll(result.model, result.variables, record), expected, rtol=1e-10)


def test_sector_vectors_are_embedded_in_the_full_space():
    n = 4
    space = pl.spaces.SpinSpace(n, magnetisation=0)
    H = pl.operators.heisenberg(pl.lattices.chain(n))
    _, sector_vector = pl.reference.ground_state(H, space)
    _, full = pl.reference.ground_state(H)
    for basis in ("ZZZZ", "XYZZ"):
        np.testing.assert_allclose(tm.measurement_probabilities(sector_vector, basis, space),
                                   tm.measurement_probabilities(full, basis), atol=1e-12)
    record = tm.simulate_record(jax.random.PRNGKey(2), sector_vector, "ZZZZ", 50, space=space)
    assert np.all(record.outcomes.sum(axis=1) == 0)
