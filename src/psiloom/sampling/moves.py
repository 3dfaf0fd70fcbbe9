"""Symmetric proposal moves for Metropolis sampling of spin configurations.

A move is a pure function ``propose(key, x) -> (x', sites)`` acting on a batch of chains
``x`` of shape ``(n_chains, n_sites)`` (one independent proposal per chain). ``sites`` has
shape ``(n_chains, K)`` (K fixed per move) and lists the sites whose value may have changed,
padded with −1; fast-update trial states use it to update cached quantities in O(K) instead
of re-evaluating ψ. All moves here are symmetric, T(x→x') = T(x'→x), so the Metropolis
acceptance is min(1, |ψ(x')/ψ(x)|²).
"""

from __future__ import annotations

from typing import Callable

import jax
import jax.numpy as jnp
import numpy as np

Move = Callable[[jax.Array, jax.Array], tuple[jax.Array, jax.Array]]


def draw_entries(key: jax.Array, n_chains: int, n_entries: int) -> jax.Array:
    """The entry (site or bond index) each chain proposes in :func:`single_flip` and
    :func:`bond_exchange` moves: ``(n_chains,)`` int, uniform over ``range(n_entries)``."""
    return jax.random.randint(key, (n_chains,), 0, n_entries)


def single_flip(key: jax.Array, x: jax.Array):
    """Flip one uniformly chosen spin per chain (changes the magnetisation by ±1)."""
    c, n = x.shape
    site = draw_entries(key, c, n)
    rows = jnp.arange(c)
    return x.at[rows, site].multiply(-1), site[:, None].astype(jnp.int32)


def _swap(x, i, j):
    rows = jnp.arange(x.shape[0])
    xi, xj = x[rows, i], x[rows, j]
    return x.at[rows, i].set(xj).at[rows, j].set(xi)


def bond_exchange(bonds) -> Move:
    """Swap the two spins of a uniformly chosen bond (e.g. the nearest-neighbour bonds of a
    lattice); conserves the magnetisation. A bond with equal spins gives a null move."""
    bonds = np.asarray(bonds, dtype=np.int32).reshape(-1, 2)
    if len(bonds) == 0:
        raise ValueError("bond_exchange needs at least one bond")
    table = jnp.asarray(bonds)

    def propose(key: jax.Array, x: jax.Array):
        if int(bonds.max()) >= x.shape[1]:
            raise ValueError(f"bond site {int(bonds.max())} outside the {x.shape[1]}-site configuration")
        k = draw_entries(key, x.shape[0], len(bonds))
        i, j = table[k, 0], table[k, 1]
        return _swap(x, i, j), jnp.stack([i, j], axis=1)

    propose.bonds = bonds
    return propose


def pair_exchange(key: jax.Array, x: jax.Array):
    """Swap a uniformly chosen up spin with a uniformly chosen down spin (any distance);
    conserves the magnetisation and is symmetric because the numbers of up and down spins are
    fixed. A fully polarised chain is left unchanged."""
    k_up, k_down = jax.random.split(key)
    up = x > 0
    # uniform choice among the True entries: argmax of masked uniform noise
    u_up = jnp.where(up, jax.random.uniform(k_up, x.shape), -1.0)
    u_dn = jnp.where(~up, jax.random.uniform(k_down, x.shape), -1.0)
    i, j = jnp.argmax(u_up, axis=1), jnp.argmax(u_dn, axis=1)
    polarised = jnp.all(up, axis=1) | jnp.all(~up, axis=1)
    sites = jnp.where(polarised[:, None], -1, jnp.stack([i, j], axis=1)).astype(jnp.int32)
    return jnp.where(polarised[:, None], x, _swap(x, i, j)), sites


def mixture(components) -> Move:
    """A move that applies, independently in every chain, component ``k`` with probability p_k.

    ``components`` is a sequence of ``(move, probability)`` pairs; the probabilities must be
    positive and sum to one. The proposal kernel is the mixture

        T(x → x') = Σ_k p_k T_k(x → x'),

    which is symmetric whenever every T_k is symmetric and the p_k do not depend on x, so the
    Metropolis acceptance stays min(1, |ψ(x')/ψ(x)|²) (Hastings 1970; Tierney 1994). The
    mixture conserves the magnetisation only if every component does.

    Every component is evaluated on the whole batch and each chain keeps the one it drew, so a
    step costs the sum of the component costs (moves are cheap next to evaluating ψ). The
    ``sites`` arrays of the components are padded with −1 to a common width K = max_k K_k.
    """
    try:
        pairs = [(move, prob) for move, prob in components]
    except (TypeError, ValueError) as err:
        raise ValueError(f"mixture expects a sequence of (move, probability) pairs, got {components!r}") from err
    if not pairs:
        raise ValueError("mixture needs at least one (move, probability) pair")
    moves = []
    probs = []
    for move, prob in pairs:
        if not callable(move):
            raise ValueError(f"mixture component {move!r} is not a move (a callable (key, x) -> (x', sites))")
        try:
            p = float(prob)
        except (TypeError, ValueError) as err:
            raise ValueError(f"mixture probability {prob!r} is not a number") from err
        if not np.isfinite(p) or p <= 0.0:
            raise ValueError(f"mixture probabilities must be finite and > 0, got {prob!r}")
        moves.append(move)
        probs.append(p)
    total = float(np.sum(probs))
    if abs(total - 1.0) > 1e-9:
        raise ValueError(f"mixture probabilities must sum to 1, got {probs} (sum {total})")
    log_probs = jnp.log(jnp.asarray(probs))

    def propose(key: jax.Array, x: jax.Array):
        k_pick, *k_moves = jax.random.split(key, len(moves) + 1)
        outs = [move(k, x) for move, k in zip(moves, k_moves)]
        width = max(sites.shape[1] for _, sites in outs)
        proposals = jnp.stack([xp for xp, _ in outs])  # (n_moves, C, N)
        sites = jnp.stack([
            jnp.pad(s.astype(jnp.int32), ((0, 0), (0, width - s.shape[1])), constant_values=-1) for _, s in outs
        ])  # (n_moves, C, K)
        choice = jax.random.categorical(k_pick, log_probs, shape=(x.shape[0],))
        rows = jnp.arange(x.shape[0])
        return proposals[choice, rows], sites[choice, rows]

    propose.components = tuple(zip(moves, probs))
    return propose


def changes_magnetisation(move: Move) -> bool:
    """Whether ``move`` is (or mixes in) :func:`single_flip`, the move here that changes Σ x.

    Samplers use it to refuse such moves on a fixed-magnetisation space; moves written
    elsewhere are assumed to know their own constraints."""
    if move is single_flip or (isinstance(move, OrderedMove) and move.kind == "flip"):
        return True
    return any(changes_magnetisation(m) for m, _ in getattr(move, "components", ()))


class OrderedMove:
    """Proposals visited in a fixed order, the same in every chain (a *systematic scan*).

    ``move(position, x) -> (x', sites)`` applies proposal ``position mod n_positions`` of a
    table to every chain: flip site ``s`` (``kind="flip"``) or swap the spins of bond ``(i, j)``
    (``kind="exchange"``). ``sites`` has shape ``(K,)``, shared by all chains, which spares
    fast-update states a per-chain gather of their tables. Each proposal is an involution
    (x → x' → x), hence symmetric, and the Metropolis step with it satisfies detailed balance;
    the composition over a cycle leaves |ψ|² invariant (sequential updating; e.g. Landau &
    Binder, *A Guide to Monte Carlo Simulations*, ch. 4, from memory) and is ergodic when the
    table covers the sites (flips) or a connected set of bonds (exchange). Chains stay
    independent: the order is deterministic and involves no shared random numbers.

    ``move.random`` is the randomised version (one uniformly drawn entry per chain), used
    where a single proposal without a position is asked for.
    """

    def __init__(self, table, kind: str):
        if kind not in ("flip", "exchange"):
            raise ValueError(f"kind must be 'flip' or 'exchange', got {kind!r}")
        width = 1 if kind == "flip" else 2
        table = np.asarray(table, dtype=np.int32).reshape(-1, width)
        if len(table) == 0:
            raise ValueError(f"an ordered {kind} move needs at least one entry")
        if table.min() < 0:
            raise ValueError(f"negative site {int(table.min())} in the ordered {kind} move")
        self.kind = kind
        self.table = table
        self.n_positions = len(table)
        self.random = single_flip if kind == "flip" else bond_exchange(table)

    def __call__(self, position, x: jax.Array):
        if int(self.table.max()) >= x.shape[1]:
            raise ValueError(f"site {int(self.table.max())} outside the {x.shape[1]}-site configuration")
        sites = jnp.asarray(self.table)[jnp.mod(position, self.n_positions)]
        if self.kind == "flip":
            return x.at[:, sites[0]].multiply(-1), sites
        i, j = sites[0], sites[1]
        return x.at[:, i].set(x[:, j]).at[:, j].set(x[:, i]), sites

    def sites_at(self, positions) -> jax.Array:
        """The changed sites of proposals ``positions`` (any shape ``P``): int32 ``(*P, K)``."""
        return jnp.asarray(self.table)[jnp.mod(positions, self.n_positions)]

    def proposed_values(self, old: jax.Array) -> jax.Array:
        """New values at the sites of one proposal from the old ones ``(n, K)``: ``−x_s`` for a
        flip, the two values swapped for an exchange (what :meth:`__call__` writes into ``x``)."""
        return -old if self.kind == "flip" else old[:, ::-1]

    def __repr__(self) -> str:
        return f"OrderedMove({self.kind}, {self.n_positions} positions)"


def ordered_flips(n_sites: int) -> OrderedMove:
    """Flip sites 0, 1, …, n_sites − 1 in turn (every chain the same site)."""
    if isinstance(n_sites, bool) or not isinstance(n_sites, (int, np.integer)) or n_sites < 1:
        raise ValueError(f"n_sites must be a positive integer, got {n_sites!r}")
    return OrderedMove(np.arange(n_sites), "flip")


def ordered_exchange(bonds) -> OrderedMove:
    """Swap the spins of the bonds in the listed order (every chain the same bond)."""
    return OrderedMove(bonds, "exchange")


def ordered_version(move: Move, n_sites: int) -> OrderedMove:
    """The systematic-scan counterpart of :func:`single_flip` or of a :func:`bond_exchange` move."""
    if isinstance(move, OrderedMove):
        return move
    if move is single_flip:
        return ordered_flips(n_sites)
    if getattr(move, "bonds", None) is not None:
        return ordered_exchange(move.bonds)
    raise ValueError(
        f"order='sequential' needs single_flip or a bond_exchange move (or an OrderedMove), got {move!r}; "
        "use order='random' for other moves"
    )


def entry_table(move: Move, n_sites: int):
    """``(table, kind)`` of a move whose proposals pick one entry of a fixed table uniformly per
    chain (by :func:`draw_entries`) or in a fixed order: ``table`` (P, K) int sites, ``kind``
    ``"flip"`` (K = 1) or ``"exchange"`` (K = 2); ``None`` for other moves (e.g.
    :func:`pair_exchange`, whose choice depends on ``x``, or a mixture)."""
    if isinstance(move, OrderedMove):
        return move.table, move.kind
    if move is single_flip:
        return np.arange(n_sites, dtype=np.int32)[:, None], "flip"
    if getattr(move, "bonds", None) is not None:
        return move.bonds, "exchange"
    return None


def choose_move(space, move: Move | None = None, bonds=None) -> Move:
    """The move a sampler uses on ``space``: ``move`` itself after checking that it keeps a
    fixed magnetisation, or the default — single flips for an unconstrained space,
    nearest-neighbour exchange over ``bonds`` (any-pair exchange without bonds) otherwise."""
    if move is None:
        if space.constrained:
            return bond_exchange(bonds) if bonds is not None else pair_exchange
        return single_flip
    if space.constrained and changes_magnetisation(move):  # single_flip, also inside a mixture
        raise ValueError(
            f"single_flip changes the magnetisation but the space fixes total_sz={space.total_sz}; "
            "use an exchange move"
        )
    return move
