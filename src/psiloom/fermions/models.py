"""Lattice models of electrons: the Hubbard model and spinless fermions with a t-V interaction.

Hubbard (Hubbard 1963), on ``n_sites`` sites with spin-orbitals ``p = σ·n_sites + i``:

    H = −t Σ_{⟨ij⟩,σ} (c†_iσ c_jσ + c†_jσ c_iσ) − t' Σ_{⟨⟨ij⟩⟩,σ} (c†_iσ c_jσ + h.c.)
        + U Σ_i n_i↑ n_i↓ − μ Σ_{iσ} n_iσ,

with ``bonds`` the nearest-neighbour pairs ⟨ij⟩ (e.g. ``lattice.bonds``) and ``next_bonds`` the
pairs ⟨⟨ij⟩⟩ (e.g. ``lattice.next_bonds``). Spinless t-V model:

    H = −t Σ_{⟨ij⟩} (c†_i c_j + c†_j c_i) + V Σ_{⟨ij⟩} n_i n_j − μ Σ_i n_i.

Energies are in units of whatever t is given in. A bond listed twice counts twice (as in
:func:`psiloom.operators.heisenberg`); a bond from a site to itself is refused.
"""

from __future__ import annotations

import numpy as np

from psiloom._validation import finite_real, positive_int
from psiloom.fermions.operators import FermionOperator, Term


def _pairs(bonds, n_sites: int, what: str) -> list[tuple[int, int]]:
    arr = np.asarray(bonds if bonds is not None else np.zeros((0, 2)))
    if arr.size == 0:
        return []
    if arr.dtype == bool or not (np.issubdtype(arr.dtype, np.integer)
                                 or (np.issubdtype(arr.dtype, np.floating) and np.all(arr == np.round(arr)))):
        raise ValueError(f"{what} must be pairs of integer site indices, got {bonds!r}")
    if arr.ndim != 2 or arr.shape[1] != 2:
        raise ValueError(f"{what} must have shape (n_bonds, 2), got {arr.shape}")
    arr = arr.astype(np.int64)
    bad = arr[np.any((arr < 0) | (arr >= n_sites), axis=1)]
    if len(bad):
        raise ValueError(f"{what} {bad.tolist()} name sites outside 0 … {n_sites - 1}")
    same = arr[arr[:, 0] == arr[:, 1]]
    if len(same):
        raise ValueError(f"{what} {same.tolist()} join a site to itself")
    return [(int(i), int(j)) for i, j in arr]


def _sites_and_bonds(lattice, n_sites, bonds, next_bonds):
    if lattice is not None:
        n_sites = lattice.n_sites if n_sites is None else n_sites
        bonds = lattice.bonds if bonds is None else bonds
        next_bonds = lattice.next_bonds if next_bonds is None else next_bonds
    if n_sites is None:
        raise ValueError("give a lattice or n_sites")
    n_sites = positive_int("n_sites", n_sites)
    return n_sites, _pairs(bonds, n_sites, "bonds"), _pairs(next_bonds, n_sites, "next_bonds")


def _hop(terms: dict, i: int, j: int, amplitude: float) -> None:
    for a, b in ((i, j), (j, i)):
        key: Term = ((a, 1), (b, 0))
        terms[key] = terms.get(key, 0.0) - amplitude


def hubbard(lattice=None, t: float = 1.0, U: float = 4.0, t_next: float = 0.0, mu: float = 0.0, *,
            n_sites: int | None = None, bonds=None, next_bonds=None) -> FermionOperator:
    """The Hubbard Hamiltonian (module docstring) on ``lattice`` (its ``bonds``, and its
    ``next_bonds`` when ``t_next ≠ 0``) or on ``n_sites`` sites with explicit ``bonds``.

    ``t``, ``U``, ``t_next`` (t'), ``mu`` (μ) are finite reals. Returns a
    :class:`~psiloom.fermions.FermionOperator` on ``n_sites`` orbitals (2·n_sites spin-orbitals).
    """
    n, nn, nnn = _sites_and_bonds(lattice, n_sites, bonds, next_bonds)
    t, U = finite_real("t", t), finite_real("U", U)
    t_next, mu = finite_real("t_next", t_next), finite_real("mu", mu)
    terms: dict = {}
    for spin in (0, 1):
        off = spin * n
        for i, j in nn:
            _hop(terms, i + off, j + off, t)
        if t_next:
            for i, j in nnn:
                _hop(terms, i + off, j + off, t_next)
        if mu:
            for i in range(n):
                terms[((i + off, 1), (i + off, 0))] = -mu
    if U:
        for i in range(n):
            terms[((i, 1), (i, 0), (i + n, 1), (i + n, 0))] = U
    return FermionOperator(n, terms)


def spinless_tv(lattice=None, t: float = 1.0, V: float = 1.0, mu: float = 0.0, *, n_sites: int | None = None,
                bonds=None) -> FermionOperator:
    """The spinless t-V Hamiltonian (module docstring) on ``lattice.bonds`` or explicit ``bonds``."""
    n, nn, _ = _sites_and_bonds(lattice, n_sites, bonds, [])
    t, V, mu = finite_real("t", t), finite_real("V", V), finite_real("mu", mu)
    terms: dict = {}
    for i, j in nn:
        _hop(terms, i, j, t)
        if V:
            key = ((i, 1), (i, 0), (j, 1), (j, 0))
            terms[key] = terms.get(key, 0.0) + V
    if mu:
        for i in range(n):
            terms[((i, 1), (i, 0))] = -mu
    return FermionOperator(n, terms, spinless=True)


def one_body_matrix(operator: FermionOperator, spin: int = 0) -> np.ndarray:
    """The ``(n_orbitals, n_orbitals)`` matrix h of the quadratic terms Σ h_ij c†_iσ c_jσ of
    ``operator`` for one spin (used for U = 0 orbitals and free-fermion energies)."""
    m = operator.n_orbitals
    h = np.zeros((m, m), dtype=np.complex128)
    off = spin * m
    for term, c in operator.terms.items():
        if len(term) == 2 and term[0][1] == 1 and term[1][1] == 0:
            p, q = term[0][0] - off, term[1][0] - off
            if 0 <= p < m and 0 <= q < m:
                h[p, q] += c
    return h.real if np.allclose(h.imag, 0) else h
