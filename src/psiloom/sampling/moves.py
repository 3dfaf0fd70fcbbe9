"""Symmetric proposal moves for Metropolis sampling of spin configurations.

A move is a small immutable object (a frozen dataclass, hashable, registered with JAX as a
static pytree so it can be closed over or passed through ``jax.jit``) that proposes

    move(key, x) -> (x', sites)

for a batch of chains ``x`` of shape ``(n_chains, n_sites)`` (one independent proposal per
chain). ``sites`` has shape ``(n_chains, K)`` (``K = move.width(n_sites)``, fixed per move) and
lists the sites whose value may have changed, padded with −1; fast-update trial states use it
to update cached quantities in O(K) instead of re-evaluating ψ. Every move here is symmetric,
T(x→x') = T(x'→x), so the Metropolis acceptance is min(1, |ψ(x')/ψ(x)|²).

Besides proposing, a move says explicitly what the samplers need to know about it:

* ``conserves_magnetisation`` and :meth:`Move.keeps_sector` — whether it may serve a
  fixed-magnetisation space;
* :meth:`Move.check` — its sites lie inside an ``n_sites`` configuration (``ValueError``);
* :meth:`Move.entry_table` — ``(table, kind)`` when every proposal picks one row of a fixed
  table of sites, uniformly per chain (:func:`draw_entries`): compiled sweeps draw from it;
* :meth:`Move.ordered` — its systematic-scan version (:class:`OrderedMove`), or ``ValueError``.

Moves: :data:`single_flip` (:class:`SingleFlip`), :class:`BondExchange`, :data:`pair_exchange`
(:class:`PairExchange`), :data:`global_flip` (:class:`GlobalFlip`), :class:`Mixture` of any of
them, and :class:`OrderedMove` (fixed order, the same in every chain). A new move subclasses
:class:`Move` as a frozen dataclass and registers it with :func:`jax.tree_util.register_static`.
"""

from __future__ import annotations

import dataclasses
from typing import Any, ClassVar

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import positive_real

FLIP, EXCHANGE = "flip", "exchange"  # kinds of entry tables: one site flipped, two sites swapped


def draw_entries(key: jax.Array, n_chains: int, n_entries: int) -> jax.Array:
    """The entry (site or bond index) each chain proposes in :class:`SingleFlip` and
    :class:`BondExchange` moves: ``(n_chains,)`` int, uniform over ``range(n_entries)``."""
    return jax.random.randint(key, (n_chains,), 0, n_entries)


def apply_entries(table, kind: str, entries: jax.Array, x: jax.Array) -> tuple[jax.Array, jax.Array]:
    """Proposals of a table move with the entries given: chain ``c`` flips the site of row
    ``entries[c]`` of ``table`` (``kind="flip"``) or swaps the two spins of that row's bond
    (``"exchange"``). Returns ``(x', sites)`` with ``sites`` int32 ``(n_chains, K)``."""
    sites = jnp.asarray(np.asarray(table), jnp.int32)[entries]
    if kind == FLIP:
        return x.at[jnp.arange(x.shape[0]), sites[:, 0]].multiply(-1), sites
    return _swap(x, sites[:, 0], sites[:, 1]), sites


def _swap(x, i, j):
    rows = jnp.arange(x.shape[0])
    xi, xj = x[rows, i], x[rows, j]
    return x.at[rows, i].set(xj).at[rows, j].set(xi)


def site_table(table, width: int, what: str) -> tuple[tuple[int, ...], ...]:
    """``table`` as a tuple of ``width``-tuples of site indices (hashable), checked: integers,
    at least one row, no negative site and no row repeating a site (``ValueError`` naming them)."""
    try:
        arr = np.asarray(table)
    except (TypeError, ValueError) as err:
        raise ValueError(f"{what} must be an array of site indices, got {table!r}") from err
    if arr.size == 0:
        raise ValueError(f"{what} needs at least one entry, got {table!r}")
    if arr.dtype == bool or not (np.issubdtype(arr.dtype, np.integer)
                                 or (np.issubdtype(arr.dtype, np.floating) and np.all(arr == np.round(arr)))):
        raise ValueError(f"{what} must hold integer site indices, got {table!r}")
    if arr.size % width:
        raise ValueError(f"{what} must have rows of {width} sites, got shape {arr.shape}")
    arr = arr.astype(np.int64).reshape(-1, width)
    bad = arr[np.any(arr < 0, axis=1)]
    if len(bad):
        raise ValueError(f"{what} has negative site indices: {bad.tolist()}")
    if width == 2:
        same = arr[arr[:, 0] == arr[:, 1]]
        if len(same):
            raise ValueError(f"{what} pairs a site with itself: {same.tolist()}")
    return tuple(tuple(int(s) for s in row) for row in arr)


def _check_table(table, n_sites: int, what: str):
    arr = np.asarray(table)
    bad = arr[np.any(arr >= n_sites, axis=1)]
    if len(bad):
        raise ValueError(f"{what} touches sites outside the {n_sites}-site configuration: {bad.tolist()}")


class Move:
    """Base of the proposal moves (see the module docstring). Subclasses are frozen dataclasses."""

    conserves_magnetisation: ClassVar[bool] = False

    def __call__(self, key: jax.Array, x: jax.Array) -> tuple[jax.Array, jax.Array]:
        raise NotImplementedError

    def width(self, n_sites: int) -> int:
        """K: the number of columns of ``sites``."""
        raise NotImplementedError

    def keeps_sector(self, space) -> bool:
        """Whether every proposal stays in ``space`` (its fixed magnetisation, if any)."""
        return not space.is_sector or self.conserves_magnetisation

    def check(self, n_sites: int) -> None:
        """Raise ``ValueError`` unless every proposal stays within ``n_sites`` sites."""

    def moved_sites(self, n_sites: int) -> np.ndarray | None:
        """The sites some proposal can change (sorted), or ``None`` for all of them."""
        return None

    def entry_table(self, n_sites: int) -> tuple[np.ndarray, str] | None:
        """``(table (P, K) int64, kind)`` when each proposal picks a row of ``table`` uniformly
        per chain by :func:`draw_entries` (kind ``"flip"``: K = 1; ``"exchange"``: K = 2, the two
        values swapped); ``None`` when the choice depends on ``x`` or mixes moves."""
        return None

    def ordered(self, n_sites: int) -> OrderedMove:
        """The systematic-scan version of this move (the same table visited in order)."""
        raise ValueError(
            f"order='sequential' needs single flips or a bond exchange (or an OrderedMove), got {self!r}; "
            "use order='random' for other moves"
        )


@jax.tree_util.register_static
@dataclasses.dataclass(frozen=True)
class SingleFlip(Move):
    """Flip one uniformly chosen spin per chain (changes the magnetisation by ±1)."""

    def __call__(self, key, x):
        return apply_entries(np.arange(x.shape[1])[:, None], FLIP, draw_entries(key, *x.shape), x)

    def width(self, n_sites):
        return 1

    def entry_table(self, n_sites):
        return np.arange(n_sites, dtype=np.int64)[:, None], FLIP

    def ordered(self, n_sites):
        return OrderedMove(np.arange(n_sites)[:, None], FLIP)


@jax.tree_util.register_static
@dataclasses.dataclass(frozen=True)
class BondExchange(Move):
    """Swap the two spins of a uniformly chosen bond (e.g. the nearest-neighbour bonds of a
    lattice); conserves the magnetisation. A bond with equal spins gives a null move.

    ``bonds``: pairs of distinct, non-negative site indices (any array-like of shape (B, 2));
    kept as a tuple of pairs. Sites beyond the configuration are refused by :meth:`Move.check`
    (the samplers call it with their space) and when proposing.
    """

    bonds: Any
    conserves_magnetisation: ClassVar[bool] = True

    def __post_init__(self):
        object.__setattr__(self, "bonds", site_table(self.bonds, 2, "bond_exchange bonds"))

    @property
    def array(self) -> np.ndarray:
        """The bonds as an ``(n_bonds, 2)`` int64 array."""
        return np.asarray(self.bonds, dtype=np.int64)

    def __call__(self, key, x):
        self.check(x.shape[1])
        return apply_entries(self.array, EXCHANGE, draw_entries(key, x.shape[0], len(self.bonds)), x)

    def width(self, n_sites):
        return 2

    def check(self, n_sites):
        _check_table(self.array, n_sites, "bond_exchange bonds")

    def moved_sites(self, n_sites):
        return np.unique(self.array)

    def entry_table(self, n_sites):
        return self.array, EXCHANGE

    def ordered(self, n_sites):
        return OrderedMove(self.array, EXCHANGE)

    def __repr__(self):
        return f"BondExchange({len(self.bonds)} bonds)"


@jax.tree_util.register_static
@dataclasses.dataclass(frozen=True)
class PairExchange(Move):
    """Swap a uniformly chosen up spin with a uniformly chosen down spin (any distance);
    conserves the magnetisation and is symmetric because the numbers of up and down spins are
    fixed. A fully polarised chain is left unchanged."""

    conserves_magnetisation: ClassVar[bool] = True

    def __call__(self, key, x):
        k_up, k_down = jax.random.split(key)
        up = x > 0
        # uniform choice among the True entries: argmax of masked uniform noise
        u_up = jnp.where(up, jax.random.uniform(k_up, x.shape), -1.0)
        u_dn = jnp.where(~up, jax.random.uniform(k_down, x.shape), -1.0)
        i, j = jnp.argmax(u_up, axis=1), jnp.argmax(u_dn, axis=1)
        polarised = jnp.all(up, axis=1) | jnp.all(~up, axis=1)
        sites = jnp.where(polarised[:, None], -1, jnp.stack([i, j], axis=1)).astype(jnp.int32)
        return jnp.where(polarised[:, None], x, _swap(x, i, j)), sites

    def width(self, n_sites):
        return 2


@jax.tree_util.register_static
@dataclasses.dataclass(frozen=True)
class GlobalFlip(Move):
    """Flip every spin, x → −x (deterministic, an involution, hence symmetric).

    On its own it is not ergodic; mixed with local moves (:class:`Mixture`) it lets a chain jump
    between the two mirror-image modes of |ψ|² in the ordered phase of the transverse-field
    Ising model, where local flips cross between them only through improbable domain walls.
    It negates the magnetisation, so it keeps only the ``magnetisation = 0`` sector. All ``N`` sites
    change: on the fast path its update costs about one full evaluation.
    """

    def __call__(self, key, x):
        c, n = x.shape
        return -x, jnp.broadcast_to(jnp.arange(n, dtype=jnp.int32), (c, n))

    def width(self, n_sites):
        return n_sites

    def keeps_sector(self, space):
        return not space.is_sector or space.magnetisation == 0


@jax.tree_util.register_static
@dataclasses.dataclass(frozen=True)
class Mixture(Move):
    """Apply, independently in every chain, ``components[k]`` with probability ``weights[k]``.

    The proposal kernel is the mixture

        T(x → x') = Σ_k p_k T_k(x → x'),

    which is symmetric whenever every T_k is symmetric and the p_k do not depend on x, so the
    Metropolis acceptance stays min(1, |ψ(x')/ψ(x)|²) (Hastings 1970; Tierney 1994). The
    mixture keeps a sector only if every component does.

    Every component is evaluated on the whole batch and each chain keeps the one it drew, so a
    step costs the sum of the component costs (moves are cheap next to evaluating ψ). The
    ``sites`` arrays of the components are padded with −1 to a common width K = max_k K_k.
    """

    components: tuple
    weights: tuple

    def __post_init__(self):
        try:
            moves, weights = tuple(self.components), tuple(self.weights)
        except TypeError as err:
            raise ValueError(f"Mixture takes a sequence of moves and one of weights, got {self.components!r}, "
                             f"{self.weights!r}") from err
        if not moves:
            raise ValueError("Mixture needs at least one component")
        if len(moves) != len(weights):
            raise ValueError(f"Mixture needs one weight per component, got {len(moves)} moves and weights {weights!r}")
        for move in moves:
            if not isinstance(move, Move):
                raise ValueError(f"Mixture component {move!r} is not a move (a psiloom.sampling.Move)")
        probs = []
        for w in weights:
            probs.append(positive_real("Mixture weight", w))
        total = float(np.sum(probs))
        if abs(total - 1.0) > 1e-9:
            raise ValueError(f"Mixture weights must sum to 1, got {probs} (sum {total})")
        object.__setattr__(self, "components", moves)
        object.__setattr__(self, "weights", tuple(probs))

    @property
    def conserves_magnetisation(self) -> bool:  # type: ignore[override]
        return all(m.conserves_magnetisation for m in self.components)

    def keeps_sector(self, space):
        return all(m.keeps_sector(space) for m in self.components)

    def check(self, n_sites):
        for m in self.components:
            m.check(n_sites)

    def moved_sites(self, n_sites):
        parts = [m.moved_sites(n_sites) for m in self.components]
        return None if any(p is None for p in parts) else np.unique(np.concatenate(parts))

    def width(self, n_sites):
        return max(m.width(n_sites) for m in self.components)

    def __call__(self, key, x):
        k_pick, *k_moves = jax.random.split(key, len(self.components) + 1)
        outs = [move(k, x) for move, k in zip(self.components, k_moves)]
        width = max(sites.shape[1] for _, sites in outs)
        proposals = jnp.stack([xp for xp, _ in outs])  # (n_moves, C, N)
        sites = jnp.stack([
            jnp.pad(s.astype(jnp.int32), ((0, 0), (0, width - s.shape[1])), constant_values=-1) for _, s in outs
        ])  # (n_moves, C, K)
        choice = jax.random.categorical(k_pick, jnp.log(jnp.asarray(self.weights)), shape=(x.shape[0],))
        rows = jnp.arange(x.shape[0])
        return proposals[choice, rows], sites[choice, rows]


@jax.tree_util.register_static
@dataclasses.dataclass(frozen=True)
class OrderedMove(Move):
    """Proposals visited in a fixed order, the same in every chain (a *systematic scan*).

    ``move(position, x) -> (x', sites)`` applies proposal ``position mod n_positions`` of
    ``table`` to every chain: flip site ``s`` (``kind="flip"``) or swap the spins of bond
    ``(i, j)`` (``kind="exchange"``). ``sites`` has shape ``(K,)``, shared by all chains, which
    spares fast-update states a per-chain gather of their tables. Each proposal is an involution
    (x → x' → x), hence symmetric, and the Metropolis step with it satisfies detailed balance;
    the composition over a cycle leaves |ψ|² invariant (sequential updating; e.g. Landau &
    Binder, *A Guide to Monte Carlo Simulations*, ch. 4, from memory) and is ergodic when the
    table covers the sites (flips) or a connected set of bonds (exchange). Chains stay
    independent: the order is deterministic and involves no shared random numbers.

    :meth:`randomised` is the version with one uniformly drawn entry per chain.
    """

    table: Any
    kind: str

    def __post_init__(self):
        if self.kind not in (FLIP, EXCHANGE):
            raise ValueError(f"kind must be 'flip' or 'exchange', got {self.kind!r}")
        width = 1 if self.kind == FLIP else 2
        object.__setattr__(self, "table", site_table(self.table, width, f"ordered {self.kind} table"))

    @property
    def array(self) -> np.ndarray:
        """The table as an int64 array (one row of sites per scan position)."""
        return np.asarray(self.table, dtype=np.int64)

    @property
    def n_positions(self) -> int:
        """Number of positions of the systematic scan (rows of the table)."""
        return len(self.table)

    @property
    def conserves_magnetisation(self) -> bool:  # type: ignore[override]
        return self.kind == EXCHANGE

    def randomised(self) -> Move:
        """The random-order move over the same table (:class:`SingleFlip` needs a full table of sites)."""
        if self.kind == EXCHANGE:
            return BondExchange(self.table)
        return SingleFlip()

    def __call__(self, position, x):
        self.check(x.shape[1])
        sites = self.sites_at(position)
        if self.kind == FLIP:
            return x.at[:, sites[0]].multiply(-1), sites
        i, j = sites[0], sites[1]
        return x.at[:, i].set(x[:, j]).at[:, j].set(x[:, i]), sites

    def width(self, n_sites):
        return 1 if self.kind == FLIP else 2

    def check(self, n_sites):
        _check_table(self.array, n_sites, f"ordered {self.kind} table")

    def moved_sites(self, n_sites):
        return np.unique(self.array)

    def entry_table(self, n_sites):
        return self.array, self.kind

    def ordered(self, n_sites):
        return self

    def sites_at(self, positions) -> jax.Array:
        """The changed sites of proposals ``positions`` (any shape ``P``): int32 ``(*P, K)``."""
        return jnp.asarray(self.array, jnp.int32)[jnp.mod(positions, self.n_positions)]

    def proposed_values(self, old: jax.Array) -> jax.Array:
        """New values at the sites of one proposal from the old ones ``(n, K)``: ``−x_s`` for a
        flip, the two values swapped for an exchange (what a call of the move writes into ``x``)."""
        return -old if self.kind == FLIP else old[:, ::-1]

    def __repr__(self) -> str:
        return f"OrderedMove({self.kind}, {self.n_positions} positions)"


#: The single-spin flip (a ready instance of :class:`SingleFlip`).
single_flip = SingleFlip()
#: Swap of a random up spin with a random down spin (a ready :class:`PairExchange`).
pair_exchange = PairExchange()
#: Flip of every spin (a ready :class:`GlobalFlip`).
global_flip = GlobalFlip()


def choose_move(space, move: Move | None = None, bonds=None) -> Move:
    """The move a sampler uses on ``space``: ``move`` itself after checking that it is a
    :class:`Move`, keeps the space's sector and stays within its sites, or the default — single
    flips for an unconstrained space, nearest-neighbour exchange over ``bonds`` (any-pair
    exchange without bonds) otherwise. A space with its own ``choose_move(move, bonds)`` method
    (:class:`psiloom.fermions.FermionSpace`) makes that choice itself."""
    own = getattr(space, "choose_move", None)
    if own is not None:  # spaces with their own moves (fermions) choose and check them
        return own(move, bonds)
    if move is not None and bonds is not None:
        raise ValueError("give either move= or bonds=, not both (bonds= picks a BondExchange move)")
    if bonds is not None:
        exchange = BondExchange(bonds)
        exchange.check(space.n_sites)  # bad bonds are refused even where single flips are the default
    if move is None:
        if space.is_sector:
            move = exchange if bonds is not None else pair_exchange
        else:
            move = single_flip
    if not isinstance(move, Move):
        raise TypeError(f"move must be a psiloom.sampling.Move (e.g. single_flip, BondExchange(bonds)), got {move!r}")
    if not move.keeps_sector(space):
        raise ValueError(
            f"{move!r} changes the magnetisation but the space fixes magnetisation={space.magnetisation}; "
            "use an exchange move"
        )
    move.check(space.n_sites)
    moved = move.moved_sites(space.n_sites)
    if moved is not None and moved.size < space.n_sites:
        still = sorted(set(range(space.n_sites)) - set(moved.tolist()))
        raise ValueError(f"{move!r} never moves sites {still}: the chains would keep their starting values "
                         "there and sample a wrong distribution; give bonds that touch every site (e.g. "
                         "lattice.bonds) or use pair_exchange")
    return move
