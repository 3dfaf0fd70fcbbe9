"""Observables with error bars, checked against exact values from exact-diagonalisation eigenvectors.

The trial state is the ED eigenvector itself, used as a lookup table of log-amplitudes and
sampled with the Metropolis sampler; estimates must agree with ⟨v|O|v⟩ computed from the
vector within k·σ (fixed seeds). Exact operators are built independently from
``psiloom.operators.spin_correlation`` pair by pair.
"""

import functools

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import psiloom as pl
from psiloom.operators import observables as obs
from psiloom.operators import spin_correlation

K_SIGMA = 4.0  # tolerance in standard errors for single comparisons (fixed seeds)


class _Table(pl.states.TrialState):
    """log ψ(x) looked up from a vector over ``space.configurations()`` (codes sorted ascending)."""

    codes: tuple
    logs: tuple

    def log_amplitude(self, x):
        codes = jnp.asarray(np.asarray(self.codes))
        logs = jnp.asarray(np.asarray(self.logs))
        n = x.shape[-1]
        code = (x > 0).astype(jnp.int64) @ (jnp.int64(1) << jnp.arange(n - 1, -1, -1))
        return logs[jnp.searchsorted(codes, code)]


def _table_state(space, vector):
    codes = pl.spaces.codes(space.configurations())
    mag = np.maximum(np.abs(vector), 1e-300)
    logs = np.log(mag) + 1j * np.angle(vector)
    model = _Table(tuple(codes.tolist()), tuple(logs.tolist()))
    return jax.jit(lambda x: model.apply({}, x))


def _sample(space, lattice, log_amp, n_per_chain, seed, n_chains=16):
    sampler = pl.sampling.MetropolisChains(space, n_chains=n_chains, bonds=lattice.bonds, burn_in=16)
    state = sampler.init(jax.random.PRNGKey(seed), log_amp)
    xs, logs, _, _ = jax.jit(lambda k, s: sampler.sample(k, s, log_amp, n_per_chain))(jax.random.PRNGKey(seed + 1), state)
    return xs, logs


def _expect(op, space, v):
    return float(np.real(np.vdot(v, op.sparse_matrix(space) @ v)))


def _exact_correlations(lattice, space, v):
    return _exact_correlations_cached(lattice, space, v.tobytes())


@functools.lru_cache(maxsize=None)
def _exact_correlations_cached(lattice, space, v_bytes):
    v = np.frombuffer(v_bytes)
    n = lattice.n_sites
    out = []
    for r in lattice.coords:
        pairs = [spin_correlation(n, i, lattice.site_index(*(lattice.coords[i] + r))) for i in range(n)]
        out.append(_expect(pl.operators.total(pairs, n) / n, space, v))
    return np.array(out)


@functools.lru_cache(maxsize=None)
def _square_setup(marshall_basis):
    lat = pl.lattices.square(4)
    space = pl.spaces.SpinSpace(16, magnetisation=0)
    ham = pl.operators.heisenberg(lat, marshall_basis=marshall_basis)
    e0, v = pl.reference.ground_state(ham, space)
    log_amp = _table_state(space, v)
    xs, logs = _sample(space, lat, log_amp, 256, seed=3 if marshall_basis else 5)
    return lat, space, ham, e0, v, log_amp, xs, logs


@functools.lru_cache(maxsize=None)
def _square_correlations(marshall_basis, assume_rule):
    lat, _, _, _, _, log_amp, xs, logs = _square_setup(marshall_basis)
    return obs.spin_correlations(log_amp, lat, xs, logs, marshall_basis=assume_rule)


def _within(est_mean, est_error, exact, k=K_SIGMA, floor=1e-10):
    est_mean, est_error, exact = np.real(np.asarray(est_mean)), np.asarray(est_error), np.asarray(exact)
    assert np.all(np.abs(est_mean - exact) <= k * est_error + floor), (est_mean, est_error, exact)


# ---------------------------------------------------------------------- correlations and S(q)
def test_correlations_and_structure_factor_match_exact_diagonalisation():
    # Heisenberg 4×4 PBC ground state (ED): C(r), shell averages and S(q) from samples agree
    # with ⟨v|·|v⟩ within 4σ
    lat, space, _, _, v, log_amp, xs, logs = _square_setup(False)
    res = _square_correlations(False, False)
    exact_c = _exact_correlations(lat, space, v)
    _within(res.correlation.mean, res.correlation.error, exact_c)
    exact_sq = np.cos(res.momenta @ res.displacements.T) @ exact_c
    _within(res.structure_factor.mean, res.structure_factor.error, exact_sq)
    for d, mean, err in zip(res.distances, res.shell.mean, res.shell.error):
        mask = np.isclose(np.linalg.norm(np.minimum(res.displacements % 4, 4 - res.displacements % 4), axis=1), d)
        _within(mean, err, exact_c[mask].mean())
    # C(0) = ⟨S_i·S_i⟩ = s(s+1) = 3/4 for spin 1/2 (textbook), in every sample
    assert float(res.correlation.mean[0]) == pytest.approx(0.75, abs=1e-12)
    # nearest-neighbour correlation is E0 / (2N) (two bonds per site; ED value)
    assert abs(float(res.shell.mean[1]) - (-11.2284832 / 32)) <= K_SIGMA * float(res.shell.error[1]) + 1e-6
    # the Néel peak: S(π, π) is the largest structure factor (antiferromagnetic order; Néel)
    q_pi = np.flatnonzero(np.all(np.isclose(np.abs(res.momenta), np.pi), axis=1))[0]
    assert int(np.argmax(np.asarray(res.structure_factor.mean))) == q_pi


def test_structure_factor_sum_rule_and_singlet():
    # sum rule (1/N) Σ_q S(q) = C(0) = ⟨S_i·S_i⟩ = 3/4 (Fourier completeness; spin 1/2); the
    # ground state is a singlet (Lieb & Mattis 1962 / Marshall 1955), so S(q=0) = ⟨S_tot²⟩/N = 0
    # with zero variance for the exact eigenvector
    lat, space, _, _, v, log_amp, xs, logs = _square_setup(False)
    res = _square_correlations(False, False)
    assert float(np.mean(np.asarray(res.structure_factor.mean))) == pytest.approx(0.75, abs=1e-12)
    assert abs(float(res.structure_factor.mean[0])) < 1e-9
    assert float(res.structure_factor.variance[0]) < 1e-18
    exact_c = _exact_correlations(lat, space, v)
    exact_sq = np.cos(res.momenta @ res.displacements.T) @ exact_c
    assert exact_sq.mean() == pytest.approx(0.75, abs=1e-12)
    assert exact_sq[0] == pytest.approx(0.0, abs=1e-10)


def test_marshall_basis_gives_the_physical_correlations():
    # a state sampled in the Marshall-rotated basis (marshall_basis=True) must report the same
    # physical correlations as the unrotated eigenvector (the rotation is a unitary change of
    # basis; Marshall 1955)
    lat, space, _, _, v_rot, log_amp, xs, logs = _square_setup(True)
    assert np.all(v_rot * np.sign(v_rot[np.argmax(np.abs(v_rot))]) > -1e-12)  # sign-free amplitudes
    _, _, _, _, v, _, _, _ = _square_setup(False)
    exact_c = _exact_correlations(lat, space, v)
    res = _square_correlations(True, True)
    _within(res.correlation.mean, res.correlation.error, exact_c)
    wrong = _square_correlations(True, False)
    # without the matching rotation the nearest-neighbour correlation has the wrong sign
    assert float(wrong.correlation.mean[1]) > 0 > exact_c[1]


def test_magnetizations_match_exact_diagonalisation():
    lat, space, _, _, v, log_amp, xs, logs = _square_setup(False)
    res = obs.magnetizations(log_amp, lat, xs, logs)
    n = lat.n_sites
    # fixed Sᶻ = 0 sector: m = m² = 0 exactly
    assert float(np.real(res["m"].mean)) == 0.0 and float(np.real(res["m2"].mean)) == 0.0
    ms = pl.operators.staggered_magnetization_z(lat) / n
    _within(res["m_stag2"].mean, res["m_stag2"].error, _expect(ms * ms, space, v))
    # rotational invariance of the singlet: ⟨m_s²⟩ = S(π, π) / (3N) (exact identity)
    exact_c = _exact_correlations(lat, space, v)
    q = np.array([np.pi, np.pi])
    s_pi = np.cos(lat.coords @ q) @ exact_c
    assert _expect(ms * ms, space, v) == pytest.approx(s_pi / (3 * n), rel=1e-10)


def test_discrete_observables_have_honest_rhat():
    # local values of discrete observables carry ~1e-16 configuration-dependent rounding noise
    # (seen on a 12-site chain); m_stag² must have the R̂ of the same values computed directly
    # from the configurations (exact: multiples of 1/(4N²)), and m² ≡ 0 in the Sᶻ = 0 sector is
    # a constant: R̂ = nan and no R̂ warning. Samples: uniform Sᶻ = 0 configurations, i.e. exact
    # iid samples of |ψ|² for a constant ψ.
    n = 12
    lat = pl.lattices.chain(n)
    xs = pl.spaces.SpinSpace(n, magnetisation=0).random(jax.random.PRNGKey(0), 64 * 4).reshape(64, 4, n)
    res = obs.magnetizations(lambda x: jnp.zeros(x.shape[0]), lat, xs)
    signs = 1 - 2 * lat.sublattice
    direct = (np.asarray(xs) @ signs / (2 * n)) ** 2
    assert float(res["m_stag2"].rhat) == pytest.approx(float(pl.stats.split_rhat(direct)), abs=1e-12)
    assert np.isnan(float(res["m2"].rhat))
    assert not any("R̂" in message for message in res["m2"].warnings())


def test_measure_agrees_with_local_estimates():
    # the stacked evaluation must reproduce psiloom.operators.local.local_estimates term by term
    lat, space, ham, _, _, log_amp, xs, logs = _square_setup(False)
    ops = {"bond": spin_correlation(16, 0, 1), "ham": ham, "sz": pl.operators.magnetization_z(16)}
    table = obs.local_value_table(log_amp, list(ops.values()), xs[:8], logs[:8])
    flat = xs[:8].reshape(-1, 16)
    for k, op in enumerate(ops.values()):
        ref = pl.operators.local_estimates(log_amp, op, flat, logs[:8].reshape(-1))
        np.testing.assert_allclose(np.asarray(table[..., k]).reshape(-1), np.asarray(ref), atol=1e-12)
    est = obs.measure(log_amp, ops, xs, logs)
    assert set(est) == set(ops)
    assert float(est["ham"].variance) < 1e-18  # exact eigenstate: zero-variance principle


# ---------------------------------------------------------------------- energy variance and V-score
def test_infinite_temperature_energy_is_the_trace():
    # E_∞ = Tr H / dim (Wu et al., Science 2024), checked against the trace of the dense matrix
    lat = pl.lattices.chain(8)
    ham = (pl.operators.heisenberg(lat) + 0.3 + pl.operators.pauli(8, "ZZZ", (0, 2, 5), 0.2)
           + pl.operators.pauli(8, "ZZZZ", (0, 1, 2, 3), -0.7) + pl.operators.transverse_field_ising(lat, 0.4, 0.6))
    for space in (pl.spaces.SpinSpace(8), pl.spaces.SpinSpace(8, magnetisation=0), pl.spaces.SpinSpace(8, magnetisation=1)):
        if space.is_sector:  # the transverse field leaves the sector: drop it there
            op = ham - pl.operators.transverse_field_ising(lat, 0.0, 0.6)
        else:
            op = ham
        dense = op.dense_matrix(space)
        assert obs.infinite_temperature_energy(op, space) == pytest.approx(np.trace(dense).real / space.size, abs=1e-12)


def test_energy_variance_and_v_score_of_a_non_eigenstate():
    # trial vector: the XXZ (Δ = 2) ground state, measured with the Heisenberg Hamiltonian; exact
    # E = ⟨v|H|v⟩ and Var E = ⟨v|H²|v⟩ − E² from the dense matrices; V = N Var E / (E − E_∞)²
    # (Wu et al., Science 2024)
    lat = pl.lattices.chain(12)
    space = pl.spaces.SpinSpace(12, magnetisation=0)
    ham = pl.operators.heisenberg(lat)
    _, v = pl.reference.ground_state(pl.operators.xxz(lat, delta=2.0), space)
    h = ham.dense_matrix(space)
    e_exact = float(v @ h @ v)
    var_exact = float(v @ h @ h @ v) - e_exact**2
    e_inf = np.trace(h) / space.size
    v_exact = 12 * var_exact / (e_exact - e_inf) ** 2
    log_amp = _table_state(space, v)
    xs, logs = _sample(space, lat, log_amp, 512, seed=11)
    res = obs.energy_statistics(log_amp, ham, xs, logs, space=space)
    assert res.e_inf == pytest.approx(e_inf, abs=1e-12)
    _within(res.energy.mean, res.energy.error, e_exact)
    _within(res.variance.mean, res.variance.error, var_exact)
    assert abs(res.v_score - v_exact) <= K_SIGMA * res.v_score_error
    assert res.v_score > 1e-3


def test_v_score_of_an_exact_eigenstate_vanishes():
    # zero-variance principle: an exact eigenstate has Var E = 0, hence V = 0 (Wu et al. 2024)
    lat, space, ham, e0, _, log_amp, xs, logs = _square_setup(False)
    res = obs.energy_statistics(log_amp, ham, xs[:64], logs[:64], space=space)
    assert float(np.real(res.energy.mean)) == pytest.approx(e0, abs=1e-9)
    assert res.v_score < 1e-20


# ---------------------------------------------------------------------- validation
@pytest.mark.parametrize(
    "call, match",
    [
        (lambda s: obs.measure(s["f"], {"a": s["ham"]}, s["xs"].reshape(-1, 16)), "n_time, n_chains, n_sites"),
        (lambda s: obs.measure(s["f"], {"a": s["ham"]}, s["xs"], s["logs"][:3]), "log_amps must have shape"),
        (lambda s: obs.measure(s["f"], {"a": pl.operators.heisenberg(pl.lattices.chain(8))}, s["xs"]), "8 sites"),
        (lambda s: obs.correlation_operators(pl.lattices.chain(8), component="xy"), "component"),
        (lambda s: obs.correlation_operators(pl.lattices.chain(5), marshall_basis=True), "bipartite"),
        (lambda s: obs.v_score(-1.0, 0.1, 4, -1.0), "undefined"),
        (lambda s: obs.infinite_temperature_energy(s["ham"], pl.spaces.SpinSpace(8)), "8 sites"),
        (lambda s: obs.local_value_table(s["f"], [], s["xs"]), "at least one operator"),
    ],
)
def test_bad_input_is_named(call, match):
    lat, space, ham, _, _, log_amp, xs, logs = _square_setup(False)
    with pytest.raises(ValueError, match=match):
        call({"f": log_amp, "ham": ham, "xs": xs, "logs": logs})


# ---------------------------------------------------------------------- components and open lattices
def test_correlation_components_on_an_open_chain_match_exact_diagonalisation():
    # open Heisenberg chain of 6 sites (ED ground state, a singlet): C_aa(r) averaged over the
    # L − r pairs that exist equals ⟨v|·|v⟩ of operators built pair by pair; SU(2) invariance of
    # the singlet gives C_xx = C_yy = C_zz = C/3 (textbook). Samples: iid from |v|² (exact).
    n = 6
    lat = pl.lattices.chain(n, periodic=False)
    space = pl.spaces.SpinSpace(n)  # full space: S^x S^x alone leaves the Sᶻ = 0 sector
    e0, v = pl.reference.ground_state(pl.operators.heisenberg(lat), space)
    log_amp = _table_state(space, v)
    states = space.configurations()
    pick = np.random.default_rng(7).choice(len(states), size=(256, 8), p=np.abs(v) ** 2 / np.sum(np.abs(v) ** 2))
    xs = jnp.asarray(states[pick])
    full = obs.spin_correlations(log_amp, lat, xs)
    assert full.structure_factor is None and full.momenta.shape == (0, 1)
    for comp, letter in (("zz", "Z"), ("xx", "X"), ("yy", "Y")):
        res = obs.spin_correlations(log_amp, lat, xs, component=comp)
        exact = []
        for r in range(n):
            pairs = [pl.operators.pauli(n, letter + letter, (i, i + r), 0.25) if r else
                     pl.operators.PauliSum.identity(n, 0.25) for i in range(n - r)]
            exact.append(pl.reference.expectation(pl.operators.total(pairs, n) / (n - r), v, space))
        exact = np.array(exact)
        _within(res.correlation.mean, res.correlation.error, exact)
        # the singlet: one component is a third of the full correlation (exact, from ED)
        full_exact = np.array([pl.reference.expectation(op, v, space) for op in obs.correlation_operators(lat)[1]])
        np.testing.assert_allclose(exact, full_exact / 3, atol=1e-10)
        assert float(res.correlation.mean[0]) == pytest.approx(0.25, abs=1e-12)
    # nearest-neighbour correlation of the open chain: E0 / (L − 1) (ED)
    assert full_exact[1] == pytest.approx(e0 / (n - 1), abs=1e-10)
    _within(full.correlation.mean[1], full.correlation.error[1], e0 / (n - 1))
