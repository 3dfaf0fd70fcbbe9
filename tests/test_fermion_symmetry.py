"""Fermionic symmetry projection: signs of moved creation operators, sectors, projected states."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings, strategies as st

import psiloom as pl
from psiloom import fermions as fm
from psiloom.fermions.symmetric import fermion_images
from psiloom.reference import ground_state, operator_matrix
from psiloom.states import BoundState


def _representation(space, group):
    """Sparse matrices U_g (|g·n⟩ s_g(n) in column n) on the enumerated sector, g in the group."""
    confs = space.configurations()
    codes = fm.occupation_codes(confs)
    images, signs = fermion_images(space, group.perms, group.flips, jnp.asarray(confs))
    images, signs = np.asarray(images), np.asarray(signs)
    cols = np.arange(len(confs))
    out = []
    for g in range(len(group)):
        rows = np.searchsorted(codes, fm.occupation_codes(images[:, g]))
        assert np.all(codes[rows] == fm.occupation_codes(images[:, g]))  # images stay in the sector
        out.append(sp.csr_matrix((signs[:, g], (rows, cols)), shape=(len(confs), len(confs))))
    return out


def _ring_group(n):
    lattice = pl.lattices.chain(n)
    return lattice, pl.symmetry.product(pl.symmetry.space_group(lattice), pl.symmetry.spin_flip(lattice))


@pytest.mark.parametrize("model, n_particles", [("hubbard", 3), ("hubbard", 2), ("tv", 3), ("tv", 2)])
def test_moved_operators_commute_with_the_hamiltonian_and_compose(model, n_particles):
    # U_g H U_g† = H for every translation, mirror and spin exchange of a periodic ring (the bond set
    # maps onto itself: a property of the model, independent of the code's sign rule), and
    # U_g U_h = U_{gh} (a representation). With an even number of particles per spin a hop across
    # the boundary carries a sign in the occupation basis, which a plain permutation of
    # occupations (no fermionic sign) fails to reproduce.
    lattice, group = _ring_group(6)
    if model == "hubbard":
        space = fm.FermionSpace(6, n_particles, n_particles)
        H = fm.hubbard(lattice, t=1.0, U=3.0, t_next=0.3, next_bonds=lattice.next_bonds)
    else:
        space = fm.spinless_space(6, n_particles)
        H = fm.spinless_tv(lattice, t=1.0, V=2.0)
        group = pl.symmetry.space_group(lattice)
    mat = operator_matrix(H, space)
    us = _representation(space, group)
    for u in us:
        assert abs(u @ mat - mat @ u).max() < 1e-12
    table = group.multiplication_table()
    rng = np.random.default_rng(0)
    for g, h in rng.integers(0, len(group), size=(12, 2)):
        assert abs(us[g] @ us[h] - us[table[g, h]]).max() < 1e-12


@pytest.mark.parametrize("n, momentum, irrep, parity", [(6, 0.0, "even", -1), (8, np.pi, "odd", 1)])
def test_ring_ground_states_have_the_expected_quantum_numbers(n, momentum, irrep, parity):
    # Half-filled periodic Hubbard rings, checked by ED (scipy Lanczos): s_g(n) ψ0(g·n) = χ(g) ψ0(n)
    # with the characters of the stated sector. L = 4n (N↑ = N↓ even): the boundary hop carries
    # (−1)^(N↑−1) = −1, the U = 0 sea is open-shell and the ground state sits at momentum π, odd
    # under the site mirror. The spin-exchange parity of a singlet of N electrons is (−1)^(N/2)
    # (each singlet pair changes sign; reordering whole pairs is even; from memory): −1 for 6
    # electrons, +1 for 8. Reference: the scipy Lanczos ground vector, not the code under test.
    lattice, group = _ring_group(n)
    space = fm.FermionSpace(n, n // 2, n // 2)
    _, v = ground_state(fm.hubbard(lattice, U=4.0), space)
    v = np.asarray(v).ravel()
    chi = pl.symmetry.characters(group, momentum=momentum, point_irrep=irrep, spin_parity=parity).real
    for g, u in enumerate(_representation(space, group)):
        np.testing.assert_allclose(u.T @ v, chi[g] * v, atol=1e-8)  # (U_g† v)(n) = s_g(n) v(g·n)


def test_projected_state_local_energies_average_to_its_exact_expectation():
    # Σ_n |ψ(n)|² E_loc(n) / Σ_n |ψ(n)|² over the whole sector (the estimator's connected
    # configurations, each one a projected evaluation) equals ψᵀHψ/ψᵀψ from the sparse matrix (an
    # exact identity; scipy.sparse as the outside reference), and lies above the ED energy
    # (variational principle)
    lattice, group = _ring_group(6)
    space = fm.FermionSpace(6, 3, 3)
    H = fm.hubbard(lattice, U=4.0)
    uhf = fm.hubbard_mean_field(space, fm.one_body_matrix(H), 4.0, pattern=2 * lattice.sublattice - 1)
    sector = pl.symmetry.sector(group, momentum=0.0, point_irrep="even", spin_parity=-1)
    model = fm.FermionSymmetrized(fm.BackflowDeterminant(space, uhf.guess, hidden=6, jastrow=True), space, sector)
    x = jnp.asarray(space.configurations())
    params = model.init(jax.random.PRNGKey(3), x[:1])
    params = jax.tree_util.tree_map(lambda p: p + 0.05 * jax.random.normal(jax.random.PRNGKey(4), p.shape), params)
    log_psi = np.asarray(jax.jit(model.apply)(params, x))
    psi = np.exp(log_psi.real) * np.cos(log_psi.imag)
    e_loc = np.asarray(jax.jit(lambda p, x: H.local_energy(BoundState(model, p), x))(params, x))
    w = psi ** 2
    mat = operator_matrix(H, space)
    assert np.sum(w * e_loc.real) / np.sum(w) == pytest.approx(psi @ (mat @ psi) / (psi @ psi), abs=1e-10)
    e0, _ = ground_state(H, space)
    assert psi @ (mat @ psi) / (psi @ psi) >= e0 - 1e-10


@settings(max_examples=10, deadline=None)
@given(st.integers(0, 2**31 - 1), st.sampled_from([1, -1]), st.sampled_from(["even", "odd"]))
def test_projected_backflow_lies_in_its_sector(seed, parity, irrep):
    lattice = pl.lattices.chain(6)
    space = fm.FermionSpace(6, 3, 3)
    group = pl.symmetry.space_group(lattice)
    sector = pl.symmetry.sector(group, momentum=np.pi, point_irrep=irrep)
    model = fm.FermionSymmetrized(fm.BackflowDeterminant(space, hidden=6, jastrow=True), space, sector,
                                  spin_parity=parity)
    x = jnp.asarray(space.configurations())
    params = model.init(jax.random.PRNGKey(seed), x[:2])
    params = jax.tree_util.tree_map(lambda p: p + 0.3 * jax.random.normal(jax.random.PRNGKey(seed + 1), p.shape), params)
    log_psi = np.asarray(jax.jit(model.apply)(params, x))
    psi = np.exp(log_psi.real) * np.cos(log_psi.imag)
    assert np.all(np.abs(np.exp(log_psi.real) * np.sin(log_psi.imag)) <= 1e-9 * np.abs(psi).max())  # real up to sign
    full = pl.symmetry.product(group, pl.symmetry.spin_flip(lattice))
    chi = pl.symmetry.characters(full, momentum=np.pi, point_irrep=irrep, spin_parity=parity).real
    for g, u in enumerate(_representation(space, full)):
        np.testing.assert_allclose(u.T @ psi, chi[g] * psi, atol=1e-9 * np.abs(psi).max())


def test_projection_bad_input():
    lattice = pl.lattices.chain(4)
    group = pl.symmetry.translations(lattice)
    space = fm.FermionSpace(4, 2, 2)
    x = jnp.asarray(space.configurations()[:2])
    base = fm.SlaterDeterminant(space)
    with pytest.raises(ValueError, match="real characters"):
        fm.FermionSymmetrized(base, space, pl.symmetry.sector(group, momentum=np.pi / 2)).init(jax.random.PRNGKey(0), x)
    odd = fm.FermionSpace(4, 2, 1)
    with pytest.raises(ValueError, match="N↑ = N↓"):
        fm.FermionSymmetrized(fm.SlaterDeterminant(odd), odd, group, spin_parity=1).init(
            jax.random.PRNGKey(0), jnp.asarray(odd.configurations()[:2]))
    with pytest.raises(ValueError, match="acts on 6 sites"):
        fm.FermionSymmetrized(base, space, pl.symmetry.translations(pl.lattices.chain(6))).init(jax.random.PRNGKey(0), x)
    with pytest.raises(ValueError, match="spin_parity"):
        fm.FermionSymmetrized(base, space, group, spin_parity=2).init(jax.random.PRNGKey(0), x)
    with pytest.raises(TypeError, match="FermionSpace"):
        fm.FermionSymmetrized(base, "space", group).init(jax.random.PRNGKey(0), x)


def test_subsector_restricts_and_checks_closure():
    # translations by multiples of L/2, the mirror and the spin flip of a 12-site ring: a subgroup
    # of 8 elements whose restricted characters are still a representation (χ(g)χ(h) = χ(gh))
    lattice, group = _ring_group(12)
    full = pl.symmetry.sector(group, momentum=np.pi, point_irrep="odd", spin_parity=1)
    sub = pl.symmetry.subsector(full, group.shifts[:, 0] % 6 == 0)
    assert len(sub.group) == 8
    sub.check_representation()
    with pytest.raises(ValueError, match="not a subgroup"):
        pl.symmetry.subsector(full, group.shifts[:, 0] % 5 == 0)
    with pytest.raises(ValueError, match="identity"):
        pl.symmetry.subsector(full, group.shifts[:, 0] == 3)
    with pytest.raises(ValueError, match="booleans"):
        pl.symmetry.subsector(full, np.ones(3, bool))
