"""Configuration spaces.

:class:`SpinSpace` — ``n_sites`` spin-1/2 degrees of freedom in the σᶻ basis. A configuration
is a vector ``x`` with entries ``x_i = +1`` (spin up, σᶻ = +1, Sᶻ = +1/2) or ``x_i = −1``.
Batches have shape ``(n_samples, n_sites)``, sample axis leading, in the default JAX float
dtype (float64 when ``jax_enable_x64`` is on).

Optionally the space is restricted to a sector of fixed total magnetisation
``Sᶻ_tot = ½ Σ_i x_i`` (in units of ħ), given as ``magnetisation``; then the number of up spins is
``n_up = n_sites/2 + magnetisation``, which must be an integer in ``[0, n_sites]``.
"""

from __future__ import annotations

from dataclasses import dataclass
from math import comb

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import finite_real, nonnegative_int, positive_int

#: Largest space that :meth:`SpinSpace.configurations` will enumerate.
MAX_ENUMERATION = 2**26


@dataclass(frozen=True)
class SpinSpace:
    """Spin-1/2 configurations ``x ∈ {−1, +1}^n_sites``, optionally with fixed ``magnetisation``.

    ``n_sites`` is a positive integer; ``magnetisation`` is ``None`` or a finite real number (an
    integer or half-integer, in units of ħ) such that ``n_sites/2 + magnetisation`` is an integer
    in ``[0, n_sites]``. Anything else raises (a TypeError, which is also a ValueError, for a
    wrong type such as ``True``, ``'0'`` or a complex number).
    """

    n_sites: int
    magnetisation: float | None = None

    def __post_init__(self):
        n = self.n_sites
        n = positive_int("n_sites", n)
        object.__setattr__(self, "n_sites", n)
        if self.magnetisation is not None:
            # a bool, a string ('0') or a complex number is refused rather than converted
            sz = finite_real("magnetisation", self.magnetisation)
            n_up = n / 2 + sz
            if abs(n_up - round(n_up)) > 1e-12:
                parity = "odd" if n % 2 else "even"
                raise ValueError(
                    f"magnetisation={self.magnetisation!r} is impossible for n_sites={n} ({parity}): "
                    f"n_sites/2 + magnetisation must be an integer "
                    f"(magnetisation=0 needs an even number of sites)"
                )
            if not 0 <= round(n_up) <= n:
                raise ValueError(
                    f"magnetisation={self.magnetisation!r} is outside [-{n / 2}, {n / 2}] for n_sites={n}"
                )
            object.__setattr__(self, "magnetisation", sz)

    @property
    def is_sector(self) -> bool:
        """True when the total magnetisation is fixed."""
        return self.magnetisation is not None

    @property
    def n_up(self) -> int | None:
        """Number of up spins in the fixed-magnetisation sector (None when unconstrained)."""
        return None if self.magnetisation is None else int(round(self.n_sites / 2 + self.magnetisation))

    @property
    def size(self) -> int:
        """Number of basis states."""
        return 2**self.n_sites if self.n_up is None else comb(self.n_sites, self.n_up)

    def random(self, key: jax.Array, n: int) -> jax.Array:
        """``n`` uniformly random valid configurations, shape ``(n, n_sites)``."""
        n = nonnegative_int("n (number of configurations)", n)
        if self.n_up is None:
            return jnp.where(jax.random.bernoulli(key, 0.5, (n, self.n_sites)), 1.0, -1.0)
        # the n_up sites with the smallest of n_sites i.i.d. uniforms are up: their ranks are a
        # uniformly random permutation, so every configuration of the sector is equally likely
        # (one flat draw and two sorts compile in a fraction of the time of a shuffle per row)
        u = jax.random.uniform(key, (n * self.n_sites,)).reshape(n, self.n_sites)
        ranks = jnp.argsort(jnp.argsort(u, axis=1), axis=1)
        return jnp.where(ranks < self.n_up, 1.0, -1.0)

    def configurations(self) -> np.ndarray:
        """All basis states as a NumPy array ``(size, n_sites)`` of ±1, in increasing order of
        the integer code :func:`codes` (site 0 is the most significant bit, up = 1)."""
        if self.size > MAX_ENUMERATION:
            raise ValueError(f"space of {self.size} states is too large to enumerate (limit {MAX_ENUMERATION})")
        n = self.n_sites
        ints = np.arange(2**n, dtype=np.int64)
        bits = (ints[:, None] >> np.arange(n - 1, -1, -1)) & 1
        if self.n_up is not None:
            bits = bits[bits.sum(axis=1) == self.n_up]
        return (2 * bits - 1).astype(np.float64)

    def contains(self, x) -> np.ndarray:
        """Boolean mask: which rows of ``x`` are valid configurations of this space (host side)."""
        x = np.asarray(x)
        ok = np.all((x == 1) | (x == -1), axis=-1)
        if self.n_up is not None:
            ok &= np.sum(x > 0, axis=-1) == self.n_up
        return ok


def codes(x) -> np.ndarray:
    """Integer code of each ±1 configuration (site 0 = most significant bit, up = 1)."""
    bits = (np.asarray(x) > 0).astype(np.int64)
    n = bits.shape[-1]
    return bits @ (1 << np.arange(n - 1, -1, -1, dtype=np.int64))
