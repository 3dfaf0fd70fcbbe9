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
