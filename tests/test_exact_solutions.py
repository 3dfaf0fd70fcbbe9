"""Checks of psiloom.reference against an independent exact diagonalisation and known limits.

The dense / sparse exact diagonalisation below is built here from Kronecker products of
Pauli matrices and shares no code with the module under test.
"""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from hypothesis import given, settings
from hypothesis import strategies as st

from psiloom.reference import (
    HULTHEN_ENERGY_PER_SITE,
    heisenberg_ring_energy,
    heisenberg_ring_rapidities,
    tfim_ring_energy,
    tfim_ring_energy_per_site_infinite,
)

# ---------------------------------------------------------------------------------------
# Independent exact diagonalisation (periodic rings, Pauli matrices).
# ---------------------------------------------------------------------------------------

_ID = sp.identity(2, format="csr", dtype=float)
_SX = sp.csr_matrix(np.array([[0.0, 1.0], [1.0, 0.0]]))
_SZ = sp.csr_matrix(np.array([[1.0, 0.0], [0.0, -1.0]]))
_SP = sp.csr_matrix(np.array([[0.0, 1.0], [0.0, 0.0]]))  # σ⁺ = (σˣ + iσʸ)/2
_SM = sp.csr_matrix(np.array([[0.0, 0.0], [1.0, 0.0]]))  # σ⁻ = (σˣ − iσʸ)/2


def _site_op(ops: dict[int, sp.csr_matrix], n: int) -> sp.csr_matrix:
    """Kronecker product with ``ops[i]`` on site i and the identity elsewhere."""
    out = sp.csr_matrix(np.ones((1, 1)))
    for i in range(n):
        out = sp.kron(out, ops.get(i, _ID), format="csr")
    return out


def _pair(a: sp.csr_matrix, b: sp.csr_matrix, i: int, j: int, n: int) -> sp.csr_matrix:
    if i == j:
        raise AssertionError("bond with itself")
    return _site_op({i: a, j: b}, n)


def _ground_energy(H: sp.csr_matrix) -> float:
    if H.shape[0] <= 512:
        return float(np.linalg.eigvalsh(H.toarray())[0])
    vals = spla.eigsh(H, k=1, which="SA", tol=1e-14, return_eigenvectors=False)
    return float(vals[0])


@functools.lru_cache(maxsize=None)
def _ed_tfim(n: int, J: float, h: float) -> float:
    """−J Σ σᶻ_i σᶻ_{i+1} − h Σ σˣ_i on a ring (the 2-site ring counts its bond twice)."""
    dim = 2**n
    H = sp.csr_matrix((dim, dim))
    for i in range(n):
        H = H - J * _pair(_SZ, _SZ, i, (i + 1) % n, n) - h * _site_op({i: _SX}, n)
    return _ground_energy(H)


@functools.lru_cache(maxsize=None)
def _ed_heisenberg(n: int, J: float) -> float:
    """J Σ S_i·S_{i+1} with S = σ/2: S·S = ¼ σᶻσᶻ + ½ (σ⁺σ⁻ + σ⁻σ⁺)."""
    dim = 2**n
    H = sp.csr_matrix((dim, dim))
    for i in range(n):
        j = (i + 1) % n
        H = H + J * (
            0.25 * _pair(_SZ, _SZ, i, j, n)
            + 0.5 * (_pair(_SP, _SM, i, j, n) + _pair(_SM, _SP, i, j, n))
        )
    return _ground_energy(H)


def test_ed_helper_sanity():
    # The 2-site TFIM ring at h = 0 is a double bond, E = −2|J| (trivial); two spins 1/2 in
    # a singlet have S_1·S_2 = −3/4 (textbook).
    assert _ed_tfim(2, 1.0, 0.0) == pytest.approx(-2.0, abs=1e-12)
    flip = _pair(_SP, _SM, 0, 1, 2) + _pair(_SM, _SP, 0, 1, 2)
    H = 0.25 * _pair(_SZ, _SZ, 0, 1, 2) + 0.5 * flip
    assert _ground_energy(H) == pytest.approx(-0.75, abs=1e-12)  # singlet, textbook


# ---------------------------------------------------------------------------------------
# Transverse-field Ising ring.
# ---------------------------------------------------------------------------------------

_TFIM_COUPLINGS = [(1.0, 1.0), (1.0, 0.5), (1.0, 2.0), (0.7, -1.3), (-1.0, 0.5), (2.0, 0.0)]


@pytest.mark.parametrize("n", [2, 4, 6, 8, 10])
@pytest.mark.parametrize("J,h", _TFIM_COUPLINGS)
def test_tfim_matches_exact_diagonalisation(n, J, h):
    # Free-fermion solution (Pfeuty 1970) against brute-force ED.
    assert tfim_ring_energy(n, J, h) == pytest.approx(_ed_tfim(n, J, h), abs=1e-10)


@pytest.mark.parametrize("J,h", [(1.0, 1.0), (1.0, 0.5), (1.0, 2.0), (0.3, 1.0)])
def test_tfim_large_ring_approaches_infinite_chain(J, h):
    # Energy per site converges to the integral formula (Pfeuty 1970). Away from h = J the
    # gap makes the approach exponentially fast; at h = J the conformal correction is
    # −π v c / (6 L²) with v = 2J, c = 1/2 (Blöte, Cardy & Nightingale 1986; from memory).
    e_inf = tfim_ring_energy_per_site_infinite(J, h)
    errs = [abs(tfim_ring_energy(n, J, h) / n - e_inf) for n in (100, 400, 2000)]
    assert errs[2] < 1e-6
    assert errs[0] >= errs[1] >= errs[2]
    if J == h:
        n = 2000
        correction = tfim_ring_energy(n, J, h) / n - e_inf
        assert correction == pytest.approx(-math.pi * 2 * J * 0.5 / (6 * n**2), rel=1e-3)


def test_tfim_infinite_chain_known_values():
    # At the critical point h = J the energy per site is −4J/π (Pfeuty 1970; from memory).
    assert tfim_ring_energy_per_site_infinite(1.0, 1.0) == pytest.approx(-4 / math.pi, rel=1e-12)
    assert tfim_ring_energy_per_site_infinite(2.5, 2.5) == pytest.approx(-10 / math.pi, rel=1e-12)
    # Classical limits: h = 0 gives −|J|, J = 0 gives −|h| (trivial product states).
    assert tfim_ring_energy_per_site_infinite(1.0, 0.0) == pytest.approx(-1.0, rel=1e-12)
    assert tfim_ring_energy_per_site_infinite(0.0, -3.0) == pytest.approx(-3.0, rel=1e-12)


@settings(max_examples=60, deadline=None)
@given(
    n=st.integers(min_value=1, max_value=40).map(lambda m: 2 * m),
    J=st.floats(min_value=-5, max_value=5, allow_nan=False),
    h=st.floats(min_value=-5, max_value=5, allow_nan=False),
)
def test_tfim_sign_symmetries(n, J, h):
    # h → −h: global rotation Π σᶻ; J → −J on even rings: σˣ rotation of one sublattice
    # (unitary equivalences, common practice).
    e = tfim_ring_energy(n, J, h)
    scale = 1.0 + abs(e)
    assert tfim_ring_energy(n, J, -h) == pytest.approx(e, abs=1e-12 * scale)
    assert tfim_ring_energy(n, -J, h) == pytest.approx(e, abs=1e-12 * scale)
    assert tfim_ring_energy(n, -J, -h) == pytest.approx(e, abs=1e-12 * scale)
    # Homogeneity: H is linear in (J, h).
    assert tfim_ring_energy(n, 3 * J, 3 * h) == pytest.approx(3 * e, abs=1e-12 * scale)


def test_tfim_accepts_numpy_integers():
    assert tfim_ring_energy(np.int64(6), 1.0, 1.0) == tfim_ring_energy(6, 1.0, 1.0)


# ---------------------------------------------------------------------------------------
# Heisenberg ring (Bethe ansatz).
# ---------------------------------------------------------------------------------------


@pytest.mark.parametrize("n", [4, 6, 8, 10, 12])
def test_heisenberg_matches_exact_diagonalisation(n):
    # Bethe ansatz (Bethe 1931) against brute-force ED.
    assert heisenberg_ring_energy(n) == pytest.approx(_ed_heisenberg(n, 1.0), abs=1e-9)


def test_heisenberg_matches_ed_other_coupling():
    assert heisenberg_ring_energy(8, J=0.37) == pytest.approx(_ed_heisenberg(8, 0.37), abs=1e-9)


@pytest.mark.parametrize("J", [1.0, 0.5, 3.0])
def test_heisenberg_four_sites_closed_form(J):
    # Four-site ring: E = −2J (textbook closed form), from λ = ±1/(2√3).
    assert heisenberg_ring_energy(4, J) == pytest.approx(-2.0 * J, abs=1e-14)
    lam = heisenberg_ring_rapidities(4)
    np.testing.assert_allclose(lam, [-1 / (2 * math.sqrt(3)), 1 / (2 * math.sqrt(3))], atol=1e-14)


@pytest.mark.parametrize("n", [4, 10, 50, 200])
def test_heisenberg_rapidities_solve_bethe_equations(n):
    # Re-check the logarithmic Bethe equations (Bethe 1931) directly:
    # L·2·atan(2λ_j) = 2π I_j + Σ_{k≠j} 2·atan(λ_j − λ_k), I_j = −(M−1)/2 … (M−1)/2.
    lam = heisenberg_ring_rapidities(n)
    m = n // 2
    assert lam.shape == (m,)
    assert np.all(np.diff(lam) > 0)
    np.testing.assert_allclose(lam, -lam[::-1], atol=1e-12)  # ground state is parity symmetric
    quantum = np.arange(m) - (m - 1) / 2
    lhs = n * 2 * np.arctan(2 * lam)
    rhs = 2 * np.pi * quantum + 2 * np.arctan(lam[:, None] - lam[None, :]).sum(axis=1)
    np.testing.assert_allclose(lhs, rhs, atol=1e-9)
    energy = n / 4 - np.sum(2 / (4 * lam**2 + 1))
    assert heisenberg_ring_energy(n) == pytest.approx(energy, abs=1e-12)


def test_heisenberg_large_ring_approaches_hulthen():
    # Hulthén 1938: e∞ = 1/4 − ln 2. Finite rings lie below, with the conformal correction
    # ≈ −π² J / (12 L²) up to logarithmic terms (Affleck 1986; from memory).
    assert HULTHEN_ENERGY_PER_SITE == pytest.approx(0.25 - math.log(2), abs=0)
    diffs = {n: heisenberg_ring_energy(n) / n - HULTHEN_ENERGY_PER_SITE for n in (50, 200, 1000)}
    assert abs(diffs[1000]) < 1e-5
    assert all(d < 0 for d in diffs.values())
    assert abs(diffs[50]) > abs(diffs[200]) > abs(diffs[1000])
    ratio = diffs[1000] / (-(math.pi**2) / (12 * 1000**2))
    assert 0.9 < ratio < 1.2


@pytest.mark.parametrize("n", [4, 6, 12, 100])
def test_heisenberg_linear_in_J(n):
    e1 = heisenberg_ring_energy(n, J=1.0)
    assert heisenberg_ring_energy(n, J=2.0) == pytest.approx(2 * e1, rel=1e-14)
    assert heisenberg_ring_energy(n, J=0.0) == 0.0


def test_heisenberg_rejects_ferromagnetic_coupling():
    with pytest.raises(ValueError, match="-1.5"):
        heisenberg_ring_energy(6, J=-1.5)


# ---------------------------------------------------------------------------------------
# Input validation.
# ---------------------------------------------------------------------------------------

_odd = st.integers(min_value=-51, max_value=51).filter(lambda m: m % 2 == 1)
_non_integer = st.one_of(
    st.floats(min_value=-100, max_value=100, allow_nan=False).filter(lambda x: x != int(x)),
    st.sampled_from(["4", None, 6.0, True]),
)


def _assert_rejects(func, bad):
    with pytest.raises(ValueError) as info:
        func(bad)
    assert repr(bad) in str(info.value)


@settings(max_examples=40, deadline=None)
@given(bad=st.one_of(_odd, st.integers(max_value=1), _non_integer))
def test_tfim_rejects_bad_sizes(bad):
    _assert_rejects(tfim_ring_energy, bad)


@settings(max_examples=40, deadline=None)
@given(bad=st.one_of(_odd, st.integers(max_value=3), _non_integer))
def test_heisenberg_rejects_bad_sizes(bad):
    _assert_rejects(heisenberg_ring_energy, bad)
    _assert_rejects(heisenberg_ring_rapidities, bad)


def test_odd_size_message_explains_why():
    with pytest.raises(ValueError, match="even"):
        tfim_ring_energy(5)
    with pytest.raises(ValueError, match="even"):
        heisenberg_ring_energy(7)
    with pytest.raises(ValueError, match="twice"):
        heisenberg_ring_energy(2)


# --------------------------------------------------------------------------- state vectors and expectations


def _singlet_log_amplitude(x):
    """Two-site singlet (|↑↓⟩ − |↓↑⟩)/√2 as a complex log ψ (−inf on the triplet states ↑↑, ↓↓)."""
    import jax.numpy as jnp

    up_down = (x[:, 0] > 0) & (x[:, 1] < 0)
    down_up = (x[:, 0] < 0) & (x[:, 1] > 0)
    return jnp.where(up_down, 0.0 + 0j, jnp.where(down_up, 1j * jnp.pi, -jnp.inf + 0j))


def test_two_site_singlet_by_enumeration():
    # textbook: in the singlet S_1·S_2 = [S(S+1) − 2·(3/4)]/2 = −3/4, ⟨S^z_1 S^z_2⟩ = −1/4
    # and ⟨S^z_1⟩ = 0; the vector is (|↑↓⟩ − |↓↑⟩)/√2 up to a global phase
    from psiloom.reference import expectation, fidelity, state_vector
    from psiloom.operators import pauli, spin_correlation
    from psiloom.spaces import SpinSpace

    space = SpinSpace(2)
    v = state_vector(_singlet_log_amplitude, space)
    assert np.linalg.norm(v) == pytest.approx(1.0, abs=1e-14)
    reference = np.array([0.0, 1.0, -1.0, 0.0]) / math.sqrt(2)  # basis ↓↓, ↓↑, ↑↓, ↑↑ (codes 0..3)
    assert fidelity(v, reference) == pytest.approx(1.0, abs=1e-14)
    assert expectation(spin_correlation(2, 0, 1), v) == pytest.approx(-0.75, abs=1e-14)
    assert expectation(pauli(2, "ZZ", (0, 1), 0.25), v) == pytest.approx(-0.25, abs=1e-14)
    assert expectation(pauli(2, "Z", 0, 0.5), v) == pytest.approx(0.0, abs=1e-14)
    # the same from a sparse matrix, and in the Sᶻ = 0 sector (basis ↓↑, ↑↓)
    assert expectation(spin_correlation(2, 0, 1).sparse_matrix(), v) == pytest.approx(-0.75, abs=1e-14)
    sector = SpinSpace(2, magnetisation=0)
    w = state_vector(_singlet_log_amplitude, sector)
    assert expectation(spin_correlation(2, 0, 1), w, sector) == pytest.approx(-0.75, abs=1e-14)
    # a non-Hermitian operator gives a complex value: S⁺_0 S⁻_1 with S^± = (σˣ ± iσʸ)/2 maps
    # |↓↑⟩ to |↑↓⟩, so ⟨S⁺_0 S⁻_1⟩ = conj(v_↑↓) v_↓↑ = −1/2 (textbook)
    raising = (pauli(2, "X", 0) + 1j * pauli(2, "Y", 0)) * (pauli(2, "X", 1) - 1j * pauli(2, "Y", 1)) / 4
    assert isinstance(expectation(raising, v), complex)
    assert expectation(raising, v) == pytest.approx(-0.5, abs=1e-14)


def test_expectation_matches_scipy_on_a_random_complex_state():
    # a random complex trial state on 4 sites: the enumerated vector reproduces exp(log ψ)
    # normalised, and ⟨H⟩ equals v† H v from scipy.sparse; the ED ground state gives E0 (eigsh)
    import jax.numpy as jnp

    from psiloom.reference import expectation, ground_state, state_vector
    from psiloom.lattices import chain
    from psiloom.operators import heisenberg
    from psiloom.spaces import SpinSpace

    rng = np.random.default_rng(3)
    weights = rng.standard_normal(4) + 1j * rng.standard_normal(4)
    log_amp = lambda x: jnp.asarray(x) @ jnp.asarray(weights) * 0.3
    space = SpinSpace(4)
    v = state_vector(log_amp, space)
    direct = np.exp(space.configurations() @ weights * 0.3)
    direct /= np.linalg.norm(direct)
    np.testing.assert_allclose(v, direct, atol=1e-13)
    ham = heisenberg(chain(4))
    mat = ham.sparse_matrix(space)
    assert expectation(ham, v) == pytest.approx(float(np.real(v.conj() @ (mat @ v))), abs=1e-13)
    e0 = spla.eigsh(sp.csr_matrix(mat), k=1, which="SA", return_eigenvectors=False)[0]
    assert expectation(ham, ground_state(ham)[1]) == pytest.approx(e0, abs=1e-10)


def test_state_vector_and_expectation_reject_bad_input():
    from psiloom.reference import expectation, state_vector
    from psiloom.operators import pauli
    from psiloom.spaces import SpinSpace

    import jax.numpy as jnp

    with pytest.raises(ValueError, match="vanishes"):
        state_vector(lambda x: jnp.full(x.shape[0], -jnp.inf), SpinSpace(2))
    with pytest.raises(ValueError, match="nan"):
        state_vector(lambda x: jnp.full(x.shape[0], jnp.nan), SpinSpace(2))
    with pytest.raises(ValueError, match="4 states"):
        expectation(pauli(2, "Z", 0), np.ones(3))
    with pytest.raises(TypeError, match="operator"):
        expectation("H", np.ones(4))


def test_one_diagonaliser_serves_dense_lanczos_and_sectors():
    # the dense solver (≤ DENSE_LIMIT states) and Lanczos (above) agree with the Bethe ansatz
    # (Bethe 1931) on rings of 8 (70 states in Sᶻ = 0) and 12 (924 states); the k = 0 sector
    # of the 8-ring, through the same switch, holds the ground state (L/2 even, from memory)
    from psiloom import reference, symmetry
    from psiloom.lattices import chain
    from psiloom.operators import heisenberg
    from psiloom.spaces import SpinSpace

    for n in (8, 12):
        space = SpinSpace(n, magnetisation=0)
        assert (space.size <= reference.DENSE_LIMIT) == (n == 8)
        e0, _ = reference.ground_state(heisenberg(chain(n)), space)
        assert e0 == pytest.approx(reference.heisenberg_ring_energy(n), abs=1e-9)
    ring = chain(8)
    sec = symmetry.sector(symmetry.translations(ring), (0.0,))
    e_sec, vec = reference.ground_state(heisenberg(ring), SpinSpace(8, magnetisation=0), sector=sec)
    assert e_sec == pytest.approx(reference.heisenberg_ring_energy(8), abs=1e-10)
    assert reference.expectation(heisenberg(ring), vec, SpinSpace(8, magnetisation=0)) == pytest.approx(e_sec, abs=1e-10)


def test_lowest_eigenpairs_of_a_matrix_and_bad_input():
    # a sparse matrix in the basis of the space is diagonalised like the operator it came from
    from psiloom import reference
    from psiloom.lattices import chain
    from psiloom.operators import heisenberg

    ham = heisenberg(chain(4))
    vals, _ = reference.lowest_eigenpairs(ham.sparse_matrix(), k=2)
    np.testing.assert_allclose(vals, np.linalg.eigvalsh(ham.dense_matrix())[:2], atol=1e-12)
    assert vals[0] == pytest.approx(-2.0, abs=1e-12)  # 4-site ring: −2J (Bethe 1931, L = 4)
    with pytest.raises(ValueError, match="Hermitian"):
        reference.lowest_eigenpairs(sp.csr_matrix(np.array([[0.0, 1.0], [0.0, 0.0]])))
    with pytest.raises(ValueError, match="k must be a positive integer"):
        reference.lowest_eigenpairs(ham, k=0)
    with pytest.raises(ValueError, match="k=17"):
        reference.lowest_eigenpairs(ham, k=17)
