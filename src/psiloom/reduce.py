"""The one place where psiloom reduces over samples.

Every batch in psiloom carries the sample (chain / walker) axis as its *leading* axis, and
every average over samples goes through the functions here. Spreading samples over several
devices later (``jax.sharding`` with the leading axis sharded, or ``jax.distributed``) then
changes only where arrays live: these reductions are plain ``jnp`` reductions over axis 0,
which XLA turns into cross-device all-reduces when the axis is sharded (:mod:`psiloom.parallel`;
``tests/test_parallel.py`` checks that runs on 1, 2 and 4 devices agree). The median is the
exception: not a sum, it gathers the sharded axis.

Conventions: for a batch ``v`` of shape ``(n, ...)``

    sample_mean(v)      = (1/n) Σ_s v_s
    sample_variance(v)  = (1/n) Σ_s |v_s − mean|²        (biased, as used for VMC variances)
    sample_covariance   = (1/n) Σ_s conj(a_s − ā) (b_s − b̄)
"""

from __future__ import annotations

import jax.numpy as jnp


def sample_mean(values, axis: int = 0):
    """Mean over the sample axis (leading by convention)."""
    return jnp.mean(values, axis=axis)


def sample_sum(values, axis: int = 0):
    """Sum over the sample axis (leading by convention)."""
    return jnp.sum(values, axis=axis)


def sample_variance(values, axis: int = 0):
    """Biased variance (1/n) Σ |v − v̄|² over the sample axis; real even for complex input."""
    centred = values - jnp.mean(values, axis=axis, keepdims=True)
    return jnp.mean(jnp.real(centred * jnp.conj(centred)), axis=axis)


def sample_covariance(a, b, axis: int = 0):
    """(1/n) Σ_s conj(a_s − ā) (b_s − b̄) over the sample axis."""
    ca = a - jnp.mean(a, axis=axis, keepdims=True)
    cb = b - jnp.mean(b, axis=axis, keepdims=True)
    return jnp.mean(jnp.conj(ca) * cb, axis=axis)


def sample_median(values, axis: int = 0):
    """Median over the sample axis (real input; not a sum, so a sharded axis needs a gather)."""
    return jnp.median(values, axis=axis)
