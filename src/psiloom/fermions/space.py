"""Occupation-number configurations of spin-orbitals with fixed numbers of up and down electrons.

A system of ``n_orbitals`` spatial orbitals (lattice sites, or molecular orbitals) carries
``2 · n_orbitals`` spin-orbitals (``n_orbitals`` for spinless fermions). A configuration is the
vector of their occupation numbers ``n_p ∈ {0, 1}`` in the default JAX float dtype, batches of
shape ``(n_samples, n_spin_orbitals)`` with the sample axis leading.

Ordering convention (it fixes every fermionic sign in psiloom):

* spin-orbital index ``p = σ · n_orbitals + i`` for orbital ``i`` and spin ``σ`` (0 = up,
  1 = down): all up spin-orbitals first, then all down ones;
* the basis state of occupations ``n`` is ``|n⟩ = (c†_0)^{n_0} (c†_1)^{n_1} ⋯ (c†_{P−1})^{n_{P−1}} |0⟩``,
  lowest index leftmost; hence ``c_p |n⟩ = (−1)^{Σ_{q<p} n_q} n_p |n − e_p⟩`` and
  ``c†_p |n⟩ = (−1)^{Σ_{q<p} n_q} (1 − n_p) |n + e_p⟩``;
* enumeration order (:meth:`FermionSpace.configurations`, exact matrices) is increasing integer
  code with spin-orbital 0 as the most significant bit (:func:`psiloom.spaces.codes` of
  ``2n − 1``), the same order as a :class:`~psiloom.spaces.SpinSpace` whose up spin is an
  occupied spin-orbital (the Jordan-Wigner picture, :mod:`psiloom.fermions.jordan_wigner`).

A determinant trial state with rows taken in increasing spin-orbital order has exactly the sign
of this convention (:mod:`psiloom.fermions.determinants`).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from math import comb

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import boolean, nonnegative_int, positive_int

#: Largest sector that :meth:`FermionSpace.configurations` will enumerate.
MAX_ENUMERATION = 2**24


def _codes(bits: np.ndarray) -> np.ndarray:
    n = bits.shape[-1]
    return bits.astype(np.int64) @ (1 << np.arange(n - 1, -1, -1, dtype=np.int64))


@dataclass(frozen=True)
class FermionSpace:
    """Occupations of ``n_orbitals`` orbitals × spin with ``n_up`` up and ``n_down`` down electrons.

    ``spinless=True``: one spin-orbital per orbital, ``n_up`` particles, ``n_down`` must be 0.
    Counts are non-negative integers no larger than ``n_orbitals`` (``ValueError`` naming the
    value otherwise; a wrong type such as ``1.5`` or ``True`` raises a TypeError, also a
    ValueError).

    ``n_sites`` (the length of a configuration, for samplers and training) is the number of
    spin-orbitals.
    """

    n_orbitals: int
    n_up: int
    n_down: int = 0
    spinless: bool = False

    def __post_init__(self):
        m = positive_int("n_orbitals", self.n_orbitals)
        object.__setattr__(self, "n_orbitals", m)
        object.__setattr__(self, "spinless", boolean("spinless", self.spinless))
        for name in ("n_up", "n_down"):
            value = nonnegative_int(name, getattr(self, name))
            if value > m:
                raise ValueError(f"{name}={value} electrons do not fit into n_orbitals={m} orbitals "
                                 f"(at most one electron per spin-orbital)")
            object.__setattr__(self, name, value)
        if self.spinless and self.n_down:
            raise ValueError(f"a spinless space has no down electrons, got n_down={self.n_down}")

    # ------------------------------------------------------------------ sizes
    @property
    def n_spins(self) -> int:
        """1 for spinless fermions, else 2."""
        return 1 if self.spinless else 2

    @property
    def n_spin_orbitals(self) -> int:
        """``n_spins × n_orbitals``."""
        return self.n_spins * self.n_orbitals

    @property
    def n_sites(self) -> int:
        """Length of a configuration (= number of spin-orbitals)."""
        return self.n_spin_orbitals

    @property
    def n_electrons(self) -> int:
        """``n_up + n_down``."""
        return self.n_up + self.n_down

    @property
    def is_sector(self) -> bool:
        """Whether the electron numbers are fixed (always, so samplers need moves that conserve them)."""
        return True

    #: no spin-1/2 magnetisation sector (the counts are ``n_up``, ``n_down``)
    magnetisation = None

    @property
    def size(self) -> int:
        """Number of configurations, C(M, N↑)·C(M, N↓)."""
        return comb(self.n_orbitals, self.n_up) * (1 if self.spinless else comb(self.n_orbitals, self.n_down))

    def spin_orbital(self, orbital: int, spin: int = 0) -> int:
        """Index ``p = spin · n_orbitals + orbital`` (spin 0 = up, 1 = down)."""
        orbital = nonnegative_int("orbital", orbital)
        spin = nonnegative_int("spin", spin)
        if orbital >= self.n_orbitals or spin >= self.n_spins:
            raise ValueError(f"orbital {orbital} with spin {spin} does not exist in {self!r}")
        return spin * self.n_orbitals + orbital

    # ------------------------------------------------------------------ configurations
    def random(self, key: jax.Array, n: int) -> jax.Array:
        """``n`` uniformly random configurations of the sector, shape ``(n, n_spin_orbitals)``."""
        n = nonnegative_int("n (number of configurations)", n)
        m = self.n_orbitals
        blocks = [jnp.where(jnp.arange(m) < self.n_up, 1.0, 0.0)]
        if not self.spinless:
            blocks.append(jnp.where(jnp.arange(m) < self.n_down, 1.0, 0.0))
        keys = jax.random.split(key, len(blocks))
        parts = [jax.vmap(lambda k, b=b: jax.random.permutation(k, b))(jax.random.split(kk, n))
                 for kk, b in zip(keys, blocks)]
        return jnp.concatenate(parts, axis=1)

    def configurations(self) -> np.ndarray:
        """Every configuration of the sector, ``(size, n_spin_orbitals)`` of 0/1 as float64, in
        increasing order of :func:`occupation_codes` (spin-orbital 0 most significant)."""
        if self.size > MAX_ENUMERATION:
            raise ValueError(f"sector of {self.size} states is too large to enumerate (limit {MAX_ENUMERATION})")
        m = self.n_orbitals

        def block(k):
            rows = np.zeros((comb(m, k), m), dtype=np.float64)
            for r, occ in enumerate(itertools.combinations(range(m), k)):
                rows[r, list(occ)] = 1.0
            return rows[np.argsort(_codes(rows))]

        up = block(self.n_up)
        if self.spinless:
            return up
        down = block(self.n_down)
        return np.concatenate([np.repeat(up, len(down), axis=0), np.tile(down, (len(up), 1))], axis=1)

    def contains(self, x) -> np.ndarray:
        """Boolean mask: which rows of ``x`` are configurations of this sector (host side)."""
        x = np.asarray(x)
        if x.shape[-1] != self.n_spin_orbitals:
            return np.zeros(x.shape[:-1], dtype=bool)
        m = self.n_orbitals
        ok = np.all((x == 0) | (x == 1), axis=-1)
        ok &= np.sum(x[..., :m], axis=-1) == self.n_up
        if not self.spinless:
            ok &= np.sum(x[..., m:], axis=-1) == self.n_down
        return ok

    def check_configurations(self, x, name: str = "x") -> None:
        """Raise ValueError unless every row of a concrete ``x`` lies in the sector (traced arrays
        are not checked)."""
        if isinstance(x, jax.core.Tracer):
            return
        arr = np.asarray(x)
        if arr.ndim < 1 or arr.shape[-1] != self.n_spin_orbitals:
            raise ValueError(f"{name} must have {self.n_spin_orbitals} occupations per row, got shape {arr.shape}")
        bad = np.flatnonzero(~self.contains(arr.reshape(-1, arr.shape[-1])))
        if bad.size:
            row = arr.reshape(-1, arr.shape[-1])[bad[0]]
            raise ValueError(f"{name} row {int(bad[0])} is not a configuration of {self!r} (occupations 0/1 "
                             f"with n_up={self.n_up}, n_down={self.n_down}): {row.tolist()}")

    # ------------------------------------------------------------------ samplers
    def choose_move(self, move=None, bonds=None):
        """The move a sampler uses here (called by :func:`psiloom.sampling.moves.choose_move`):
        ``move`` after checking that it conserves ``n_up`` and ``n_down`` (a fermionic move of
        :mod:`psiloom.fermions.moves`), or hops along ``bonds`` (pairs of orbitals, both spins),
        or hops between any two orbitals of the same spin."""
        from psiloom.fermions.moves import Hop, any_hop, check_fermionic, is_fermionic

        if move is not None and bonds is not None:
            raise ValueError("give either move= or bonds=, not both (bonds= picks hops along those bonds)")
        if move is None:
            move = any_hop(self.spinless) if bonds is None else Hop.along(bonds, self)
        if not is_fermionic(move):
            raise TypeError(f"a FermionSpace needs a move that conserves n_up and n_down (psiloom.fermions: "
                            f"Hop, SpinExchange, any_hop(), or a Mixture of them), got {move!r}")
        check_fermionic(move, self)
        return move

    def __repr__(self) -> str:
        if self.spinless:
            return f"FermionSpace(n_orbitals={self.n_orbitals}, n_particles={self.n_up}, spinless)"
        return f"FermionSpace(n_orbitals={self.n_orbitals}, n_up={self.n_up}, n_down={self.n_down})"


def spinless_space(n_orbitals: int, n_particles: int) -> FermionSpace:
    """Spinless fermions: ``n_particles`` in ``n_orbitals`` orbitals."""
    return FermionSpace(n_orbitals, n_particles, 0, spinless=True)


def occupation_codes(x) -> np.ndarray:
    """Integer code of each occupation vector (spin-orbital 0 = most significant bit)."""
    return _codes((np.asarray(x) > 0.5).astype(np.int64))
