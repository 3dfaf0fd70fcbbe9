"""Fermions in second quantisation: algebra, signs, models, exact energies, determinant states."""

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import given, strategies as st

import psiloom as pl
from psiloom import fermions as fm
from psiloom.reference import ground_state, hubbard_chain_energy_per_site
from psiloom.states import BoundState
from psiloom.states.fast import values_at

M = 2  # orbitals: 4 spin-orbitals, a 16-state Fock space (numpy-only checks)

ladder = st.tuples(st.integers(0, 2 * M - 1), st.sampled_from([0, 1]))
products = st.lists(ladder, min_size=0, max_size=4).map(tuple)
coefs = st.complex_numbers(max_magnitude=2.0, allow_nan=False, allow_infinity=False)
operators = st.lists(st.tuples(products, coefs), min_size=1, max_size=4).map(
    lambda terms: fm.FermionOperator(M, {ops: c for ops, c in terms}))


@given(st.integers(0, 2 * M - 1), st.integers(0, 2 * M - 1))
def test_canonical_anticommutation(p, q):
    # {c_p, c†_q} = δ_pq, {c_p, c_q} = 0: algebraically (normal ordering) and as matrices
    c, cd = fm.annihilation(M, p), fm.creation(M, q)
    anti = c * cd + cd * c
    assert anti.is_zero() == (p != q)
    mat = anti.dense_matrix()
    np.testing.assert_allclose(mat, np.eye(16) * (p == q), atol=1e-14)
    cq = fm.annihilation(M, q)
    assert (c * cq + cq * c).is_zero()
    cpm, cqm = c.dense_matrix(), cq.dense_matrix()
    np.testing.assert_allclose(cpm @ cqm + cqm @ cpm, 0, atol=1e-14)
    np.testing.assert_allclose(cpm @ cd.dense_matrix() + cd.dense_matrix() @ cpm, np.eye(16) * (p == q), atol=1e-14)


@given(operators)
def test_adjoint_and_hermiticity(op):
    mat = op.dense_matrix()
    np.testing.assert_allclose(op.adjoint().dense_matrix(), mat.conj().T, atol=1e-12)
    h = op + op.adjoint()
    assert h.is_hermitian()
    np.testing.assert_allclose(h.dense_matrix(), h.dense_matrix().conj().T, atol=1e-12)
    # products: the matrix of a product is the product of the matrices
    np.testing.assert_allclose((op * h).dense_matrix(), mat @ h.dense_matrix(), atol=1e-10)


@given(operators)
def test_matrix_equals_jordan_wigner_pauli_sum(op):
    # an independent construction of every sign (Jordan & Wigner 1928; psiloom's Pauli algebra)
    np.testing.assert_allclose(op.dense_matrix(), fm.jordan_wigner(op).dense_matrix(), atol=1e-12)


def test_sector_matrix_is_the_jordan_wigner_block_and_ordering():
    # Hubbard on a 3-site chain with t' : the sector block of the Pauli-sum matrix, rows picked by code
    H = fm.hubbard(pl.lattices.chain(3, periodic=False), t=1.0, U=3.0, t_next=0.4, mu=0.3, next_bonds=[(0, 2)])
    space = fm.FermionSpace(3, 2, 1)
    block = H.dense_matrix(space)
    full = fm.jordan_wigner(H).dense_matrix()
    codes = fm.occupation_codes(space.configurations())
    assert np.all(np.diff(codes) > 0)
    np.testing.assert_allclose(block, full[np.ix_(codes, codes)], atol=1e-12)


@pytest.mark.parametrize("U", [0.0, 2.0, 8.0])
def test_two_site_hubbard_textbook(U):
    # two electrons on a dimer: E0 = U/2 − sqrt(U²/4 + 4t²) (e.g. Essler et al., "The
    # One-Dimensional Hubbard Model" (2005), ch. 2; from memory)
    t = 1.3
    H = fm.hubbard(n_sites=2, bonds=[(0, 1)], t=t, U=U)
    e0, _ = ground_state(H, fm.FermionSpace(2, 1, 1))
    assert e0 == pytest.approx(U / 2 - math.sqrt(U**2 / 4 + 4 * t**2), abs=1e-12)


def test_six_site_ring_by_ed_and_lieb_wu():
    lattice = pl.lattices.chain(6)
    space = fm.FermionSpace(6, 3, 3)
    # U = 0: sum of the occupied band energies −2t cos k, k = 2πn/6 (closed shell, 3 per spin)
    e_free, _ = ground_state(fm.hubbard(lattice, U=0.0), space)
    band = np.sort(-2 * np.cos(2 * np.pi * np.arange(6) / 6))
    assert e_free == pytest.approx(2 * band[:3].sum(), abs=1e-10)
    # U = 4 by ED of the fermion matrix = ED of its Jordan-Wigner Pauli sum in the same sector
    H = fm.hubbard(lattice, U=4.0)
    e0, _ = ground_state(H, space)
    codes = fm.occupation_codes(space.configurations())
    import scipy.linalg
    e_jw = scipy.linalg.eigvalsh(fm.jordan_wigner(H).dense_matrix()[np.ix_(codes, codes)])[0]
    assert e0 == pytest.approx(e_jw, abs=1e-10)
    # the 6-site ring lies within 7% of the infinite chain (Lieb & Wu 1968) and below it
    e_inf = hubbard_chain_energy_per_site(4.0)
    assert e0 / 6 < e_inf and abs(e0 / 6 - e_inf) < 0.07 * abs(e_inf)


def test_lieb_wu_limits():
    # U = 0: −4t/π (free band); U ≫ t: −(4t²/U) ln 2 (Heisenberg chain, Hulthén 1938); value at
    # U = 4t: −0.5737 (Lieb & Wu 1968; from memory)
    assert hubbard_chain_energy_per_site(0.0, t=2.0) == pytest.approx(-8 / np.pi, rel=1e-12)
    assert hubbard_chain_energy_per_site(200.0) == pytest.approx(-4 * math.log(2) / 200, rel=2e-3)
    assert hubbard_chain_energy_per_site(4.0) == pytest.approx(-0.5737, abs=1e-4)
    with pytest.raises(ValueError, match="U"):
        hubbard_chain_energy_per_site(-1.0)


def test_spinless_tv_matches_free_fermions_at_v0():
    lattice = pl.lattices.chain(5)
    space = fm.spinless_space(5, 2)
    e0, _ = ground_state(fm.spinless_tv(lattice, V=0.0), space)
    band = np.sort(-2 * np.cos(2 * np.pi * np.arange(5) / 5))
    assert e0 == pytest.approx(band[:2].sum(), abs=1e-12)
    e1, _ = ground_state(fm.spinless_tv(lattice, V=1.0), space)
    assert e1 > e0  # repulsion costs energy


def test_slater_determinant_exact_at_u0_and_fast_updates():
    # U = 0 ring: the determinant of the lowest band orbitals is an eigenstate, E_loc ≡ band sum
    lattice = pl.lattices.chain(6)
    space = fm.FermionSpace(6, 3, 3)
    H0 = fm.hubbard(lattice, U=0.0)
    guess = fm.lowest_orbitals(space, fm.one_body_matrix(H0))
    model = fm.SlaterDeterminant(space, guess)
    x = jnp.asarray(space.configurations())
    params = model.init(jax.random.PRNGKey(0), x[:1])
    e_loc = np.asarray(jax.jit(lambda p, x: H0.local_energy(BoundState(model, p), x))(params, x))
    band = np.sort(-2 * np.cos(2 * np.pi * np.arange(6) / 6))
    np.testing.assert_allclose(e_loc.real, 2 * band[:3].sum(), atol=1e-10)
    # fast hop / spin-exchange updates (Sherman-Morrison) = full re-evaluation, random orbitals
    rand = fm.SlaterDeterminant(space)
    params = rand.init(jax.random.PRNGKey(2), x[:1])
    move = pl.sampling.Mixture((fm.Hop.along(lattice.bonds, space), fm.SpinExchange(lattice.bonds, 6)), (0.5, 0.5))

    @jax.jit
    def compare(params, x):
        fast = rand.apply(params, method="fast_updates")
        x_new, sites = move(jax.random.PRNGKey(3), x)
        delta, cache = fast.update(values_at(x, sites), fast.init(x), sites, values_at(x_new, sites))
        # the updated cache continues the chain: moving back restores log ψ(x)
        back, _ = fast.update(values_at(x_new, sites), cache, sites, values_at(x, sites))
        return delta, rand.apply(params, x_new) - rand.apply(params, x), back

    delta, ref, back = compare(params, x)
    np.testing.assert_allclose(np.exp(np.asarray(delta)), np.exp(np.asarray(ref)), atol=1e-10)
    np.testing.assert_allclose(np.exp(np.asarray(back + delta)), 1.0, atol=1e-10)


def test_state_sign_convention_matches_operator():
    # a determinant of orbitals b†_a = Σ_i Φ_ia c†_i: ψ(n) = ⟨n|Π_a b†_a|0⟩ built with the operator algebra
    space = fm.FermionSpace(3, 2, 1)
    model = fm.SlaterDeterminant(space)
    params = model.init(jax.random.PRNGKey(4), space.random(jax.random.PRNGKey(5), 1))
    up, dn = np.asarray(params["params"]["orbitals_up"]), np.asarray(params["params"]["orbitals_down"])
    state = fm.FermionOperator.identity(3)
    for spin, phi in ((0, up), (1, dn)):
        for a in range(phi.shape[1]):
            state = state * sum((fm.creation(3, spin * 3 + i) * float(phi[i, a]) for i in range(3)),
                                fm.FermionOperator(3))
    vacuum = np.zeros(64)
    vacuum[0] = 1.0
    amplitudes = state.dense_matrix() @ vacuum  # whole Fock space, increasing code
    codes = fm.occupation_codes(space.configurations())
    psi = np.exp(np.asarray(jax.jit(model.apply)(params, jnp.asarray(space.configurations()))))
    np.testing.assert_allclose(psi.real, amplitudes[codes], atol=1e-12)


@pytest.mark.parametrize("with_flip", [False, True])
def test_metropolis_hops_sample_the_determinant(with_flip):
    # histogram of the chains against |ψ|² over the 9 states of 3 orbitals, 1 up + 1 down
    # (chi-square at a fixed seed; 4-sigma bound on chi2 with 8 degrees of freedom, common practice);
    # with the global spin flip mixed in (generic path: the flip is not a fast-update move)
    space = fm.FermionSpace(3, 1, 1)
    model = fm.SlaterDeterminant(space)
    x_all = jnp.asarray(space.configurations())
    params = model.init(jax.random.PRNGKey(7), x_all[:1])
    bonds = [(0, 1), (1, 2)]
    moves, weights = (fm.any_hop(), fm.Hop.along(bonds, space), fm.SpinExchange(bonds, 3)), (0.4, 0.3, 0.3)
    if with_flip:
        moves, weights = moves + (fm.SpinFlip(3),), (0.3, 0.3, 0.2, 0.2)
    sampler = pl.sampling.MetropolisChains(space, n_chains=32, move=pl.sampling.Mixture(moves, weights))
    bound = BoundState(model, params, fast=not with_flip)

    @jax.jit
    def run(key):
        state = sampler.init(key, bound)
        return sampler.sample(jax.random.fold_in(key, 1), state, bound, 150)[0]

    xs = np.asarray(run(jax.random.PRNGKey(8))[30::3]).reshape(-1, 6)  # thinned: nearly independent
    counts = np.bincount(np.searchsorted(fm.occupation_codes(x_all), fm.occupation_codes(xs)), minlength=9)
    p = np.abs(np.exp(np.asarray(jax.jit(model.apply)(params, x_all)))) ** 2
    expected = p / p.sum() * len(xs)
    chi2 = np.sum((counts - expected) ** 2 / expected)
    assert chi2 < 8 + 4 * math.sqrt(16)


def test_vmc_backflow_on_small_hubbard_chain():
    # 4-site open chain, U = 4, half filling: backflow VMC reaches ED within 1e-3 relative
    # (tolerance: common practice for this size; the 8-site ring is in benchmarks/fermions.py)
    import optax

    lattice = pl.lattices.chain(4, periodic=False)
    space = fm.FermionSpace(4, 2, 2)
    H = fm.hubbard(lattice, U=4.0)
    e0, _ = ground_state(H, space)
    model = fm.BackflowDeterminant(space, fm.lowest_orbitals(space, fm.one_body_matrix(H)), hidden=16)
    sampler = pl.sampling.MetropolisChains(space, n_chains=16, bonds=lattice.bonds)
    optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-3), optax.sgd(0.05))
    search = pl.train.GroundStateSearch(model, H, sampler, optimizer, n_samples=256)
    state, _ = search.run(60, key=jax.random.PRNGKey(0), progress=False)
    energy, _ = search.evaluate(state, n_samples=2048)
    assert abs(energy.mean - e0) < 1e-3 * abs(e0) + 3 * energy.error



@pytest.mark.slow
def test_vmc_backflow_on_the_eight_site_hubbard_ring():
    # periodic 8-site ring, U = 4t, half filling (an open U = 0 shell): backflow × Jastrow from the
    # unrestricted mean field reaches exact diagonalisation (scipy Lanczos) within 1e-3 relative
    # (the target of the fermion issue); tolerance 1e-3·|E0| + 3 error bars
    import optax

    lattice = pl.lattices.chain(8)
    space = fm.FermionSpace(8, 4, 4)
    H = fm.hubbard(lattice, U=4.0)
    e0, _ = ground_state(H, space)
    mean_field = fm.hubbard_mean_field(space, fm.one_body_matrix(H), 4.0, pattern=2 * lattice.sublattice - 1)
    model = fm.BackflowDeterminant(space, mean_field.guess, hidden=16, jastrow=True)
    sampler = pl.sampling.MetropolisChains(space, n_chains=64, move=fm.Hop.along(lattice.bonds, space), burn_in=2)
    optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-3), optax.sgd(0.15))
    search = pl.train.GroundStateSearch(model, H, sampler, optimizer, n_samples=1024)
    state, _ = search.run(400, key=jax.random.PRNGKey(0), progress=False)
    energy, _ = search.evaluate(state, n_samples=16384)
    assert mean_field.energy > e0 + 0.5  # the start is far away (18 % above ED)
    assert abs(energy.mean.real - e0) < 1e-3 * abs(e0) + 3 * energy.error


@pytest.mark.parametrize("U", [0.5, 1.5, 3.0, 8.0])
def test_two_site_unrestricted_mean_field_textbook(U):
    # minimal-basis two-site model (textbook, from memory): restricted E = −2t + U/2 up to the
    # instability at U = 2t, then the broken-symmetry solution E = −2t²/U (t = 1)
    space = fm.FermionSpace(2, 1, 1)
    H = fm.hubbard(n_sites=2, bonds=[(0, 1)], U=U)
    result = fm.hubbard_mean_field(space, fm.one_body_matrix(H), U)
    assert result.converged
    expected = -2.0 / U if U > 2.0 else -2.0 + U / 2.0
    assert result.energy == pytest.approx(expected, abs=1e-8)
    moment = np.abs(result.n_up - result.n_down)
    assert (moment > 1e-3).all() == (U > 2.0)


def test_mean_field_energy_is_the_determinants_expectation_and_variational():
    # E_UHF = ⟨Φ|H|Φ⟩ of the determinant built from its orbitals (exact sum over the sector, scipy
    # sparse matrix), E_ED ≤ E_UHF ≤ E of the U = 0 determinant; Néel order on the half-filled ring
    lattice = pl.lattices.chain(6)
    space = fm.FermionSpace(6, 3, 3)
    H = fm.hubbard(lattice, U=4.0)
    result = fm.hubbard_mean_field(space, fm.one_body_matrix(H), 4.0, pattern=2 * lattice.sublattice - 1)
    model = fm.SlaterDeterminant(space, result.guess)
    x = jnp.asarray(space.configurations())
    params = model.init(jax.random.PRNGKey(0), x[:1])
    psi = np.exp(np.asarray(jax.jit(model.apply)(params, x))).real
    matrix = pl.reference.operator_matrix(H, space)
    assert result.energy == pytest.approx(psi @ (matrix @ psi) / (psi @ psi), abs=1e-9)
    restricted = fm.SlaterDeterminant(space, fm.lowest_orbitals(space, fm.one_body_matrix(H)))
    phi = np.exp(np.asarray(jax.jit(restricted.apply)(restricted.init(jax.random.PRNGKey(0), x[:1]), x))).real
    e0, _ = ground_state(H, space)
    assert e0 < result.energy < phi @ (matrix @ phi) / (phi @ phi) - 1e-3
    staggered = (result.n_up - result.n_down) * (2 * lattice.sublattice - 1)
    assert np.all(staggered > 0.3) or np.all(staggered < -0.3)


def test_mean_field_bad_input():
    space = fm.FermionSpace(2, 1, 1)
    h = np.array([[0.0, -1.0], [-1.0, 0.0]])
    with pytest.raises(TypeError, match="spinful"):
        fm.hubbard_mean_field(fm.spinless_space(2, 1), h, 1.0)
    with pytest.raises(ValueError, match="symmetric"):
        fm.hubbard_mean_field(space, np.array([[0.0, -1.0], [0.0, 0.0]]), 1.0)
    with pytest.raises(ValueError, match="mixing"):
        fm.hubbard_mean_field(space, h, 1.0, mixing=0.0)
    with pytest.raises(ValueError, match="pattern"):
        fm.hubbard_mean_field(space, h, 1.0, pattern=[1.0, -1.0, 1.0])
    with pytest.raises(ValueError, match="U"):
        fm.hubbard_mean_field(space, h, float("nan"))


def test_bad_input():
    with pytest.raises(ValueError, match="n_up=5"):
        fm.FermionSpace(4, 5, 1)
    with pytest.raises(ValueError, match="n_down"):
        fm.FermionSpace(4, 1, -1)
    with pytest.raises(TypeError):
        fm.FermionSpace(4, 1.5, 1)
    with pytest.raises(ValueError, match="spin-orbital 8"):
        fm.creation(4, 8)
    with pytest.raises(ValueError, match="outside"):
        fm.hubbard(n_sites=3, bonds=[(0, 3)])
    with pytest.raises(ValueError, match="different spins"):
        pl.sampling.MetropolisChains(fm.FermionSpace(2, 1, 1), move=fm.Hop([(0, 2), (1, 3), (0, 1), (2, 3)]))
    with pytest.raises(ValueError, match="never move"):
        pl.sampling.MetropolisChains(fm.FermionSpace(3, 1, 1), bonds=[(0, 1)])
    with pytest.raises(TypeError, match="conserves n_up"):
        pl.sampling.MetropolisChains(fm.FermionSpace(3, 1, 1), move=pl.sampling.pair_exchange)
    op = fm.hubbard(pl.lattices.chain(3), U=1.0)
    with pytest.raises(ValueError, match="occupations"):
        op.local_energy(lambda x: jnp.zeros(x.shape[0]), jnp.full((2, 6), 0.5))
    with pytest.raises(ValueError, match="n_up = n_down"):
        pl.sampling.MetropolisChains(fm.FermionSpace(3, 2, 1), move=fm.SpinFlip(3))
    flipped, sites = fm.SpinFlip(2)(jax.random.PRNGKey(0), jnp.array([[1.0, 0.0, 0.0, 1.0]]))
    np.testing.assert_array_equal(flipped, [[0.0, 1.0, 1.0, 0.0]])
    assert sites.shape == (1, 4)
    with pytest.raises(ValueError, match="changes n_up"):
        fm.creation(3, 0).in_sector(fm.FermionSpace(3, 1, 1))
