"""Pauli-sum operators and the model builders, checked against independent matrices and exact results.

The reference matrices are Kronecker products of the textbook 2×2 Pauli matrices, built here
with NumPy and sharing no code with psiloom. psiloom's basis (``SpinSpace.configurations``) puts
site 0 on the most significant bit with up (+1) as bit 1, so the first basis state is "all
down"; the textbook matrices are written in the order (up, down) and are therefore conjugated
by σˣ (which swaps up and down) before the Kronecker product.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from psiloom import reference, lattices
from psiloom.operators import (
    PauliSum,
    heisenberg,
    j1j2,
    magnetization_z,
    pauli,
    spin_correlation,
    transverse_field_ising,
    xxz,
)
from psiloom.spaces import SpinSpace

# textbook Pauli matrices in the (up, down) order
_TEXTBOOK = {
    "I": np.eye(2, dtype=complex),
    "X": np.array([[0, 1], [1, 0]], dtype=complex),
    "Y": np.array([[0, -1j], [1j, 0]], dtype=complex),
    "Z": np.array([[1, 0], [0, -1]], dtype=complex),
}
_SWAP = _TEXTBOOK["X"].real
# the same matrices in psiloom's per-site order (down, up)
LOCAL = {k: _SWAP @ m @ _SWAP for k, m in _TEXTBOOK.items()}


def kron_string(n: int, factors: dict[int, str]) -> np.ndarray:
    """⊗_i σ^{factors[i]}_i (identity elsewhere) in psiloom's basis order, site 0 leftmost."""
    out = np.ones((1, 1), dtype=complex)
    for i in range(n):
        out = np.kron(out, LOCAL[factors.get(i, "I")])
    return out


def kron_term(n: int, letters: str, sites, coef=1.0) -> np.ndarray:
    """Ordered product coef · σ^{l_0}_{s_0} σ^{l_1}_{s_1} ... (repeated sites allowed)."""
    out = coef * np.eye(2**n, dtype=complex)
    for letter, site in zip(letters, sites):
        out = out @ kron_string(n, {site: letter})
    return out


def kron_heisenberg(n: int, bonds, J: float, delta: float = 1.0) -> np.ndarray:
    """J Σ (SˣSˣ + SʸSʸ + Δ SᶻSᶻ) with S = σ/2, from Kronecker products."""
    h = np.zeros((2**n, 2**n), dtype=complex)
    for i, j in bonds:
        for a, w in (("X", 1.0), ("Y", 1.0), ("Z", delta)):
            h += 0.25 * J * w * kron_string(n, {int(i): a, int(j): a})
    return h


# random Pauli strings: (letters, sites) with distinct sites
@st.composite
def pauli_strings(draw, n):
    k = draw(st.integers(0, n))
    sites = draw(st.permutations(range(n)))[:k]
    letters = "".join(draw(st.sampled_from("XYZ")) for _ in range(k))
    return letters, list(sites)


coefs = st.floats(-2, 2, allow_nan=False).filter(lambda v: abs(v) > 1e-3)


# --------------------------------------------------------------------------- Pauli algebra


@pytest.mark.parametrize(
    "a,b,phase,c",
    [("X", "Y", 1j, "Z"), ("Y", "Z", 1j, "X"), ("Z", "X", 1j, "Y"),
     ("Y", "X", -1j, "Z"), ("Z", "Y", -1j, "X"), ("X", "Z", -1j, "Y")],
)
def test_single_site_pauli_algebra(a, b, phase, c):
    # σ^a σ^b = i ε_abc σ^c (textbook)
    prod = pauli(1, a, 0) * pauli(1, b, 0)
    assert prod.terms == {((0, c),): phase}
    np.testing.assert_allclose(prod.dense_matrix(), phase * LOCAL[c], atol=1e-14)
    # the reference itself obeys the algebra (guards the basis conversion)
    np.testing.assert_allclose(LOCAL[a] @ LOCAL[b], phase * LOCAL[c], atol=1e-14)
    # squares are the identity
    assert (pauli(1, a, 0) * pauli(1, a, 0)).terms == {(): 1.0}


def test_repeated_sites_are_refused_and_products_multiply_out():
    # a string naming a site twice used to multiply out silently ("XY" on (0, 0) = iσᶻ₀, not
    # Hermitian); it is refused, and the operator product gives the single-site algebra
    with pytest.raises(ValueError, match="site 0 more than once"):
        pauli(2, "XY", (0, 0))
    with pytest.raises(ValueError, match="site 1 twice"):
        PauliSum(2, {((1, "X"), (1, "Z")): 1.0})
    prod = pauli(2, "X", 0) * pauli(2, "Y", 0)
    np.testing.assert_allclose(prod.dense_matrix(), 1j * kron_string(2, {0: "Z"}), atol=1e-14)


@settings(max_examples=60)
@given(bad=st.one_of(st.sampled_from([float("nan"), float("inf"), -float("inf"), complex(1, float("nan"))]),
                     st.text(max_size=2), st.none(), st.just([1.0])))
def test_bad_coefficients_are_refused_by_name(bad):
    # pauli(4, "Z", 0, nan) used to be the zero operator and inf was accepted; strings raised
    # a raw TypeError from complex()
    with pytest.raises((ValueError, TypeError), match="coefficient"):
        pauli(4, "Z", 0, bad)
    with pytest.raises((ValueError, TypeError), match="coefficient"):
        PauliSum(4, {((0, "Z"),): bad})


@settings(max_examples=40)
@given(site=st.one_of(st.floats(0.01, 3.99).filter(lambda v: not float(v).is_integer()),
                      st.just(2.0), st.text(min_size=1, max_size=2), st.booleans(), st.just(1 + 0j)))
def test_non_integer_sites_are_refused_by_name(site):
    # pauli(4, "Z", 1.7) used to act on site 1 (int() truncation)
    with pytest.raises((ValueError, TypeError), match="site"):
        pauli(4, "Z", site)
    with pytest.raises((ValueError, TypeError), match="site"):
        pauli(4, "ZZ", (0, site))


def test_bad_letters_and_sizes_are_refused_by_name():
    with pytest.raises(TypeError, match="letters"):
        pauli(4, 3, 0)
    with pytest.raises(ValueError, match="n_sites"):
        pauli(0, "Z", 0)
    with pytest.raises(ValueError, match="scalar factor"):
        pauli(4, "Z", 0) * float("nan")


@given(st.integers(1, 4), st.data())
def test_dense_matrix_of_random_pauli_strings_matches_kronecker(n, data):
    letters, sites = data.draw(pauli_strings(n))
    coef = data.draw(coefs) * data.draw(st.sampled_from([1.0, 1j, -1j]))
    op = pauli(n, letters, sites, coef)
    np.testing.assert_allclose(op.dense_matrix(), kron_term(n, letters, sites, coef), atol=1e-13)


@given(st.integers(1, 3), st.data())
def test_products_and_sums_match_matrix_algebra(n, data):
    def random_sum():
        terms = data.draw(st.lists(pauli_strings(n), min_size=1, max_size=3))
        c = [data.draw(coefs) * data.draw(st.sampled_from([1.0, 1j])) for _ in terms]
        op = sum((pauli(n, l, s, ci) for (l, s), ci in zip(terms, c)), PauliSum(n))
        mat = sum(kron_term(n, l, s, ci) for (l, s), ci in zip(terms, c))
        return op, mat

    (a, ma), (b, mb) = random_sum(), random_sum()
    s = data.draw(coefs)
    np.testing.assert_allclose((a * b).dense_matrix(), ma @ mb, atol=1e-12)
    np.testing.assert_allclose((a @ b).dense_matrix(), ma @ mb, atol=1e-12)
    np.testing.assert_allclose((a + b).dense_matrix(), ma + mb, atol=1e-12)
    np.testing.assert_allclose((a - s * b).dense_matrix(), ma - s * mb, atol=1e-12)
    np.testing.assert_allclose((s + a).dense_matrix(), s * np.eye(2**n) + ma, atol=1e-12)
    np.testing.assert_allclose((a / 2).dense_matrix(), ma / 2, atol=1e-12)
    np.testing.assert_allclose(a.adjoint().dense_matrix(), ma.conj().T, atol=1e-12)


def test_spin_operators_have_spin_half_eigenvalues():
    # S = σ/2: S_i·S_j has eigenvalues −3/4 (singlet) and +1/4 (triplet) (textbook)
    vals = np.linalg.eigvalsh(spin_correlation(2, 0, 1).dense_matrix())
    np.testing.assert_allclose(np.sort(vals), [-0.75, 0.25, 0.25, 0.25], atol=1e-14)
    # S_i·S_i = s(s+1) = 3/4
    np.testing.assert_allclose(spin_correlation(3, 1, 1).dense_matrix(), 0.75 * np.eye(8), atol=1e-14)
    # total S^z is diagonal with ½ Σ x_i on the diagonal
    states = SpinSpace(3).configurations()
    np.testing.assert_allclose(np.diag(magnetization_z(3).dense_matrix()), 0.5 * states.sum(axis=1))


# --------------------------------------------------------------------------- hermiticity


def assert_hermitian_by_rows(op: PauliSum, space: SpinSpace | None = None):
    """⟨x|H|x'⟩ = conj⟨x'|H|x⟩ using the row-wise connections of every basis state."""
    space = SpinSpace(op.n_sites) if space is None else space
    states = space.configurations()
    index = {tuple(s): k for k, s in enumerate(states.tolist())}
    elements: dict[tuple[int, int], complex] = {}
    x_conn, mels = op.connections(states)
    for r in range(len(states)):
        for g in range(mels.shape[1]):
            if mels[r, g] != 0:
                c = index[tuple(x_conn[r, g].tolist())]
                elements[(r, c)] = elements.get((r, c), 0) + mels[r, g]
    for (r, c), v in elements.items():
        assert abs(v - np.conj(elements.get((c, r), 0))) < 1e-12, (r, c)
    dense = op.dense_matrix(space)
    np.testing.assert_allclose(dense, dense.conj().T, atol=1e-12)


couplings = st.floats(-3, 3, allow_nan=False)


@st.composite
def small_lattices(draw):
    if draw(st.booleans()):
        return lattices.chain(draw(st.integers(2, 8)), periodic=draw(st.booleans()))
    return lattices.square(draw(st.integers(2, 3)), draw(st.integers(1, 3)), periodic=draw(st.booleans()))


@given(small_lattices(), couplings, couplings)
def test_tfim_is_hermitian(lat, J, h):
    assert_hermitian_by_rows(transverse_field_ising(lat, J, h))


@given(small_lattices(), couplings, couplings, st.booleans())
def test_xxz_and_heisenberg_are_hermitian(lat, J, delta, marshall_basis):
    if marshall_basis and not lat.is_bipartite:
        with pytest.raises(ValueError, match="bipartite"):
            xxz(lat, J, delta, marshall_basis=True)
        return
    H = xxz(lat, J, delta, marshall_basis=marshall_basis)
    assert H.is_hermitian()
    assert_hermitian_by_rows(H)
    assert_hermitian_by_rows(heisenberg(lat, J, marshall_basis=marshall_basis))
    # and the full spectrum stays on the magnetisation sectors: the sector block is Hermitian too
    if lat.n_sites % 2 == 0:
        assert_hermitian_by_rows(H, SpinSpace(lat.n_sites, magnetisation=0))


@given(small_lattices(), couplings, couplings)
def test_j1j2_is_hermitian(lat, J1, J2):
    assert_hermitian_by_rows(j1j2(lat, J1, J2))


@given(st.integers(1, 4), st.data())
def test_random_hermitian_pauli_sums(n, data):
    # real coefficients on (Hermitian) Pauli strings make a Hermitian operator
    terms = data.draw(st.lists(pauli_strings(n), min_size=1, max_size=5))
    op = sum((pauli(n, l, s, data.draw(coefs)) for l, s in terms), PauliSum(n))
    assert op.is_hermitian()
    assert_hermitian_by_rows(op)


def test_non_hermitian_sum_is_detected():
    # i σˣσʸ is not Hermitian (σˣσʸ on different sites is Hermitian; times i it is anti-Hermitian)
    op = pauli(2, "XY", (0, 1), 1j) + pauli(2, "Z", 0)
    assert not op.is_hermitian()
    dense = op.dense_matrix()
    assert not np.allclose(dense, dense.conj().T)
    with pytest.raises(ValueError, match="Hermitian"):
        reference.ground_state(op)


# --------------------------------------------------------------------------- model matrices


def test_model_builders_match_kronecker_construction():
    lat = lattices.square(3, 2, periodic=False)
    n = lat.n_sites
    np.testing.assert_allclose(heisenberg(lat, 1.3).dense_matrix(), kron_heisenberg(n, lat.bonds, 1.3), atol=1e-12)
    np.testing.assert_allclose(xxz(lat, 0.7, -0.4).dense_matrix(), kron_heisenberg(n, lat.bonds, 0.7, -0.4), atol=1e-12)
    ref = kron_heisenberg(n, lat.bonds, 1.0) + kron_heisenberg(n, lat.next_bonds, 0.35)
    np.testing.assert_allclose(j1j2(lat, 1.0, 0.35).dense_matrix(), ref, atol=1e-12)
    tfim = sum(-0.8 * kron_string(n, {int(i): "Z", int(j): "Z"}) for i, j in lat.bonds)
    tfim = tfim + sum(-1.7 * kron_string(n, {i: "X"}) for i in range(n))
    np.testing.assert_allclose(transverse_field_ising(lat, 0.8, 1.7).dense_matrix(), tfim, atol=1e-12)


@pytest.mark.parametrize("magnetisation", [0, 1, -2])
def test_sector_matrix_is_the_sub_block(magnetisation):
    lat = lattices.chain(8)
    H = j1j2(lat, 1.0, 0.3) + 0.2 * magnetization_z(8)
    full = H.dense_matrix()
    mask = SpinSpace(8).configurations().sum(axis=1) == 2 * magnetisation
    block = H.dense_matrix(SpinSpace(8, magnetisation=magnetisation))
    np.testing.assert_allclose(block, full[np.ix_(mask, mask)], atol=1e-14)
    # the sector is invariant: nothing leaks out of it
    np.testing.assert_allclose(full[np.ix_(mask, ~mask)], 0, atol=1e-14)


def test_operator_leaving_the_sector_cannot_be_restricted():
    with pytest.raises(ValueError, match="sector"):
        pauli(4, "X", 0).sparse_matrix(SpinSpace(4, magnetisation=0))


# --------------------------------------------------------------------------- bad sites


@given(st.integers(1, 10), st.integers(0, 20), st.sampled_from("XYZ"))
def test_operator_on_site_outside_lattice_raises(n, offset, letter):
    bad = n + offset
    with pytest.raises(ValueError) as err:
        pauli(n, letter, bad)
    assert f"site {bad}" in str(err.value) and f"{n} sites" in str(err.value)
    with pytest.raises(ValueError) as err:
        pauli(n, letter + "Z", (bad, 0))
    assert f"site {bad}" in str(err.value)
    with pytest.raises(ValueError) as err:
        PauliSum(n, {((bad, letter),): 1.0})
    assert f"site {bad}" in str(err.value)


@given(st.integers(1, 10), st.integers(1, 20))
def test_negative_site_raises(n, k):
    with pytest.raises(ValueError) as err:
        pauli(n, "Z", -k)
    assert f"site {-k}" in str(err.value)


def test_operators_on_different_sizes_do_not_combine():
    with pytest.raises(ValueError, match="3 and 4"):
        pauli(3, "Z", 0) + pauli(4, "Z", 0)


def test_bad_letter_raises():
    with pytest.raises(ValueError, match="'Q'"):
        pauli(2, "Q", 0)


# --------------------------------------------------------------------------- sign rule


@pytest.mark.parametrize("lat", [lattices.chain(8), lattices.chain(7, periodic=False), lattices.square(4, 2)],
                         ids=["ring8", "open7", "square4x2"])
def test_marshall_basis_leaves_spectrum_unchanged(lat):
    # U = Π_{i∈B} σᶻ_i is unitary, so H and U H U† are isospectral (Marshall 1955)
    plain = np.linalg.eigvalsh(heisenberg(lat).dense_matrix())
    rotated = np.linalg.eigvalsh(heisenberg(lat, marshall_basis=True).dense_matrix())
    np.testing.assert_allclose(plain, rotated, atol=1e-10)
    # and it is exactly that unitary conjugation
    u = np.diag(np.prod(np.where(lat.sublattice == 1, SpinSpace(lat.n_sites).configurations(), 1.0), axis=1))
    np.testing.assert_allclose(u @ heisenberg(lat).dense_matrix() @ u, heisenberg(lat, marshall_basis=True).dense_matrix(),
                               atol=1e-12)


@pytest.mark.parametrize("lat", [lattices.chain(10), lattices.square(4, 2), lattices.chain(9, periodic=False)],
                         ids=["ring10", "square4x2", "open9"])
def test_marshall_basis_signs(lat):
    """Marshall 1955: with the sublattice rotation the Heisenberg ground state has amplitudes of
    one sign; without it the sign is (−1)^(number of up spins on sublattice B)."""
    n = lat.n_sites
    sz = 0 if n % 2 == 0 else 0.5
    space = SpinSpace(n, magnetisation=sz)
    _, v = reference.ground_state(heisenberg(lat, marshall_basis=True), space)
    v = v * np.sign(v[np.argmax(np.abs(v))])
    assert np.all(v > -1e-10)
    assert np.all(np.abs(v) > 1e-12)  # Perron-Frobenius: strictly positive (connected sector)
    _, w = reference.ground_state(heisenberg(lat), space)
    states = space.configurations()
    marshall = (-1.0) ** np.sum((states > 0) & (lat.sublattice == 1), axis=1)
    w = w * np.sign(w[0] * marshall[0])
    np.testing.assert_allclose(w, marshall * v, atol=1e-8)
    assert np.any(w < 0), "the unrotated ground state does have negative amplitudes"


def test_marshall_basis_needs_bipartite_lattice():
    with pytest.raises(ValueError, match="bipartite"):
        heisenberg(lattices.chain(5), marshall_basis=True)


# --------------------------------------------------------------------------- exact diagonalisation


@pytest.mark.parametrize("J", [1.0, 0.7, 2.5])
def test_four_site_ring_is_minus_two_J(J):
    # H = J Σ S_i·S_{i+1} on the 4-ring = (J/2)(S_tot² − S_A² − S_B²) with A, B the two
    # sublattice pairs; minimum S_tot = 0, S_A = S_B = 1 gives −2J (textbook closed form)
    H = heisenberg(lattices.chain(4), J)
    e0, _ = reference.ground_state(H)
    assert e0 == pytest.approx(-2.0 * J, abs=1e-12)
    e0_sector, _ = reference.ground_state(H, SpinSpace(4, magnetisation=0))
    assert e0_sector == pytest.approx(-2.0 * J, abs=1e-12)


@pytest.mark.parametrize("L", [4, 6, 8, 10, 12, 16])
def test_heisenberg_ring_ed_matches_bethe_ansatz(L):
    # Bethe 1931: ground state of the ring, S^z = 0 sector (where the singlet lives)
    e0, _ = reference.ground_state(heisenberg(lattices.chain(L), 1.0, marshall_basis=True), SpinSpace(L, magnetisation=0))
    assert e0 == pytest.approx(reference.heisenberg_ring_energy(L), rel=1e-10)


def test_heisenberg_ring_full_space_equals_sector():
    # the singlet ground state lies in S^z = 0: the full 2^L space gives the same minimum
    H = heisenberg(lattices.chain(10))
    assert reference.ground_state(H)[0] == pytest.approx(reference.heisenberg_ring_energy(10), rel=1e-10)


@pytest.mark.parametrize("L", [4, 6, 8, 10])
@pytest.mark.parametrize("h", [0.3, 1.0, 2.2])
def test_tfim_ring_ed_matches_free_fermions(L, h):
    # Pfeuty 1970: free-fermion solution of the periodic transverse-field Ising ring (Pauli)
    J = 1.0
    e0, _ = reference.ground_state(transverse_field_ising(lattices.chain(L), J, h))
    assert e0 == pytest.approx(reference.tfim_ring_energy(L, J, h), rel=1e-10)


@pytest.mark.parametrize("L", [6, 8, 10, 12])
def test_xx_ring_matches_free_fermions(L):
    """Lieb, Schultz & Mattis 1961: the XX ring (Δ = 0) is free fermions after Jordan-Wigner.
    H = J Σ (SˣSˣ + SʸSʸ) = (J/2) Σ (c†_i c_{i+1} + h.c.) + boundary term, ε_k = J cos k.
    With N_f = L/2 fermions the boundary condition is periodic for odd N_f and antiperiodic
    for even N_f; the S^z = 0 ground state fills the N_f lowest levels."""
    n_f = L // 2
    shift = 0.0 if n_f % 2 == 1 else 0.5
    k = 2 * np.pi * (np.arange(L) + shift) / L
    expected = np.sort(np.cos(k))[:n_f].sum()
    e0, _ = reference.ground_state(xxz(lattices.chain(L), 1.0, 0.0), SpinSpace(L, magnetisation=0))
    assert e0 == pytest.approx(expected, abs=1e-10)


@pytest.mark.parametrize("L", [8, 10, 12])
def test_majumdar_ghosh_point(L):
    # Majumdar & Ghosh 1969: at J2 = J1/2 the dimer states are exact ground states of the
    # periodic J1-J2 chain with energy −(3/8) J1 per site (even L)
    e0, _ = reference.ground_state(j1j2(lattices.chain(L), 1.0, 0.5), SpinSpace(L, magnetisation=0))
    assert e0 == pytest.approx(-3.0 * L / 8.0, abs=1e-10)


def test_heisenberg_square_4x4():
    # 4×4 periodic Heisenberg: −11.2284832 J total (REFERENCES.md, from memory; confirmed by
    # this ED in the S^z = 0 sector, 12870 states)
    lat = lattices.square(4, 4)
    e0, _ = reference.ground_state(heisenberg(lat, marshall_basis=True), SpinSpace(16, magnetisation=0))
    assert e0 == pytest.approx(-11.2284832, abs=5e-7)


# --------------------------------------------------------------------------- configurations


@settings(max_examples=30)
@given(bad=st.sampled_from([0.0, 0.5, float("nan"), 2.0, float("inf")]), site=st.integers(0, 3))
def test_local_estimates_refuse_configurations_that_are_not_spins(bad, site):
    # 0/1 occupations, 0.5 or nan used to give finite (wrong) local energies
    from psiloom.operators import local_estimates, observables

    ham = heisenberg(lattices.chain(4))
    log_amp = lambda x: 0.1 * x.sum(axis=-1)
    x = np.ones((3, 4))
    x[1, site] = bad
    with pytest.raises(ValueError, match=r"±1; entry \(1, %d\)" % site):
        ham.local_energy(log_amp, x)
    with pytest.raises(ValueError, match="samples must hold spin configurations"):
        observables.measure(log_amp, {"H": ham}, x[None])
    # valid spins pass, also inside jit where the check is skipped
    import jax

    good = np.where(np.arange(12).reshape(3, 4) % 2, 1.0, -1.0)
    expected = local_estimates(log_amp, ham, good)
    np.testing.assert_allclose(jax.jit(lambda y: ham.local_energy(log_amp, y))(good), expected, atol=1e-12)


def test_spin_correlation_components_sum_to_the_full_correlation():
    # S_i·S_j = Σ_a S^a_i S^a_j (textbook); (S^a_i)² = 1/4 for spin 1/2
    from psiloom.operators import spin_correlation_component

    parts = [spin_correlation_component(3, 0, 2, a) for a in ("x", "Y", "z")]
    np.testing.assert_allclose(sum(p.dense_matrix() for p in parts), spin_correlation(3, 0, 2).dense_matrix(), atol=1e-14)
    np.testing.assert_allclose(spin_correlation_component(3, 1, 1, "x").dense_matrix(), 0.25 * np.eye(8), atol=1e-14)
    with pytest.raises(ValueError, match="component must be one of"):
        spin_correlation_component(3, 0, 1, "xy")
    with pytest.raises(ValueError, match="site 5"):
        spin_correlation_component(3, 5, 5, "z")
