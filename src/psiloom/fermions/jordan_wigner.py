"""The Jordan-Wigner map from fermionic operators to Pauli sums (a cross-check of the signs).

With an occupied spin-orbital p represented by σᶻ_p = +1 (occupation n_p = (1 + σᶻ_p)/2, so that
:func:`psiloom.spaces.codes` of ``2n − 1`` is the occupation code of
:mod:`psiloom.fermions.space`) and the basis ordering of that module,

    c_p  = Π_{q<p} (−σᶻ_q) · (σˣ_p − iσʸ_p)/2,      c†_p = Π_{q<p} (−σᶻ_q) · (σˣ_p + iσʸ_p)/2,

since (−1)^{n_q} = −σᶻ_q and (σˣ − iσʸ)/2 lowers σᶻ = +1 to −1 (Jordan & Wigner 1928).
"""

from __future__ import annotations

from psiloom.fermions.operators import CREATE, FermionOperator
from psiloom.operators.pauli import PauliSum, pauli


def ladder_pauli(n_modes: int, p: int, dagger: int) -> PauliSum:
    """The Pauli sum of c†_p (``dagger=1``) or c_p (``dagger=0``) on ``n_modes`` spin-orbitals."""
    op = 0.5 * pauli(n_modes, "X", p) + (0.5j if dagger == CREATE else -0.5j) * pauli(n_modes, "Y", p)
    for q in range(p):
        op = pauli(n_modes, "Z", q, -1.0) * op
    return op


def jordan_wigner(operator: FermionOperator) -> PauliSum:
    """The :class:`~psiloom.operators.PauliSum` of ``operator`` on its ``n_spin_orbitals`` sites."""
    if not isinstance(operator, FermionOperator):
        raise TypeError(f"jordan_wigner needs a FermionOperator, got {type(operator).__name__}")
    n = operator.n_spin_orbitals
    total = PauliSum(n)
    for term, coef in operator.terms.items():
        product = PauliSum.identity(n, coef)
        for p, d in term:
            product = product * ladder_pauli(n, p, d)
        total = total + product
    return total
