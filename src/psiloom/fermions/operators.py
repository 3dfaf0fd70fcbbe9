"""Fermionic operators: sums of products of creation and annihilation operators.

    O = Σ_t c_t  a_{t,1} a_{t,2} ⋯ a_{t,k},     a ∈ {c†_p, c_p},  p a spin-orbital index

(ordering and sign convention: :mod:`psiloom.fermions.space`). Terms are kept normal-ordered
in one canonical form — creators left of annihilators, creators in increasing and annihilators
in decreasing spin-orbital order — obtained with the canonical anticommutation relations
{c_p, c†_q} = δ_pq, {c_p, c_q} = {c†_p, c†_q} = 0, so equal operators have equal terms and the
hermitian conjugate of a canonical term is canonical.

Matrix elements (how the jit-compatible connections are built). A product P of ladder
operators maps an occupation basis state |n⟩ to ±|n'⟩ or to zero. Grouping P's factors by
spin-orbital (a stable sort, sign (−1)^{inversions between different spin-orbitals}), each
spin-orbital's group is either bosonic (even length: n_p or 1 − n_p, or zero) or acts as one
c_p / c†_p (odd length). Hence ``P|n⟩ ≠ 0`` iff the occupations at a fixed set of spin-orbitals
take fixed values, the spin-orbitals with odd groups are flipped, and the sign is

    (−1)^{inversions} · Π_{odd p} (−1)^{Σ_{q<p} n_q} = (−1)^{inversions + Σ_q w_q n_q},

with w_q the number of odd spin-orbitals above q: one matrix product with the batch, like
the Pauli strings of :mod:`psiloom.operators.pauli`. The row element ⟨n|O|n'⟩ of term t is
c_t times the sign of P_t† acting on |n⟩. Terms flipping the same set of spin-orbitals share
one *connection*, so ``connections(x)`` has a fixed number of entries per row, the diagonal
included.

Local energies: E_loc(n) = Σ_{n'} ⟨n|H|n'⟩ ψ(n')/ψ(n). For an operator attached to a sector
(:meth:`FermionOperator.in_sector`) only the connections that can be non-zero inside the
sector are evaluated per sample (``max_connections``: singles and doubles of a determinant,
not every flip set of the table), which is what makes molecular Hamiltonians affordable.
"""

from __future__ import annotations

import functools
import numbers
from math import comb
from typing import Sequence

import jax
import jax.numpy as jnp
import numpy as np
import scipy.sparse as sp

from psiloom._validation import ArgumentTypeError, boolean, finite_complex, integer, positive_int
from psiloom.batching import map_in_chunks
from psiloom.fermions.space import FermionSpace, occupation_codes

Ladder = tuple[int, int]  # (spin-orbital, 1 for c†, 0 for c)
Term = tuple[Ladder, ...]

CREATE, ANNIHILATE = 1, 0
EXACT_COUNT_LIMIT = 200_000  # sectors up to this size count their non-zero connections exactly


def _normal_order(ops: Term, coef: complex, out: dict) -> None:
    """Add ``coef · ops`` to ``out`` in canonical normal order (module docstring)."""
    stack = [(coef, tuple(ops))]
    while stack:
        c, ops = stack.pop()
        for k in range(len(ops) - 1):
            (p, dp), (q, dq) = ops[k], ops[k + 1]
            if dp == dq:
                if p == q:  # c c = c† c† = 0
                    break
                if (dp == CREATE and p > q) or (dp == ANNIHILATE and p < q):
                    stack.append((-c, ops[:k] + (ops[k + 1], ops[k]) + ops[k + 2:]))
                    break
            elif dp == ANNIHILATE:  # c_p c†_q = δ_pq − c†_q c_p
                stack.append((-c, ops[:k] + (ops[k + 1], ops[k]) + ops[k + 2:]))
                if p == q:
                    stack.append((c, ops[:k] + ops[k + 2:]))
                break
        else:
            out[ops] = out.get(ops, 0) + c


def _ket_action(ops: Term, n_modes: int):
    """How the product ``ops`` (left to right) acts on a basis ket: ``None`` if it is zero on
    every ket, else ``(sign, required (P,) of −1/0/1, flipped (P,) bool, weights (P,))`` with
    −1 = no requirement, and sign (−1)^{inversions} (module docstring)."""
    required = np.full(n_modes, -1, dtype=np.int64)
    flipped = np.zeros(n_modes, dtype=bool)
    for p in sorted({p for p, _ in ops}):
        seq = [d for q, d in ops if q == p]
        ok = []
        for start in (0, 1):
            n, alive = start, True
            for d in reversed(seq):
                if (d == CREATE) == bool(n):  # c† on an occupied or c on an empty spin-orbital
                    alive = False
                    break
                n = 1 - n
            if alive:
                ok.append(start)
        if not ok:
            return None
        if len(ok) == 1:
            required[p] = ok[0]
        flipped[p] = len(seq) % 2 == 1
    orbs = [p for p, _ in ops]
    inversions = sum(1 for i in range(len(orbs)) for j in range(i + 1, len(orbs)) if orbs[i] > orbs[j])
    odd = np.flatnonzero(flipped)
    weights = np.array([np.sum(odd > q) % 2 for q in range(n_modes)], dtype=np.float64)
    return (-1.0) ** inversions, required, flipped, weights


class FermionOperator:
    """A sum of normal-ordered products of ladder operators on the spin-orbitals of
    ``n_orbitals`` orbitals (``2 · n_orbitals`` spin-orbitals, ``n_orbitals`` if ``spinless``).

    Build with :func:`fermion` / :meth:`term` and combine with ``+``, ``-``, scalar ``*`` and
    operator products ``*`` / ``@``; :meth:`adjoint` is the hermitian conjugate. ``sector``
    (:meth:`in_sector`) restricts local energies to the connections possible inside one
    :class:`~psiloom.fermions.FermionSpace` (module docstring). Immutable, hashable by identity.
    """

    def __init__(self, n_orbitals: int, terms: dict | None = None, spinless: bool = False,
                 sector: FermionSpace | None = None):
        self.n_orbitals = positive_int("n_orbitals", n_orbitals)
        self.spinless = boolean("spinless", spinless)
        self.n_spin_orbitals = self.n_orbitals * (1 if self.spinless else 2)
        out: dict[Term, complex] = {}
        for ops, coef in (terms or {}).items():
            coef = finite_complex("coefficient", coef)
            ops = tuple(self._check_ladder(op) for op in ops)
            if coef != 0:
                _normal_order(ops, coef, out)
        self.terms = {t: (c.real if abs(np.imag(c)) == 0 else c) for t, c in out.items() if abs(c) > 1e-15}
        if sector is not None:
            if not isinstance(sector, FermionSpace):
                raise TypeError(f"sector must be a FermionSpace, got {sector!r}")
            if (sector.n_orbitals, sector.spinless) != (self.n_orbitals, self.spinless):
                raise ValueError(f"sector {sector!r} does not match an operator on {self.n_orbitals} orbitals"
                                 f"{' (spinless)' if self.spinless else ''}")
            if not self.conserves_particle_numbers():
                raise ValueError("the operator changes n_up or n_down: it has no matrix within a sector")
        self.sector = sector

    def _check_ladder(self, op) -> Ladder:
        try:
            p, d = op
        except (TypeError, ValueError):
            raise ValueError(f"a ladder operator is (spin_orbital, dagger), got {op!r}") from None
        p = integer("spin-orbital", p)
        if not 0 <= p < self.n_spin_orbitals:
            raise ValueError(f"operator acts on spin-orbital {p}, which does not exist: there are "
                             f"{self.n_spin_orbitals} spin-orbitals (0 … {self.n_spin_orbitals - 1})")
        if d not in (0, 1) or isinstance(d, float):
            raise ValueError(f"dagger must be 1 (creation) or 0 (annihilation), got {d!r}")
        return (p, int(d))

    # ----------------------------------------------------------------- construction
    @classmethod
    def term(cls, n_orbitals: int, ladders: str, spin_orbitals: Sequence[int] | int, coefficient: complex = 1.0,
             spinless: bool = False) -> "FermionOperator":
        """``coefficient · Π_k a_k`` with ``a_k = c†`` for ``'+'`` and ``c`` for ``'-'`` in
        ``ladders``, acting on ``spin_orbitals[k]`` (indices ``σ·n_orbitals + i``), left to right."""
        if not isinstance(ladders, str):
            raise ArgumentTypeError(f"ladders must be a string of '+' (c†) and '-' (c), got {ladders!r}")
        sites = np.atleast_1d(np.asarray(spin_orbitals, dtype=object)).tolist()
        if len(sites) != len(ladders):
            raise ValueError(f"{len(ladders)} ladder symbols {ladders!r} but {len(sites)} spin-orbitals {sites!r}")
        bad = [s for s in ladders if s not in "+-"]
        if bad:
            raise ValueError(f"unknown ladder symbol {bad[0]!r}; use '+' for c† and '-' for c")
        ops = tuple((p, 1 if s == "+" else 0) for s, p in zip(ladders, sites))
        return cls(n_orbitals, {ops: coefficient}, spinless=spinless)

    @classmethod
    def identity(cls, n_orbitals: int, coefficient: complex = 1.0, spinless: bool = False) -> "FermionOperator":
        """``coefficient`` times the identity."""
        return cls(n_orbitals, {(): coefficient}, spinless=spinless)

    def in_sector(self, space: FermionSpace) -> "FermionOperator":
        """The same operator, its local energies restricted to ``space``'s sector (faster)."""
        return FermionOperator(self.n_orbitals, self.terms, self.spinless, sector=space)

    # ----------------------------------------------------------------- algebra
    def _like(self, terms) -> "FermionOperator":
        return FermionOperator(self.n_orbitals, terms, self.spinless)

    def _check_compatible(self, other: "FermionOperator"):
        if (other.n_orbitals, other.spinless) != (self.n_orbitals, self.spinless):
            raise ValueError(f"cannot combine operators on {self.n_spin_orbitals} and {other.n_spin_orbitals} "
                             "spin-orbitals")

    def __add__(self, other):
        if isinstance(other, numbers.Number):
            other = FermionOperator.identity(self.n_orbitals, other, self.spinless)
        if not isinstance(other, FermionOperator):
            return NotImplemented
        self._check_compatible(other)
        terms = dict(self.terms)
        for t, c in other.terms.items():
            terms[t] = terms.get(t, 0) + c
        return self._like(terms)

    __radd__ = __add__

    def __neg__(self):
        return self._like({t: -c for t, c in self.terms.items()})

    def __sub__(self, other):
        return self + (-other)

    def __rsub__(self, other):
        return (-self) + other

    def __mul__(self, other):
        if isinstance(other, numbers.Number):
            other = finite_complex("scalar factor", other)
            return self._like({t: c * other for t, c in self.terms.items()})
        if not isinstance(other, FermionOperator):
            return NotImplemented
        self._check_compatible(other)
        out: dict[Term, complex] = {}
        for ta, ca in self.terms.items():
            for tb, cb in other.terms.items():
                _normal_order(ta + tb, ca * cb, out)
        return self._like(out)

    def __rmul__(self, other):
        if isinstance(other, numbers.Number):
            return self * other
        return NotImplemented

    __matmul__ = __mul__

    def __truediv__(self, other):
        if not isinstance(other, numbers.Number):
            return NotImplemented
        return self * (1.0 / finite_complex("divisor", other))

    def adjoint(self) -> "FermionOperator":
        """Hermitian conjugate: factors reversed, c ↔ c†, coefficients conjugated."""
        return self._like({tuple((p, 1 - d) for p, d in reversed(t)): np.conj(c) for t, c in self.terms.items()})

    def is_hermitian(self, atol: float = 1e-12) -> bool:
        """Whether the canonical terms equal those of the adjoint (to ``atol``)."""
        adj = self.adjoint().terms
        keys = set(adj) | set(self.terms)
        return all(abs(self.terms.get(k, 0) - adj.get(k, 0)) <= atol for k in keys)

    def is_zero(self, atol: float = 1e-12) -> bool:
        """Whether every canonical coefficient is below ``atol`` in magnitude."""
        return all(abs(c) <= atol for c in self.terms.values())

    def conserves_particle_numbers(self) -> bool:
        """Whether every term conserves the number of up and of down electrons."""
        m = self.n_orbitals
        for t in self.terms:
            balance = [0, 0]
            for p, d in t:
                balance[p // m] += 1 if d == CREATE else -1
            if balance != [0, 0]:
                return False
        return True

    def __len__(self) -> int:
        return len(self.terms)

    def __repr__(self) -> str:
        kind = ", spinless" if self.spinless else ""
        return (f"FermionOperator(n_orbitals={self.n_orbitals}{kind}, n_terms={len(self.terms)}, "
                f"n_connections={self.n_connections})")

    __hash__ = object.__hash__

    def __eq__(self, other):
        return self is other

    # ----------------------------------------------------------------- compiled form
    @functools.cached_property
    def _tables(self):
        n = self.n_spin_orbitals
        coefs, mismatch, offset, parity, groups = [], [], [], [], {}
        group_of = []
        for term, c in self.terms.items():
            dagger = tuple((p, 1 - d) for p, d in reversed(term))  # row element uses P† on the ket
            action = _ket_action(dagger, n)
            if action is None:
                continue
            sign, required, flipped, weights = action
            coefs.append(c * sign)
            # mismatch(x) = Σ_{need 1} (1 − x) + Σ_{need 0} x = offset + x · row
            mismatch.append(np.where(required == 0, 1.0, 0.0) - np.where(required == 1, 1.0, 0.0))
            offset.append(float(np.sum(required == 1)))
            parity.append(weights)
            group_of.append(groups.setdefault(tuple(np.flatnonzero(flipped).tolist()), len(groups)))
        if not coefs:  # the zero operator: one diagonal connection with zero element
            coefs, mismatch, offset, parity = [0.0], [np.zeros(n)], [0.0], [np.zeros(n)]
            group_of, groups = [0], {(): 0}
        flips = np.zeros((len(groups), n), dtype=np.float64)
        for flip, g in groups.items():
            flips[g, list(flip)] = 1.0
        assign = np.zeros((len(coefs), len(groups)))
        assign[np.arange(len(coefs)), group_of] = 1.0
        coefs = np.asarray(coefs, dtype=np.complex128)
        real = bool(np.all(np.abs(coefs.imag) < 1e-15))
        return {
            "coef": coefs.real.copy() if real else coefs,
            "weights": np.concatenate([np.asarray(mismatch), np.asarray(parity)], axis=0).T,  # (P, 2T)
            "offset": np.asarray(offset),
            "assign": assign,
            "flips": flips,
        }

    @property
    def n_connections(self) -> int:
        """Fixed number of connected configurations per row (diagonal included)."""
        return self._tables["flips"].shape[0]

    @property
    def n_sites(self) -> int:
        """Length of a configuration (= number of spin-orbitals)."""
        return self.n_spin_orbitals

    @property
    def is_real(self) -> bool:
        """Whether all matrix elements in the occupation basis are real."""
        return not np.iscomplexobj(self._tables["coef"])

    @property
    def flip_masks(self) -> np.ndarray:
        """``(n_connections, n_spin_orbitals)``: 1 where connection g flips the occupation."""
        return self._tables["flips"]

    @functools.cached_property
    def max_connections(self) -> int:
        """Largest number of connections that can be non-zero in one row of the sector (all of
        them without a sector): counted over every configuration for sectors of at most
        ``EXACT_COUNT_LIMIT`` states, else bounded per kind of flip set (k_up, k_down flipped
        spin-orbitals) by C(N↑, k_up/2) C(M−N↑, k_up/2) C(N↓, k_down/2) C(M−N↓, k_down/2)."""
        flips = self.flip_masks
        if self.sector is None:
            return flips.shape[0]
        s, m = self.sector, self.n_orbitals
        if s.size <= EXACT_COUNT_LIMIT:  # small sector: the exact largest count of non-zero elements per row
            states = s.configurations()
            most = max(int(np.max(np.sum(np.abs(self.matrix_elements(states[i:i + 4096])) > 0, axis=1)))
                       for i in range(0, len(states), 4096))
            return max(1, most)
        k_up = flips[:, :m].sum(axis=1).astype(int)
        k_dn = flips[:, m:].sum(axis=1).astype(int) if not self.spinless else np.zeros_like(k_up)
        total = 0
        for a, b in set(zip(k_up.tolist(), k_dn.tolist())):
            if a % 2 or b % 2:
                continue
            bound = (comb(s.n_up, a // 2) * comb(m - s.n_up, a // 2)
                     * comb(s.n_down, b // 2) * comb(m - s.n_down, b // 2))
            total += min(bound, int(np.sum((k_up == a) & (k_dn == b))))
        return max(1, min(total, flips.shape[0]))

    def matrix_elements(self, x):
        """Row elements ``⟨x|O|x'_g⟩`` of a batch ``(..., P)`` of 0/1 occupations, shape
        ``(..., n_connections)`` in the order of :attr:`flip_masks`; NumPy or JAX (jit-safe)."""
        xp = np if isinstance(x, np.ndarray) else jnp
        if x.shape[-1] != self.n_spin_orbitals:
            raise ValueError(f"configurations have {x.shape[-1]} occupations, the operator acts on "
                             f"{self.n_spin_orbitals} spin-orbitals")
        tab = self._tables
        n_terms = tab["offset"].shape[0]
        both = x @ xp.asarray(tab["weights"], dtype=x.dtype)  # (..., 2T)
        valid = xp.abs(both[..., :n_terms] + xp.asarray(tab["offset"], dtype=x.dtype)) < 0.5
        signs = 1.0 - 2.0 * xp.mod(both[..., n_terms:], 2.0)
        values = xp.where(valid, signs, 0.0) * xp.asarray(tab["coef"])
        return values @ xp.asarray(tab["assign"], dtype=values.dtype)

    def connections(self, x):
        """``(x_conn (..., G, P), mels (..., G))`` with ``mels[..., g] = ⟨x|O|x_conn[..., g]⟩``."""
        xp = np if isinstance(x, np.ndarray) else jnp
        mels = self.matrix_elements(x)
        flips = xp.asarray(self.flip_masks, dtype=x.dtype)
        return x[..., None, :] + (1.0 - 2.0 * x[..., None, :]) * flips, mels

    def _local_block(self, log_amplitude, x, log_amp_x):
        mels = self.matrix_elements(x)  # (B, G)
        flips = jnp.asarray(self.flip_masks, dtype=x.dtype)
        k = self.max_connections
        if k < mels.shape[1]:  # keep the (at most k) non-zero connections of each row
            idx = jnp.argsort(mels == 0, axis=1, stable=True)[:, :k]
            mels = jnp.take_along_axis(mels, idx, axis=1)
            flips = flips[idx]  # (B, k, P)
        x_conn = x[:, None, :] + (1.0 - 2.0 * x[:, None, :]) * flips
        b, g, n = x_conn.shape
        log_conn = log_amplitude(x_conn.reshape(b * g, n)).reshape(b, g)
        ratio = jnp.exp(log_conn - log_amp_x[:, None])
        return jnp.sum(jnp.where(mels != 0, mels * ratio, 0), axis=-1)

    def local_energy(self, log_amplitude, x, log_amp_x=None, chunk: int | None = None):
        """Local values ``O_loc(x) = Σ_x' ⟨x|O|x'⟩ ψ(x')/ψ(x)`` of a batch ``(n_samples, P)``.

        Same contract as :meth:`psiloom.operators.PauliSum.local_energy`; a concrete ``x`` is
        checked to hold 0/1 occupations (and to lie in the sector, when there is one).
        """
        if x.ndim != 2 or x.shape[1] != self.n_spin_orbitals:
            raise ValueError(f"configurations must have shape (n_samples, {self.n_spin_orbitals}), got {x.shape}")
        if not isinstance(x, jax.core.Tracer):
            arr = np.asarray(x)
            if self.sector is not None:
                self.sector.check_configurations(arr)
            elif not np.all((arr == 0) | (arr == 1)):
                where = tuple(int(i) for i in np.argwhere((arr != 0) & (arr != 1))[0])
                raise ValueError(f"x must hold occupations 0 or 1; entry {where} is {arr[where]!r}")
        if log_amp_x is None:
            log_amp_x = map_in_chunks(log_amplitude, chunk, x)
        return map_in_chunks(lambda xs, ls: self._local_block(log_amplitude, xs, ls), chunk, x, log_amp_x)

    # ----------------------------------------------------------------- exact matrices
    def _basis(self, space):
        if space is None:
            n = self.n_spin_orbitals
            if n > 20:
                raise ValueError(f"the full Fock space of {n} spin-orbitals is too large; give a FermionSpace")
            ints = np.arange(2**n, dtype=np.int64)
            return ((ints[:, None] >> np.arange(n - 1, -1, -1)) & 1).astype(np.float64)
        if not isinstance(space, FermionSpace):
            raise TypeError(f"space must be a FermionSpace or None (the whole Fock space), got {space!r}")
        if (space.n_orbitals, space.spinless) != (self.n_orbitals, self.spinless):
            raise ValueError(f"space {space!r} does not match an operator on {self.n_spin_orbitals} spin-orbitals")
        return space.configurations()

    def sparse_matrix(self, space: FermionSpace | None = None, block: int = 1 << 12) -> sp.csr_matrix:
        """``⟨n|O|n'⟩`` on the sector ``space`` (default: the whole Fock space, every particle
        number) as CSR, basis order of :meth:`FermionSpace.configurations` (increasing code).
        Raises when the operator leaves the sector."""
        states = self._basis(space)
        state_codes = occupation_codes(states)
        rows, cols, vals = [], [], []
        for start in range(0, len(states), block):
            part = states[start: start + block]
            x_conn, mels = self.connections(part)
            c = occupation_codes(x_conn)
            pos = np.minimum(np.searchsorted(state_codes, c), len(states) - 1)
            inside = state_codes[pos] == c
            nonzero = np.abs(mels) > 0
            if np.any(nonzero & ~inside):
                raise ValueError("the operator connects states outside the sector of the space")
            keep = nonzero & inside
            r = np.broadcast_to(np.arange(start, start + len(part))[:, None], mels.shape)
            rows.append(r[keep])
            cols.append(pos[keep])
            vals.append(mels[keep])
        dtype = np.float64 if self.is_real else np.complex128
        mat = sp.coo_matrix((np.concatenate(vals).astype(dtype), (np.concatenate(rows), np.concatenate(cols))),
                            shape=(len(states), len(states)))
        return mat.tocsr()

    def dense_matrix(self, space: FermionSpace | None = None) -> np.ndarray:
        """:meth:`sparse_matrix` as a dense NumPy array."""
        return self.sparse_matrix(space).toarray()


def fermion(n_orbitals: int, ladders: str, spin_orbitals, coefficient: complex = 1.0,
            spinless: bool = False) -> FermionOperator:
    """Shorthand for :meth:`FermionOperator.term`: ``fermion(4, "+-", (0, 1))`` is c†_0 c_1."""
    return FermionOperator.term(n_orbitals, ladders, spin_orbitals, coefficient, spinless)


def creation(n_orbitals: int, spin_orbital: int, spinless: bool = False) -> FermionOperator:
    """c†_p."""
    return fermion(n_orbitals, "+", spin_orbital, spinless=spinless)


def annihilation(n_orbitals: int, spin_orbital: int, spinless: bool = False) -> FermionOperator:
    """c_p."""
    return fermion(n_orbitals, "-", spin_orbital, spinless=spinless)


def number(n_orbitals: int, spin_orbital: int, spinless: bool = False) -> FermionOperator:
    """n_p = c†_p c_p."""
    return fermion(n_orbitals, "+-", (spin_orbital, spin_orbital), spinless=spinless)
