"""Densities, dipole moments, energy differences and geometry scans of molecules."""

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from hypothesis import given, settings, strategies as st

import psiloom as pl
from psiloom import electrons as el


def _hydrogen_1s(rng, shape):
    """Positions drawn from the hydrogen 1s density |ψ|² = e^{−2r}/π (textbook): r ~ Gamma(3, 1/2)."""
    r = rng.gamma(3.0, 0.5, size=shape)
    v = rng.normal(size=(*shape, 3))
    return r[..., None] * v / np.linalg.norm(v, axis=-1, keepdims=True)


def test_radial_density_of_hydrogen_1s():
    # ρ(r) = e^{−2r}/π (hydrogen ground state, textbook), averaged over each bin's volume.
    rng = np.random.default_rng(0)
    samples = _hydrogen_1s(rng, (2000, 8, 1))
    edges = np.linspace(0.0, 4.0, 9)
    profile = el.radial_density(samples, edges)
    r0, r1 = edges[:-1], edges[1:]
    # ∫ e^{−2r} r² dr = −e^{−2r}(2r² + 2r + 1)/4
    antiderivative = lambda r: -np.exp(-2 * r) * (2 * r**2 + 2 * r + 1) / 4
    exact = 4 * np.pi * (antiderivative(r1) - antiderivative(r0)) / np.pi / (4 * np.pi * (r1**3 - r0**3) / 3)
    assert np.all(np.abs(profile.values - exact) < 4 * profile.errors + 1e-12)
    assert np.all(profile.errors > 0)
    # normalisation: Σ V_k ρ_k is the fraction of the electron inside 4 bohr, 1 − e^{−8}(41) ≈ 0.986
    volumes = 4 * np.pi * (r1**3 - r0**3) / 3
    assert np.sum(volumes * profile.values) == pytest.approx(1 - 41 * np.exp(-8.0), abs=0.01)


def test_axial_density_and_dipole_of_two_separated_atoms():
    # Two hydrogen 1s electrons on nuclei 20 bohr apart: the planar-integrated density of one
    # 1s electron is λ(s) = (2|s| + 1) e^{−2|s|} / 2 (integrate e^{−2r}/π over the plane);
    # the dipole moment vanishes, and moving one electron cloud by δ along z gives μ_z = −δ.
    system = el.molecule([("H", (0, 0, 0)), ("H", (0, 0, 20.0))])
    rng = np.random.default_rng(1)
    samples = _hydrogen_1s(rng, (1000, 8, 2))
    samples[:, :, 1] += system.positions[1]
    edges = np.linspace(-3.0, 3.0, 13)
    profile = el.axial_density(samples, system, edges)
    lam = lambda s: (2 * np.abs(s) + 1) * np.exp(-2 * np.abs(s)) / 2
    fine = np.linspace(edges[:-1], edges[1:], 201)
    exact = np.trapezoid(lam(fine), fine, axis=0) / np.diff(edges)
    assert np.all(np.abs(profile.values - exact) < 4 * profile.errors + 1e-12)
    mu = el.dipole_moment(samples, system)
    assert np.all(np.abs(np.asarray(mu.mean)) < 4 * np.asarray(mu.error))
    shifted = samples.copy()
    shifted[:, :, 1, 2] += 0.5
    mu_z = el.dipole_moment(shifted, system)
    assert float(mu_z.mean[2]) == pytest.approx(-0.5, abs=4 * float(mu_z.error[2]))


def test_correlated_difference_counts_the_covariance():
    # Paired series sharing a large common fluctuation: the difference's error is that of the
    # small independent parts alone, far below the quadrature sum (elementary statistics).
    rng = np.random.default_rng(2)
    common = rng.normal(size=(4000, 4))
    a = -1.0 + common + 0.01 * rng.normal(size=common.shape)
    b = -1.2 + common + 0.01 * rng.normal(size=common.shape)
    paired = el.energy_difference(a, b)
    assert paired.correlated and paired.value == pytest.approx(0.2, abs=5 * paired.error)
    assert paired.error == pytest.approx(np.sqrt(2) * 0.01 / np.sqrt(a.size), rel=0.15)
    independent = el.energy_difference(pl.stats.estimate(jnp.asarray(a)), pl.stats.estimate(jnp.asarray(b)))
    assert not independent.correlated and independent.error > 50 * paired.error
    assert "(" in str(paired)
    with pytest.raises(ValueError, match="equal shape"):
        el.energy_difference(a, b[:10])


def test_local_energy_spread_matches_scipy_binned_statistics():
    # Counts, bin means and the binned sum of squared deviations, checked against
    # scipy.stats.binned_statistic on the closest electron–nucleus and electron–electron
    # distances computed here independently (one loop per sample).
    from scipy.stats import binned_statistic

    system = el.molecule([("Li", (0, 0, 0)), ("H", (0, 0, 3.0))])
    rng = np.random.default_rng(5)
    samples = rng.normal(scale=1.5, size=(50, 4, system.n_electrons, 3))
    energies = rng.normal(size=(50, 4)) - 8.0
    edges = np.array([0.0, 0.3, 0.8, 1.5, 2.5])
    flat_x, flat_e = samples.reshape(-1, system.n_electrons, 3), energies.ravel()
    dev2 = (flat_e - flat_e.mean()) ** 2
    for by in ("nucleus", "pair"):
        if by == "nucleus":
            d = np.array([min(np.linalg.norm(r - nuc) for r in x for nuc in system.positions) for x in flat_x])
        else:
            d = np.array([min(np.linalg.norm(x[i] - x[j]) for i in range(len(x)) for j in range(i)) for x in flat_x])
        spread = el.local_energy_spread(samples, energies, system, edges, by=by)
        counts = binned_statistic(d, flat_e, "count", bins=edges).statistic
        means = binned_statistic(d, flat_e, "mean", bins=edges).statistic
        sums = binned_statistic(d, dev2, "sum", bins=edges).statistic
        np.testing.assert_allclose(spread.fraction, counts / d.size)
        np.testing.assert_allclose(spread.mean, means, equal_nan=True)
        np.testing.assert_allclose(spread.share, sums / dev2.sum(), atol=1e-12)
        assert spread.outside == pytest.approx(1.0 - spread.share.sum(), abs=1e-12)
        assert spread.variance == pytest.approx(np.var(flat_e))
    with pytest.raises(ValueError, match="by must be"):
        el.local_energy_spread(samples, energies, system, edges, by="both")
    with pytest.raises(ValueError, match="local_energies must have shape"):
        el.local_energy_spread(samples, energies[:3], system, edges)
    with pytest.raises(ValueError, match="finite"):
        el.local_energy_spread(samples, np.full_like(energies, np.nan), system, edges)
    with pytest.raises(ValueError, match="two electrons"):
        el.local_energy_spread(samples[:, :, :1], energies, el.atom("H"), edges, by="pair")


@pytest.mark.parametrize("edges, match", [
    ([], "at least two"), ([1.0], "at least two"), ([0.0, np.nan, 1.0], "finite"), ([0.0, np.inf], "finite"),
    ([0.0, 2.0, 1.0], "increase"), ([[0.0, 1.0]], "1-d"), (["a", "b"], "numbers"),
])
def test_bad_density_grids_are_named(edges, match):
    samples = np.zeros((4, 2, 1, 3))
    with pytest.raises(ValueError, match=match):
        el.radial_density(samples, edges)
    with pytest.raises(ValueError, match="≥ 0"):
        el.radial_density(samples, [-1.0, 1.0])
    with pytest.raises(ValueError, match="two nuclei"):
        el.axial_density(samples, el.atom("H"), [0.0, 1.0])
    with pytest.raises(ValueError, match="shape"):
        el.radial_density(np.zeros((4, 1, 3)), [0.0, 1.0])


def test_scan_refuses_different_atoms_or_electron_counts():
    h2 = el.molecule([("H", (0, 0, 0)), ("H", (0, 0, 1.4))])
    with pytest.raises(ValueError, match="geometry 1 has atoms"):
        el.check_scan([h2, el.molecule([("Li", (0, 0, 0)), ("H", (0, 0, 3.0))])])
    with pytest.raises(ValueError, match="geometry 1 has atoms"):
        el.check_scan([h2, el.molecule([("H", (0, 0, 0)), ("H", (0, 0, 1.4)), ("H", (0, 0, 3))], charge=1)])
    with pytest.raises(ValueError, match="electron counts"):
        el.check_scan([h2, el.molecule([("H", (0, 0, 0)), ("H", (0, 0, 2.0))], spin=2)])
    with pytest.raises(ValueError, match="at least one geometry"):
        el.check_scan([])


@settings(max_examples=20, deadline=None)
@given(st.floats(0.8, 6.0), st.floats(0.8, 6.0), st.integers(0, 2**31 - 1))
def test_walkers_follow_their_nuclei(r_old, r_new, seed):
    # Electrons within half a bond length of a nucleus move rigidly with it.
    old = el.molecule([("H", (0, 0, 0)), ("H", (0, 0, r_old))])
    new = el.molecule([("H", (0, 0, 0)), ("H", (0, 0, r_new))])
    rng = np.random.default_rng(seed)
    offsets = rng.uniform(-0.2, 0.2, size=(5, 2, 3)) * min(r_old, 1.0)
    x = offsets + old.positions[None]
    moved = np.asarray(el.follow_nuclei(jnp.asarray(x), old, new))
    np.testing.assert_allclose(moved - new.positions[None], offsets, atol=1e-12)


def test_geometry_scan_warm_starts_from_the_previous_geometry():
    # Two H₂⁺ geometries (one electron keeps compilation cheap), one step each: one result per
    # geometry in order; the second starts from the first's parameters and walkers.
    geometries = [el.molecule([("H", (0, 0, 0)), ("H", (0, 0, r))], charge=1) for r in (2.0, 2.2)]

    def build(system):
        model = el.SlaterJastrow(el.SlaterTypeOrbitals(system), ())
        sampler = el.ElectronSampler(system, n_chains=16, sweep=2, burn_in=1, equilibrate=10)
        return pl.train.GroundStateSearch(model, el.CoulombHamiltonian(system), sampler, optax.sgd(0.0),
                                          n_samples=16)

    points = list(el.geometry_scan(geometries, build, steps=1, key=jax.random.PRNGKey(0), eval_samples=256,
                                   burn_in_sweeps=2))
    assert [p.geometry for p in points] == [0, 1] and [p.warm_start for p in points] == [False, True]
    # with a zero learning rate the warm-started parameters are exactly the first geometry's
    same = jax.tree_util.tree_map(lambda a, b: bool(jnp.all(a == b)), points[0].state.params, points[1].state.params)
    assert all(jax.tree_util.tree_leaves(same))
    for p in points:
        e = p.evaluation.components.total
        # variational bound: no H₂⁺ energy lies below the curve's minimum −0.602634 Ha at R = 2.0 bohr
        # (Bates, Ledsham & Stewart 1953, from memory); the analytic start is bound (below −0.5 Ha)
        assert -0.602634 - 4 * float(e.error) < float(e.mean) < -0.5 + 4 * float(e.error)
        assert p.evaluation.samples.shape == (16, 16, 1, 3) and p.evaluation.local_energies.shape == (16, 16)


def test_energy_components_in_chunks_equal_one_batch():
    # Chunking bounds memory only: the local energies must agree to rounding whether they are
    # computed 48 configurations at a time (a remainder chunk included) or all at once.
    import inspect

    system = el.molecule([("H", (0, 0, 0)), ("H", (0, 0, 2.0))], charge=1)
    model = el.SlaterJastrow(el.SlaterTypeOrbitals(system), ())
    x = system.random(jax.random.PRNGKey(1), 160)
    params = model.init(jax.random.PRNGKey(0), x[:1])
    samples = x.reshape(10, 16, 1, 3)
    h = el.CoulombHamiltonian(system)
    log_amp = lambda z: model.apply(params, z)
    whole = el.observables._components_and_local_energies(h, log_amp, samples, None)[1]
    chunked = el.observables._components_and_local_energies(h, log_amp, samples, 48)[1]
    np.testing.assert_allclose(np.asarray(chunked), np.asarray(whole), rtol=1e-12)
    # evaluation passes chunk by default, so a pass of any length stays in bounded memory
    default = inspect.signature(el.evaluation_pass).parameters["chunk"].default
    assert default == el.observables.EVALUATION_CHUNK >= 1024
