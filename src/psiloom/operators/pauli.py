"""Operators as sums of products of Pauli matrices on lattice sites.

    O = Σ_t c_t  P_t,      P_t = ⊗_{i ∈ sites(t)} σ^{a_i}_i,   a_i ∈ {X, Y, Z}

with complex coefficients ``c_t``. The σ are Pauli matrices (eigenvalues ±1), *not* spin
operators: S = σ/2. In the σᶻ basis, with ``x_i = ±1``,

    Z_i |x⟩ = x_i |x⟩,    X_i |x⟩ = |x with i flipped⟩,    Y_i |x⟩ = i x_i |x with i flipped⟩.

Hence every Pauli string connects ``|x⟩`` to exactly one ``|x'⟩``, obtained by flipping the
sites carrying X or Y, with the row matrix element

    ⟨x|P_t|x'⟩ = c_t (−i)^{n_Y(t)} Π_{i ∈ Z∪Y sites of t} x_i .

Strings sharing the same flip set are merged into one *connection*; an operator therefore has
a fixed number ``n_connections`` of connected configurations per row (the diagonal included),
which is what makes :meth:`PauliSum.connections` jit-compatible. The sign product is evaluated
as a parity: Π_{i∈m} x_i = 1 − 2·(#{i ∈ m : x_i = −1} mod 2), i.e. one matrix product.
"""

from __future__ import annotations

import functools
import numbers
from typing import Iterable, Sequence

import jax.numpy as jnp
import numpy as np
import scipy.sparse as sp

from psiloom.spaces import SpinSpace, codes
from psiloom._validation import ArgumentTypeError, finite_complex, integer, positive_int

_LETTERS = ("X", "Y", "Z")
# σ^a σ^b = phase · σ^c  (single-site Pauli algebra); None stands for the identity.
_PRODUCT = {
    ("X", "X"): (1, None), ("Y", "Y"): (1, None), ("Z", "Z"): (1, None),
    ("X", "Y"): (1j, "Z"), ("Y", "Z"): (1j, "X"), ("Z", "X"): (1j, "Y"),
    ("Y", "X"): (-1j, "Z"), ("Z", "Y"): (-1j, "X"), ("X", "Z"): (-1j, "Y"),
}

PauliString = tuple[tuple[int, str], ...]  # sorted by site, at most one letter per site


def _check_site(site, n_sites: int) -> int:
    """A site index: an integer (never a truncated float) in ``[0, n_sites)``."""
    site = integer("site", site)
    if not 0 <= site < n_sites:
        raise ValueError(f"operator acts on site {site}, outside the lattice of {n_sites} sites")
    return site


def _multiply_strings(a: PauliString, b: PauliString) -> tuple[complex, PauliString]:
    phase: complex = 1.0
    sites = dict(a)
    for site, letter in b:
        if site in sites:
            ph, res = _PRODUCT[(sites[site], letter)]
            phase *= ph
            if res is None:
                del sites[site]
            else:
                sites[site] = res
        else:
            sites[site] = letter
    return phase, tuple(sorted(sites.items()))


class PauliSum:
    """A weighted sum of Pauli strings on ``n_sites`` sites (see module docstring).

    Build with :meth:`term` / :func:`pauli` and combine with ``+``, ``-``, scalar ``*`` and
    operator products ``*`` / ``@`` (which apply the Pauli algebra on shared sites).
    Instances are immutable and hashable by identity, so they can be closed over by jitted
    functions without triggering recompilation.
    """

    def __init__(self, n_sites: int, terms: dict[PauliString, complex] | None = None):
        self.n_sites = positive_int("n_sites", n_sites)
        clean: dict[PauliString, complex] = {}
        for string, coef in (terms or {}).items():
            coef = finite_complex("coefficient", coef)
            seen = set()
            for site, letter in string:
                _check_site(site, self.n_sites)
                if letter not in _LETTERS:
                    raise ValueError(f"unknown Pauli letter {letter!r}; expected one of X, Y, Z")
                if site in seen:
                    raise ValueError(f"Pauli string {string!r} names site {site} twice")
                seen.add(site)
            string = tuple(sorted((int(site), letter) for site, letter in string))
            if coef != 0:
                clean[string] = clean.get(string, 0) + coef
        self.terms = {s: c for s, c in clean.items() if abs(c) > 0}

    # ----------------------------------------------------------------- construction
    @classmethod
    def term(cls, n_sites: int, letters: str, sites: Sequence[int] | int, coefficient: complex = 1.0) -> "PauliSum":
        """``coefficient · Π_k σ^{letters[k]}_{sites[k]}`` on distinct sites.

        ``sites`` are integers in ``[0, n_sites)``, each named once (a site named twice would
        silently multiply out, e.g. ``"XY"`` on ``(0, 0)`` is the non-Hermitian ``iσᶻ₀``; write
        the product ``pauli(n, "X", 0) * pauli(n, "Y", 0)`` when that is meant). The
        coefficient is a finite real or complex number.

        Raises:
            TypeError: (also a ValueError) letters not a string, a site not an integer (a
                fractional site is never truncated), a coefficient that is not a number.
            ValueError: unknown letters, sites outside the lattice or repeated, a non-finite
                coefficient, or as many letters as sites not given.
        """
        n_sites = positive_int("n_sites", n_sites)
        if not isinstance(letters, str):
            raise ArgumentTypeError(f"letters must be a string of X, Y, Z, got {letters!r}")
        letters = letters.upper()
        raw = np.atleast_1d(np.asarray(sites, dtype=object) if not isinstance(sites, np.ndarray) else sites)
        if raw.ndim != 1:
            raise ValueError(f"sites must be one site or a flat sequence of sites, got {sites!r}")
        sites = [_check_site(site, n_sites) for site in raw.tolist()]
        if len(letters) != len(sites):
            raise ValueError(f"{len(letters)} Pauli letters {letters!r} but {len(sites)} sites {sites!r}")
        for letter in letters:
            if letter not in _LETTERS:
                raise ValueError(f"unknown Pauli letter {letter!r}; expected one of X, Y, Z")
        if len(set(sites)) != len(sites):
            repeated = sorted({s for s in sites if sites.count(s) > 1})
            raise ValueError(
                f"sites {sites!r} name site {repeated[0]} more than once; a Pauli string acts on "
                "distinct sites (multiply operators, pauli(n, 'X', i) * pauli(n, 'Y', i), for the "
                "single-site algebra)"
            )
        coefficient = finite_complex("coefficient", coefficient)
        string: PauliString = tuple(sorted(zip(sites, letters)))
        return cls(n_sites, {string: coefficient})

    @classmethod
    def identity(cls, n_sites: int, coefficient: complex = 1.0) -> "PauliSum":
        """``coefficient`` times the identity on ``n_sites`` sites."""
        return cls(n_sites, {(): coefficient})

    # ----------------------------------------------------------------- algebra
    def _check_compatible(self, other: "PauliSum"):
        if other.n_sites != self.n_sites:
            raise ValueError(f"cannot combine operators on {self.n_sites} and {other.n_sites} sites")

    def __add__(self, other):
        if isinstance(other, numbers.Number):
            other = PauliSum.identity(self.n_sites, other)
        if not isinstance(other, PauliSum):
            return NotImplemented
        self._check_compatible(other)
        terms = dict(self.terms)
        for s, c in other.terms.items():
            terms[s] = terms.get(s, 0) + c
        return PauliSum(self.n_sites, terms)

    __radd__ = __add__

    def __neg__(self):
        return PauliSum(self.n_sites, {s: -c for s, c in self.terms.items()})

    def __sub__(self, other):
        return self + (-other)

    def __rsub__(self, other):
        return (-self) + other

    def __mul__(self, other):
        if isinstance(other, numbers.Number):
            other = finite_complex("scalar factor", other)
            return PauliSum(self.n_sites, {s: c * other for s, c in self.terms.items()})
        if not isinstance(other, PauliSum):
            return NotImplemented
        self._check_compatible(other)
        terms: dict[PauliString, complex] = {}
        for sa, ca in self.terms.items():
            for sb, cb in other.terms.items():
                phase, s = _multiply_strings(sa, sb)
                terms[s] = terms.get(s, 0) + phase * ca * cb
        return PauliSum(self.n_sites, terms)

    def __rmul__(self, other):
        if isinstance(other, numbers.Number):
            return self * other
        return NotImplemented

    __matmul__ = __mul__

    def __truediv__(self, other):
        if not isinstance(other, numbers.Number):
            return NotImplemented
        return self * (1.0 / other)

    def adjoint(self) -> "PauliSum":
        """Hermitian conjugate: Pauli strings are Hermitian, so coefficients are conjugated."""
        return PauliSum(self.n_sites, {s: np.conj(c) for s, c in self.terms.items()})

    def is_hermitian(self, atol: float = 1e-12) -> bool:
        """True when every coefficient is real to ``atol`` (Pauli strings are Hermitian)."""
        return all(abs(np.imag(c)) <= atol for c in self.terms.values())

    def trace_per_dim(self) -> complex:
        """Tr O / 2^N: the coefficient of the identity string."""
        return self.terms.get((), 0.0)

    def __len__(self) -> int:
        return len(self.terms)

    def __repr__(self) -> str:
        return f"PauliSum(n_sites={self.n_sites}, n_terms={len(self.terms)}, n_connections={self.n_connections})"

    __hash__ = object.__hash__

    def __eq__(self, other):
        return self is other

    # ----------------------------------------------------------------- compiled form
    @functools.cached_property
    def _tables(self):
        n = self.n_sites
        strings = list(self.terms) or [()]
        coefs = [self.terms.get(s, 0.0) for s in strings]
        flips, group_of = {}, []
        zmask = np.zeros((len(strings), n), dtype=np.float64)
        phased = np.zeros(len(strings), dtype=np.complex128)
        for t, (string, coef) in enumerate(zip(strings, coefs)):
            flip = tuple(site for site, letter in string if letter in "XY")
            n_y = sum(letter == "Y" for _, letter in string)
            for site, letter in string:
                if letter in "YZ":
                    zmask[t, site] = 1.0
            phased[t] = coef * (-1j) ** n_y
            group_of.append(flips.setdefault(flip, len(flips)))
        # diagonal connection first when present (purely a convention for readability)
        flip_masks = np.zeros((len(flips), n), dtype=np.float64)
        for flip, g in flips.items():
            flip_masks[g, list(flip)] = 1.0
        assign = np.zeros((len(strings), len(flips)), dtype=np.float64)
        assign[np.arange(len(strings)), group_of] = 1.0
        real = bool(np.all(np.abs(phased.imag) < 1e-14))
        width = max(1, max(len(flip) for flip in flips))
        flip_sites = np.full((len(flips), width), -1, dtype=np.int32)
        for flip, g in flips.items():
            flip_sites[g, : len(flip)] = flip
        return {
            "flip_sign": 1.0 - 2.0 * flip_masks,  # multiply x by this to apply the flips
            "flip_sites": flip_sites,  # (G, K) flipped sites per connection, −1 padding
            "zmask": zmask,
            "coef": phased.real.copy() if real else phased,
            "assign": assign,
        }

    @property
    def n_connections(self) -> int:
        """Fixed number of connected configurations per row (diagonal included)."""
        return self._tables["flip_sign"].shape[0]

    @property
    def is_real(self) -> bool:
        """True when all matrix elements in the σᶻ basis are real."""
        return not np.iscomplexobj(self._tables["coef"])

    @property
    def flip_table(self) -> np.ndarray:
        """``(n_connections, K)`` int32: the sites flipped by each connection, padded with −1
        (K = the largest number of flipped sites, at least 1; the diagonal row is all −1).
        Connection ``g`` of :meth:`connections` is ``x`` with the sites ``flip_table[g]`` flipped;
        fast-update trial states use it to get ψ(x')/ψ(x) in O(K) per connection."""
        return self._tables["flip_sites"]

    def matrix_elements(self, x):
        """Row matrix elements ``⟨x|O|x'_g⟩`` of a batch, shape ``(..., n_connections)``, in the
        order of :attr:`flip_table` (the second output of :meth:`connections`)."""
        xp = np if isinstance(x, np.ndarray) else jnp
        if x.shape[-1] != self.n_sites:
            raise ValueError(f"configurations have {x.shape[-1]} sites, operator acts on {self.n_sites}")
        tab = self._tables
        down = (x < 0).astype(x.dtype)
        counts = down @ xp.asarray(tab["zmask"].T, dtype=x.dtype)  # (..., T)
        signs = 1.0 - 2.0 * xp.mod(counts, 2.0)
        values = signs * xp.asarray(tab["coef"])  # (..., T)
        return values @ xp.asarray(tab["assign"], dtype=values.dtype)  # (..., G)

    def connections(self, x):
        """Connected configurations and row matrix elements of a batch.

        Args:
            x: configurations, shape ``(..., n_sites)`` with entries ±1.
        Returns:
            ``(x_conn, mels)`` of shapes ``(..., n_connections, n_sites)`` and
            ``(..., n_connections)`` with ``mels[..., g] = ⟨x|O|x_conn[..., g, :]⟩``.
            Works on NumPy arrays (host) and inside ``jax.jit`` (traced arrays).
        """
        xp = np if isinstance(x, np.ndarray) else jnp
        mels = self.matrix_elements(x)
        x_conn = x[..., None, :] * xp.asarray(self._tables["flip_sign"], dtype=x.dtype)
        return x_conn, mels

    def local_energy(self, log_amplitude, x, log_amp_x=None, chunk: int | None = None):
        """Local values O_loc(x) = Σ_x' ⟨x|O|x'⟩ ψ(x')/ψ(x) (see :mod:`psiloom.operators.local`)."""
        from psiloom.operators.local import local_estimates

        return local_estimates(log_amplitude, self, x, log_amp_x, chunk=chunk)

    def diagonal(self, x):
        """⟨x|O|x⟩ for a batch (the connection with an empty flip set)."""
        x_conn, mels = self.connections(x)
        xp = np if isinstance(x, np.ndarray) else jnp
        same = xp.all(x_conn == x[..., None, :], axis=-1)
        return xp.sum(xp.where(same, mels, 0), axis=-1)

    # ----------------------------------------------------------------- exact matrices
    def sparse_matrix(self, space: SpinSpace | None = None, max_states_per_block: int = 1 << 16) -> sp.csr_matrix:
        """The matrix ``⟨x|O|x'⟩`` on ``space`` (default: the full 2^N space) as CSR.

        Basis order is that of :meth:`SpinSpace.configurations`. Raises when the operator has
        non-zero elements leaving a fixed-magnetisation sector.
        """
        space = SpinSpace(self.n_sites) if space is None else space
        if space.n_sites != self.n_sites:
            raise ValueError(f"space has {space.n_sites} sites, operator acts on {self.n_sites}")
        states = space.configurations()
        state_codes = codes(states)
        rows, cols, vals = [], [], []
        for start in range(0, len(states), max_states_per_block):
            block = states[start : start + max_states_per_block]
            x_conn, mels = self.connections(block)
            c = codes(x_conn)
            pos = np.searchsorted(state_codes, c)
            pos_clipped = np.minimum(pos, len(states) - 1)
            inside = state_codes[pos_clipped] == c
            nonzero = np.abs(mels) > 0
            if np.any(nonzero & ~inside):
                raise ValueError("operator connects states outside the magnetisation sector of the space")
            keep = nonzero & inside
            r = np.broadcast_to(np.arange(start, start + len(block))[:, None], mels.shape)
            rows.append(r[keep])
            cols.append(pos_clipped[keep])
            vals.append(mels[keep])
        dtype = np.float64 if self.is_real else np.complex128
        mat = sp.coo_matrix(
            (np.concatenate(vals).astype(dtype), (np.concatenate(rows), np.concatenate(cols))),
            shape=(len(states), len(states)),
        )
        return mat.tocsr()

    def dense_matrix(self, space: SpinSpace | None = None) -> np.ndarray:
        """Dense matrix in the σᶻ basis of ``space`` (see :meth:`sparse_matrix`)."""
        return self.sparse_matrix(space).toarray()


def pauli(n_sites: int, letters: str, sites: Sequence[int] | int, coefficient: complex = 1.0) -> PauliSum:
    """Shorthand for :meth:`PauliSum.term`: e.g. ``pauli(8, "ZZ", (0, 1))`` is σᶻ₀σᶻ₁."""
    return PauliSum.term(n_sites, letters, sites, coefficient)


def total(operators: Iterable[PauliSum], n_sites: int) -> PauliSum:
    """Sum of an iterable of operators (an empty sum is the zero operator)."""
    terms: dict[PauliString, complex] = {}
    for op in operators:
        if op.n_sites != n_sites:
            raise ValueError(f"cannot combine operators on {n_sites} and {op.n_sites} sites")
        for s, c in op.terms.items():
            terms[s] = terms.get(s, 0) + c
    return PauliSum(n_sites, terms)
