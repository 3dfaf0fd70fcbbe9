"""Metropolis moves for occupation configurations that conserve N↑ and N↓.

All moves swap occupations, so every proposal stays in the sector of a
:class:`~psiloom.fermions.FermionSpace`; all are symmetric, T(n → n') = T(n' → n), so the
acceptance is min(1, |ψ(n')/ψ(n)|²). The fermionic sign lives in the trial state, not in the
move. They follow the protocol of :mod:`psiloom.sampling.moves` (``move(key, x) -> (x', sites)``,
``sites`` padded with −1), so :class:`psiloom.sampling.MetropolisChains` runs them, and they mix
with :class:`psiloom.sampling.Mixture`.

* :class:`Hop` — one electron hops along a uniformly chosen pair of spin-orbitals of the same
  spin (swap of the two occupations; a null move when both are equal). ``Hop.along(bonds,
  space)`` takes lattice bonds for both spins.
* :class:`AnyHop` (``any_hop()``) — a uniformly chosen electron of a uniformly chosen spin (among
  spins with both occupied and empty orbitals) hops to a uniformly chosen empty orbital of
  that spin: T = p_σ / (N_σ (M − N_σ)) both ways, hence symmetric. For molecules.
* :class:`SpinExchange` — the contents of the two sites of a bond are swapped (both spins): an
  up and a down electron trade places (a spin exchange), or a doublon moves.
* :class:`SpinFlip` — every up and down occupation are exchanged (N↑ = N↓): a global move
  between the two halves of an antiferromagnet.
"""

from __future__ import annotations

import dataclasses
from typing import Any, ClassVar

import jax
import jax.numpy as jnp
import numpy as np

from psiloom.sampling.moves import Mixture, Move, draw_entries, site_table

_CONSERVING = "conserves_particle_numbers"


class FermionMove(Move):
    """Base of the moves that keep n_up and n_down (``keeps_sector`` is then always true)."""

    conserves_magnetisation: ClassVar[bool] = True
    conserves_particle_numbers: ClassVar[bool] = True

    def check_space(self, space) -> None:
        """Raise ``ValueError`` unless every proposal stays in ``space`` and, where a spin has
        both occupied and empty orbitals, every one of its spin-orbitals can change."""
        self.check(space.n_spin_orbitals)


def is_fermionic(move) -> bool:
    """Whether ``move`` keeps n_up and n_down: a :class:`FermionMove` or a mixture of them."""
    if isinstance(move, Mixture):
        return all(is_fermionic(m) for m in move.components)
    return isinstance(move, FermionMove)


def check_fermionic(move, space) -> None:
    """:meth:`FermionMove.check_space` of ``move`` or of every component of a mixture."""
    if isinstance(move, Mixture):
        for m in move.components:
            check_fermionic(m, space)
        return
    move.check_space(space)


def _swap(x, i, j):
    rows = jnp.arange(x.shape[0])
    xi, xj = x[rows, i], x[rows, j]
    return x.at[rows, i].set(xj).at[rows, j].set(xi)


def _uncovered(space, moved: set[int]) -> list[int]:
    m = space.n_orbitals
    missing = []
    for spin, n in enumerate((space.n_up, space.n_down)[: space.n_spins]):
        if 0 < n < m:
            missing += [spin * m + i for i in range(m) if spin * m + i not in moved]
    return missing


@jax.tree_util.register_static
@dataclasses.dataclass(frozen=True)
class Hop(FermionMove):
    """Swap the occupations of a uniformly chosen pair of spin-orbitals of the same spin."""

    pairs: Any

    def __post_init__(self):
        object.__setattr__(self, "pairs", site_table(self.pairs, 2, "hop pairs"))

    @classmethod
    def along(cls, bonds, space) -> "Hop":
        """Hops of both spins along lattice ``bonds`` (pairs of orbitals) of ``space``."""
        table = np.asarray(site_table(bonds, 2, "hop bonds"), dtype=np.int64)
        bad = table[np.any(table >= space.n_orbitals, axis=1)]
        if len(bad):
            raise ValueError(f"hop bonds {bad.tolist()} name orbitals outside 0 … {space.n_orbitals - 1}")
        blocks = [table + spin * space.n_orbitals for spin in range(space.n_spins)]
        return cls(np.concatenate(blocks))

    @property
    def array(self) -> np.ndarray:
        """The pairs as an int64 array (P, 2)."""
        return np.asarray(self.pairs, dtype=np.int64)

    def __call__(self, key, x):
        self.check(x.shape[1])
        table = jnp.asarray(self.array, jnp.int32)
        k = draw_entries(key, x.shape[0], len(self.pairs))
        i, j = table[k, 0], table[k, 1]
        return _swap(x, i, j), jnp.stack([i, j], axis=1)

    def width(self, n_sites):
        return 2

    def check(self, n_sites):
        bad = self.array[np.any(self.array >= n_sites, axis=1)]
        if len(bad):
            raise ValueError(f"hop pairs {bad.tolist()} name spin-orbitals outside 0 … {n_sites - 1}")

    def check_space(self, space):
        self.check(space.n_spin_orbitals)
        m = space.n_orbitals
        mixed = self.array[(self.array[:, 0] // m) != (self.array[:, 1] // m)]
        if len(mixed):
            raise ValueError(f"hop pairs {mixed.tolist()} join spin-orbitals of different spins (an up and a "
                             f"down spin-orbital, indices below and above {m}): they would change n_up and n_down")
        missing = _uncovered(space, set(self.array.ravel().tolist()))
        if missing:
            raise ValueError(f"hop pairs never move spin-orbitals {missing}: the chains would keep their starting "
                             "occupations there; give bonds that touch every site or use any_hop()")

    def moved_sites(self, n_sites):
        return np.unique(self.array)

    def __repr__(self):
        return f"Hop({len(self.pairs)} pairs)"


@jax.tree_util.register_static
@dataclasses.dataclass(frozen=True)
class AnyHop(FermionMove):
    """An electron hops from a uniformly chosen occupied to a uniformly chosen empty orbital of
    the same spin (module docstring). ``n_orbitals`` and ``n_spins`` are read from ``x``'s
    width when not set: ``AnyHop(n_orbitals)`` for spinless spaces (``n_spins=1``)."""

    n_spins: int = 2

    def __call__(self, key, x):
        c, p = x.shape
        m = p // self.n_spins
        k_spin, k_occ, k_emp = jax.random.split(key, 3)
        blocks = x.reshape(c, self.n_spins, m)
        n_occ = jnp.sum(blocks, axis=2)  # (c, S)
        movable = (n_occ > 0.5) & (n_occ < m - 0.5)
        spin = jax.random.categorical(k_spin, jnp.where(movable, 0.0, -jnp.inf), axis=1)  # (c,)
        spin = jnp.where(jnp.any(movable, axis=1), spin, 0)
        block = jnp.take_along_axis(blocks, spin[:, None, None], axis=1)[:, 0]  # (c, m)
        u_occ = jnp.where(block > 0.5, jax.random.uniform(k_occ, block.shape), -1.0)
        u_emp = jnp.where(block < 0.5, jax.random.uniform(k_emp, block.shape), -1.0)
        i = jnp.argmax(u_occ, axis=1) + spin * m
        j = jnp.argmax(u_emp, axis=1) + spin * m
        frozen = ~jnp.any(movable, axis=1)
        sites = jnp.where(frozen[:, None], -1, jnp.stack([i, j], axis=1)).astype(jnp.int32)
        return jnp.where(frozen[:, None], x, _swap(x, i, j)), sites

    def width(self, n_sites):
        return 2

    def check_space(self, space):
        if space.n_spins != self.n_spins:
            raise ValueError(f"{self!r} is built for {self.n_spins} spin(s); the space has {space.n_spins} "
                             f"(use any_hop(spinless={space.spinless}))")


@jax.tree_util.register_static
@dataclasses.dataclass(frozen=True)
class SpinExchange(FermionMove):
    """Swap the contents (both spins) of the two sites of a uniformly chosen bond. ``n_orbitals``:
    the number of sites (bonds are pairs of sites)."""

    bonds: Any
    n_orbitals: int

    def __post_init__(self):
        object.__setattr__(self, "bonds", site_table(self.bonds, 2, "spin exchange bonds"))
        bad = [b for b in self.bonds if max(b) >= self.n_orbitals]
        if bad:
            raise ValueError(f"spin exchange bonds {bad} name sites outside 0 … {self.n_orbitals - 1}")

    def __call__(self, key, x):
        m = self.n_orbitals
        table = jnp.asarray(np.asarray(self.bonds), jnp.int32)
        k = draw_entries(key, x.shape[0], len(self.bonds))
        i, j = table[k, 0], table[k, 1]
        x = _swap(_swap(x, i, j), i + m, j + m)
        return x, jnp.stack([i, j, i + m, j + m], axis=1)

    def width(self, n_sites):
        return 4

    def check_space(self, space):
        if space.spinless or space.n_orbitals != self.n_orbitals:
            raise ValueError(f"spin exchange on {self.n_orbitals} sites does not fit {space!r}")

    def moved_sites(self, n_sites):
        arr = np.asarray(self.bonds)
        return np.unique(np.concatenate([arr.ravel(), arr.ravel() + self.n_orbitals]))

    def __repr__(self):
        return f"SpinExchange({len(self.bonds)} bonds)"


@jax.tree_util.register_static
@dataclasses.dataclass(frozen=True)
class SpinFlip(FermionMove):
    """Exchange the whole up and down occupations, n'_{i↑} = n_{i↓} and n'_{i↓} = n_{i↑}, for
    N↑ = N↓ (a global move: every spin-orbital may change). It is its own inverse, hence
    symmetric. Mixed in with a small weight (``Mixture((Hop.along(...), SpinFlip(m)), (0.9, 0.1))``)
    it lets chains jump between the two Néel-like halves of an antiferromagnetic state, which local
    hops connect only through rare high-energy paths. ``n_orbitals``: orbitals per spin.
    Sherman-Morrison updates handle one hop per spin only and refuse this move (Δ = −inf): bind
    a Slater determinant with ``fast=False`` when mixing it in."""

    n_orbitals: int

    def __call__(self, key, x):
        m = self.n_orbitals
        flipped = jnp.concatenate([x[:, m:2 * m], x[:, :m]], axis=1)
        sites = jnp.broadcast_to(jnp.arange(2 * m, dtype=jnp.int32), (x.shape[0], 2 * m))
        return flipped, sites

    def width(self, n_sites):
        return n_sites

    def check_space(self, space):
        if space.spinless or space.n_orbitals != self.n_orbitals or space.n_up != space.n_down:
            raise ValueError(f"a spin flip on {self.n_orbitals} orbitals per spin needs a spinful space with "
                             f"n_up = n_down on as many orbitals, got {space!r}")

    def moved_sites(self, n_sites):
        return np.arange(2 * self.n_orbitals)

    def __repr__(self):
        return f"SpinFlip({self.n_orbitals} orbitals)"


def any_hop(spinless: bool = False) -> AnyHop:
    """Hops between any occupied and any empty orbital of one spin (see :class:`AnyHop`)."""
    return AnyHop(1 if spinless else 2)
