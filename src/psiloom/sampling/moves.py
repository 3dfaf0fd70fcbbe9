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


def single_flip(key: jax.Array, x: jax.Array):
    """Flip one uniformly chosen spin per chain (changes the magnetisation by ±1)."""
    c, n = x.shape
    site = jax.random.randint(key, (c,), 0, n)
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
        k = jax.random.randint(key, (x.shape[0],), 0, len(bonds))
        i, j = table[k, 0], table[k, 1]
        return _swap(x, i, j), jnp.stack([i, j], axis=1)

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
    if move is single_flip:
        return True
    return any(changes_magnetisation(m) for m, _ in getattr(move, "components", ()))


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
