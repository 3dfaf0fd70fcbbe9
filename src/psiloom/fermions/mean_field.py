"""Unrestricted Hartree-Fock for Hubbard-type models: orbitals to start a determinant from.

For H = Σ_σ Σ_ij h_ij c†_iσ c_jσ + U Σ_i n_i↑ n_i↓ (energies in units of the hopping), the
unrestricted mean field replaces n_i↑ n_i↓ by ⟨n_i↑⟩ n_i↓ + n_i↑ ⟨n_i↓⟩ − ⟨n_i↑⟩⟨n_i↓⟩, so each spin
sees the one-body matrix

    h_σ = h + U · diag(⟨n_{i,−σ}⟩),

and its N_σ lowest eigenvectors are the occupied orbitals. The densities are iterated to
self-consistency with linear mixing, ⟨n⟩ ← (1 − a)⟨n⟩ + a ⟨n⟩_new. The energy of the
determinant is

    E = Σ_σ tr(Φσᵀ h Φσ) + U Σ_i ⟨n_i↑⟩⟨n_i↓⟩,

which is exactly ⟨Φ|H|Φ⟩ (Wick's theorem; the on-site term has no exchange part between
opposite spins). The iteration starts from ⟨n_iσ⟩ = N_σ/M ± ``polarisation``·p_i, with p_i = +1
on one sublattice and −1 on the other by default (Néel order on a bipartite lattice), so on the
half-filled chain and square lattice the iteration finds the antiferromagnetic solution when U
exceeds its instability (any U > 0 for the perfectly nested 1D and 2D bands, weakly at small U).

Why it matters: with periodic boundaries the U = 0 Fermi level of the 4n-site ring and of the 4×4
square lattice at half filling is degenerate (an open shell), and a restricted determinant picks an
arbitrary real combination of the degenerate orbitals. A backflow determinant started there stalls
far from the ground state (8-site ring, U = 4: 14 % above ED after 150 exact-sum steps), while one
started at the unrestricted solution goes on down (1 % after the same steps). Textbook check: on
two sites with hopping t and U > 2t the broken-symmetry solution has E = −2t²/U (from memory; the
minimal-basis H₂ model of quantum-chemistry textbooks).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from psiloom._validation import finite_real, positive_int
from psiloom.fermions.determinants import OrbitalGuess
from psiloom.fermions.space import FermionSpace


class MeanFieldResult(NamedTuple):
    """``guess`` (orbitals for a determinant state), ``energy`` (⟨Φ|H|Φ⟩, units of h), the
    densities ``n_up`` and ``n_down`` (M,), ``iterations`` and ``converged`` (largest density change
    ≤ ``tol``)."""

    guess: OrbitalGuess
    energy: float
    n_up: np.ndarray
    n_down: np.ndarray
    iterations: int
    converged: bool


def hubbard_mean_field(space: FermionSpace, one_body, U: float, *, pattern=None, polarisation: float = 0.3,
                       mixing: float = 0.5, max_iter: int = 5000, tol: float = 1e-10) -> MeanFieldResult:
    """Unrestricted Hartree-Fock of a Hubbard model (module docstring).

    Args:
        space: the sector (``n_orbitals`` = sites; not spinless).
        one_body: real symmetric (M, M) one-body matrix h, e.g. :func:`~psiloom.fermions.one_body_matrix`.
        U: on-site repulsion (finite real).
        pattern: (M,) real starting spin pattern p_i (e.g. a lattice's ``2·sublattice − 1``);
            default alternating +1, −1 by site index (Néel on a chain; pass the sublattice for
            lattices with an even number of sites per row).
        polarisation: starting amplitude of ⟨n↑⟩ − ⟨n↓⟩ = 2·polarisation·p_i (≥ 0; 0 starts
            paramagnetic and stays there).
        mixing: weight a ∈ (0, 1] of the new densities.
        max_iter, tol: iteration limit and convergence threshold on the densities.
    """
    if not isinstance(space, FermionSpace) or space.spinless:
        raise TypeError(f"hubbard_mean_field needs a spinful FermionSpace, got {space!r}")
    m = space.n_orbitals
    h = np.asarray(one_body)
    if h.shape != (m, m) or not np.isrealobj(h) or not np.all(np.isfinite(h)) or not np.allclose(h, h.T):
        raise ValueError(f"one_body must be a finite real symmetric ({m}, {m}) matrix, got shape {h.shape} "
                         f"dtype {h.dtype}")
    h = h.astype(np.float64)
    U = finite_real("U", U)
    polarisation = finite_real("polarisation", polarisation, minimum=0.0)
    mixing = finite_real("mixing", mixing)
    if not 0.0 < mixing <= 1.0:
        raise ValueError(f"mixing must lie in (0, 1], got {mixing}")
    max_iter = positive_int("max_iter", max_iter)
    tol = finite_real("tol", tol, minimum=0.0)
    p = np.array([(-1.0) ** i for i in range(m)]) if pattern is None else np.asarray(pattern, dtype=np.float64)
    if p.shape != (m,) or not np.all(np.isfinite(p)):
        raise ValueError(f"pattern must be {m} finite numbers, got shape {p.shape}")
    n_up = np.full(m, space.n_up / m) + polarisation * p
    n_dn = np.full(m, space.n_down / m) - polarisation * p

    def occupied(n_other, count):
        _, vectors = np.linalg.eigh(h + U * np.diag(n_other))
        return vectors[:, :count]

    converged, iterations = False, 0
    for iterations in range(1, max_iter + 1):
        phi_up, phi_dn = occupied(n_dn, space.n_up), occupied(n_up, space.n_down)
        new_up, new_dn = (phi_up ** 2).sum(axis=1), (phi_dn ** 2).sum(axis=1)
        change = max(np.max(np.abs(new_up - n_up)), np.max(np.abs(new_dn - n_dn)))
        n_up, n_dn = (1 - mixing) * n_up + mixing * new_up, (1 - mixing) * n_dn + mixing * new_dn
        if change <= tol:
            converged = True
            break
    phi_up, phi_dn = occupied(n_dn, space.n_up), occupied(n_up, space.n_down)
    n_up, n_dn = (phi_up ** 2).sum(axis=1), (phi_dn ** 2).sum(axis=1)
    energy = float(np.trace(phi_up.T @ h @ phi_up) + np.trace(phi_dn.T @ h @ phi_dn) + U * np.dot(n_up, n_dn))
    return MeanFieldResult(OrbitalGuess.from_arrays(space, phi_up, phi_dn), energy, n_up, n_dn, iterations,
                           converged)
