"""Fermionic symmetry projection: a fermion trial state projected onto a lattice symmetry sector.

A group element ``g`` of a :class:`psiloom.symmetry.SymmetryGroup` moves sites ``i ↦ g(i)``
and, when its ``flip`` is −1, also exchanges the two spins. On fermions it acts by moving
creation operators, ``U_g c†_{iσ} U_g† = c†_{g(i), σ'}`` (``σ' = σ``, or the other spin for a
flip), so on a basis state of the ordering convention (:mod:`psiloom.fermions.space`,
``|n⟩ = Π_p (c†_p)^{n_p} |0⟩`` with the lowest spin-orbital leftmost)

    U_g |n⟩ = s_g(n) |g·n⟩ ,    s_g(n) = ± 1 ,

where ``g·n`` carries each occupation to its image spin-orbital and ``s_g(n)`` is the parity of
the permutation that puts the moved operators back in increasing order:

* within one spin block, ``(−1)^{I}`` with ``I = Σ_{i<j} n_i n_j [g(i) > g(j)]`` the number of
  occupied pairs whose order ``g`` reverses (a quadratic form ``nᵀ A_g n``);
* a spin exchange moves the whole down block in front of the up block: a further
  ``(−1)^{N↑ N↓}``.

For a 1-D real representation ``χ`` (a :class:`psiloom.symmetry.Sector` with characters ±1) the
projection of a base state ψ is

    ψ_χ(n) = (1/|G|) Σ_g χ(g) s_g(n) ψ(g·n) ,

the fermionic form of :class:`psiloom.states.Symmetrized` (same sector convention: the result
obeys ``U_h|ψ_χ⟩ = χ(h)|ψ_χ⟩``). The sum runs in log space through
:func:`psiloom.states.symmetric.log_sum_exp_weighted`, the sign entering as a phase ``iπ``. The Hubbard and
t-V models of :mod:`psiloom.fermions.models` commute with every lattice symmetry that maps the
bond set onto itself (translations of a periodic lattice, its point group) and, with
``N↑ = N↓``, with the spin exchange; their ground state lies in one such sector, so the
projection restores symmetries that a mean-field start (e.g. a Néel determinant) breaks, as in
symmetry-projected variational states of the Hubbard model (e.g. Mizusaki & Imada, PRB 69, 125110
(2004), from memory; Tahara & Imada, JPSJ 77, 114701 (2008), from memory).

Characters must be real (±1): momenta 0 and π, real point irreps, spin parity ±1. Then
ψ_χ is real up to a sign and the state keeps the determinants' ``sign_only_phase``. Cost:
``|G|`` (``2|G|`` with ``spin_parity``) evaluations of the base per configuration; no fast
updates.
"""

from __future__ import annotations

from typing import ClassVar

import flax.linen as nn
import jax.numpy as jnp
import numpy as np

from psiloom.fermions.space import FermionSpace
from psiloom.states.base import TrialState
from psiloom.states.symmetric import log_sum_exp_weighted, projection_elements
from psiloom.symmetry import Sector, SymmetryGroup

__all__ = ["FermionSymmetrized", "fermion_images"]


def _reversal_matrices(perms: np.ndarray) -> np.ndarray:
    """``A[g, i, j] = [i < j and g(i) > g(j)]`` for gather-form permutations ``perms[g, j] = g⁻¹(j)``."""
    dest = np.argsort(perms, axis=1)  # dest[g, i] = g(i)
    m = perms.shape[1]
    upper = np.triu(np.ones((m, m), dtype=bool), k=1)
    return (upper[None] & (dest[:, :, None] > dest[:, None, :])).astype(np.float64)


def fermion_images(space: FermionSpace, perms, flips, x):
    """Images ``g·n`` and signs ``s_g(n)`` of a batch (module docstring).

    Args:
        space: a spinful :class:`~psiloom.fermions.FermionSpace` (spinless: no flips allowed).
        perms: ``(E, M)`` site permutations in gather form, ``perms[g, j] = g⁻¹(j)``.
        flips: ``(E,)`` of ±1; −1 exchanges the spins (needs ``N↑ = N↓``).
        x: ``(B, n_spin_orbitals)`` occupations.
    Returns:
        ``(images (B, E, n_spin_orbitals), signs (B, E) of ±1)`` in x's dtype.
    """
    perms = np.asarray(perms, dtype=np.int64)
    flips = np.asarray(flips, dtype=np.int64)
    m = space.n_orbitals
    a = jnp.asarray(_reversal_matrices(perms), x.dtype)  # (E, M, M)
    blocks = [x[:, :m]] if space.spinless else [x[:, :m], x[:, m:]]
    inversions = sum(jnp.einsum("bi,gij,bj->bg", blk, a, blk) for blk in blocks)
    moved = [blk[:, perms] for blk in blocks]  # each (B, E, M)
    if space.spinless:
        images = moved[0]
    else:
        exchange = jnp.asarray(flips < 0)[None, :, None]
        images = jnp.concatenate([jnp.where(exchange, moved[1], moved[0]),
                                  jnp.where(exchange, moved[0], moved[1])], axis=-1)
        inversions = inversions + jnp.asarray(np.where(flips < 0, space.n_up * space.n_down, 0), x.dtype)[None]
    signs = 1.0 - 2.0 * jnp.mod(jnp.round(inversions), 2.0)
    return images, signs.astype(x.dtype)


class FermionSymmetrized(TrialState):
    """Projection of a fermion trial state onto a real symmetry sector (module docstring).

    Attributes:
        base: a trial state over ``space`` (e.g. a :class:`~psiloom.fermions.BackflowDeterminant`).
        space: the :class:`~psiloom.fermions.FermionSpace`.
        sector: a :class:`psiloom.symmetry.Sector` with characters ±1, or a bare
            :class:`~psiloom.symmetry.SymmetryGroup` (the invariant sector), acting on the
            ``n_orbitals`` sites; elements with ``flip = −1`` exchange the spins.
        spin_parity: ``None``, ``+1`` or ``−1``: also project onto ``U_flip|ψ⟩ = p|ψ⟩`` for the
            exchange of the spins (needs ``N↑ = N↓``; use it when the group has no flips).
    """

    base: nn.Module
    space: FermionSpace
    sector: Sector | SymmetryGroup
    spin_parity: int | None = None
    sign_only_phase: ClassVar[bool] = True

    def _elements(self):
        """``(perms (E, M), flips (E,), characters (E,) real)``: the group's elements, then their
        spin-exchanged copies with ``spin_parity``; checks the attributes."""
        s = self.space
        if not isinstance(s, FermionSpace):
            raise TypeError(f"FermionSymmetrized.space must be a FermionSpace, got {s!r}")
        perms, flips, chi = projection_elements(self.sector, self.spin_parity)
        if np.max(np.abs(np.imag(chi))) > 1e-12:
            raise ValueError("FermionSymmetrized needs real characters (momenta 0 or π, real point irreps); "
                             f"got complex characters {np.round(chi, 6).tolist()}")
        chi = np.real(chi).astype(np.float64)
        if perms.shape[1] != s.n_orbitals:
            raise ValueError(f"the group acts on {perms.shape[1]} sites, the space has {s.n_orbitals} orbitals")
        if np.any(flips < 0) and (s.spinless or s.n_up != s.n_down):
            raise ValueError(f"a spin exchange needs a spinful space with N↑ = N↓, got {s!r}")
        return perms, flips, chi

    def log_amplitude(self, x):
        perms, flips, chi = self._elements()
        b, p = x.shape
        if p != self.space.n_spin_orbitals:
            raise ValueError(f"FermionSymmetrized was built for {self.space.n_spin_orbitals} spin-orbitals, got "
                             f"configurations of {p} (shape {tuple(x.shape)})")
        images, signs = fermion_images(self.space, perms, flips, x)
        e = perms.shape[0]
        logs = self.base(images.reshape(b * e, p)).reshape(b, e)
        logs = logs.astype(jnp.result_type(logs.dtype, jnp.complex64))
        weights = signs * jnp.asarray(chi, x.dtype)[None]  # ±1 per term
        logs = logs + jnp.where(weights < 0, 1j * jnp.pi, 0.0)
        return log_sum_exp_weighted(logs, axis=1) - np.log(e)
