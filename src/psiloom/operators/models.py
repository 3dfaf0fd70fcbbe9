"""Builders for standard lattice spin Hamiltonians.

Conventions (stated per builder, since both are in common use):

* :func:`transverse_field_ising` is written with **Pauli** matrices,
  ``H = −J Σ_⟨ij⟩ σᶻ_i σᶻ_j − h Σ_i σˣ_i``.
* :func:`heisenberg`, :func:`xxz` and :func:`j1j2` use **spin-1/2** operators ``S = σ/2``,
  ``H = J Σ_⟨ij⟩ (Sˣ_i Sˣ_j + Sʸ_i Sʸ_j + Δ Sᶻ_i Sᶻ_j)``, i.e. Pauli coefficients ``J/4``.

Marshall sign rule (``marshall_basis=True``, bipartite lattices only): rotating every spin of
sublattice B by π about z, ``U = Π_{i∈B} σᶻ_i``, maps ``Sˣ_iSˣ_j + Sʸ_iSʸ_j → −(…)`` on every
bond joining the two sublattices and leaves all other terms alone. The spectrum is unchanged;
for the unfrustrated antiferromagnet the rotated ground state has non-negative amplitudes.
"""

from __future__ import annotations

import numbers

import numpy as np

from psiloom._validation import boolean, finite_real, one_of
from psiloom.lattices import Lattice
from psiloom.operators.pauli import PauliSum, pauli, total


_real = finite_real


def _lattice(lattice) -> Lattice:
    if not isinstance(lattice, Lattice):
        raise TypeError(f"lattice must be a psiloom Lattice (e.g. chain(6)), got {lattice!r} "
                        f"({type(lattice).__name__})")
    return lattice


def _marshall_flag(marshall_basis) -> bool:
    return boolean("marshall_basis", marshall_basis)


def transverse_field_ising(lattice: Lattice, J: float = 1.0, h: float = 1.0) -> PauliSum:
    """``H = −J Σ_⟨ij⟩ σᶻ_i σᶻ_j − h Σ_i σˣ_i`` (Pauli matrices) on the nearest-neighbour bonds."""
    lattice = _lattice(lattice)
    J, h = _real("J", J), _real("h", h)
    n = lattice.n_sites
    zz = [pauli(n, "ZZ", b, -J) for b in lattice.bonds]
    x = [pauli(n, "X", i, -h) for i in range(n)]
    return total(zz + x, n)


def _exchange_bonds(n: int, bonds, J: float, delta: float, flip_xy: np.ndarray | None) -> list[PauliSum]:
    ops = []
    for k, (i, j) in enumerate(bonds):
        sxy = -1.0 if flip_xy is not None and flip_xy[k] else 1.0
        ops.append(pauli(n, "XX", (i, j), sxy * J / 4))
        ops.append(pauli(n, "YY", (i, j), sxy * J / 4))
        ops.append(pauli(n, "ZZ", (i, j), delta * J / 4))
    return ops


def _marshall(lattice: Lattice, bonds) -> np.ndarray:
    if not lattice.is_bipartite:
        raise ValueError(f"marshall_basis=True needs a bipartite lattice; {lattice!r} is not bipartite")
    sub = lattice.sublattice
    assert sub is not None  # bipartite
    return sub[bonds[:, 0]] != sub[bonds[:, 1]] if len(bonds) else np.zeros(0, bool)


def xxz(lattice: Lattice, J: float = 1.0, delta: float = 1.0, marshall_basis: bool = False) -> PauliSum:
    """``H = J Σ_⟨ij⟩ (Sˣ_iSˣ_j + Sʸ_iSʸ_j + Δ Sᶻ_iSᶻ_j)`` with spin-1/2 operators ``S = σ/2``."""
    lattice, marshall_basis = _lattice(lattice), _marshall_flag(marshall_basis)
    J, delta = _real("J", J), _real("delta", delta)
    bonds = lattice.bonds
    flip = _marshall(lattice, bonds) if marshall_basis else None
    return total(_exchange_bonds(lattice.n_sites, bonds, J, delta, flip), lattice.n_sites)


def heisenberg(lattice: Lattice, J: float = 1.0, marshall_basis: bool = False) -> PauliSum:
    """``H = J Σ_⟨ij⟩ S_i·S_j`` with spin-1/2 operators (the isotropic case Δ = 1 of :func:`xxz`)."""
    return xxz(lattice, J=J, delta=1.0, marshall_basis=marshall_basis)


def j1j2(lattice: Lattice, J1: float = 1.0, J2: float = 0.5, marshall_basis: bool = False) -> PauliSum:
    """``H = J1 Σ_⟨ij⟩ S_i·S_j + J2 Σ_⟨⟨ij⟩⟩ S_i·S_j`` (spin-1/2 operators; nearest and next-nearest
    neighbour bonds of the lattice). ``marshall_basis`` applies the Marshall rotation, which makes
    the J1 part sign-free but *not* the J2 part (next-nearest bonds join the same sublattice)."""
    lattice, marshall_basis = _lattice(lattice), _marshall_flag(marshall_basis)
    J1, J2 = _real("J1", J1), _real("J2", J2)
    n = lattice.n_sites
    nn, nnn = lattice.bonds, lattice.next_bonds
    ops = _exchange_bonds(n, nn, J1, 1.0, _marshall(lattice, nn) if marshall_basis else None)
    ops += _exchange_bonds(n, nnn, J2, 1.0, _marshall(lattice, nnn) if marshall_basis else None)
    return total(ops, n)


def magnetization_z(n_sites: int) -> PauliSum:
    """Total ``Sᶻ = ½ Σ_i σᶻ_i`` (spin units)."""
    return total([pauli(n_sites, "Z", i, 0.5) for i in range(n_sites)], n_sites)


def staggered_magnetization_z(lattice: Lattice) -> PauliSum:
    """``Sᶻ_stag = ½ Σ_i (−1)^{sublattice(i)} σᶻ_i`` on a bipartite lattice (spin units)."""
    lattice = _lattice(lattice)
    if not lattice.is_bipartite:
        raise ValueError(f"staggered magnetisation needs a bipartite lattice; {lattice!r} is not")
    n = lattice.n_sites
    assert lattice.sublattice is not None  # bipartite
    signs = 1 - 2 * lattice.sublattice
    return total([pauli(n, "Z", i, 0.5 * s) for i, s in enumerate(signs)], n)


def spin_correlation(n_sites: int, i: int, j: int) -> PauliSum:
    """``S_i·S_j = ¼ (σˣσˣ + σʸσʸ + σᶻσᶻ)`` (spin units; ``i = j`` gives 3/4)."""
    return total([spin_correlation_component(n_sites, i, j, a) for a in "XYZ"], n_sites)


def spin_correlation_component(n_sites: int, i: int, j: int, component: str) -> PauliSum:
    """``S^a_i S^a_j = ¼ σ^a_i σ^a_j`` for ``component`` a ∈ {"x", "y", "z"} (spin units;
    ``i = j`` gives ``(S^a)² = 1/4``)."""
    letter = one_of("component", str(component).lower() if isinstance(component, str) else component,
                    ("x", "y", "z")).upper()
    if isinstance(i, numbers.Integral) and isinstance(j, numbers.Integral) and i == j:
        pauli(n_sites, letter, i)  # checks n_sites and the site
        return PauliSum.identity(n_sites, 0.25)
    return pauli(n_sites, letter + letter, (i, j), 0.25)
