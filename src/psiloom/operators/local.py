"""Local estimators of operators on lattice configurations.

For an operator O and a trial state ψ, the local value at configuration x is

    O_loc(x) = Σ_{x'} ⟨x|O|x'⟩ ψ(x') / ψ(x) = Σ_g m_g(x) exp(log ψ(x'_g) − log ψ(x)),

so that ⟨ψ|O|ψ⟩/⟨ψ|ψ⟩ = E_{x∼|ψ|²}[O_loc(x)]. With O = H this is the local energy.
The sum runs over the fixed number of connections of :meth:`PauliSum.connections`.

Two paths give the same values (to rounding):

* generic: evaluate ``log ψ`` on all ``G`` connected configurations, O(G·cost(ψ)) per sample;
* fast: when ``log_amplitude`` is a bound trial state with fast updates
  (:mod:`psiloom.states.fast`, e.g. the RBM) and the operator provides a ``flip_table``
  (``PauliSum`` does), the state's cache of ``x`` is built once per sample and each
  connection's Δ log ψ costs O(K) in the K flipped sites — O(G·K·M) per sample for an RBM
  with M hidden units instead of O(G·N·M). The diagonal connection contributes Δ = 0 exactly.

Both honour ``chunk``: at most ``chunk`` samples (times ``G`` connections) are in memory.
"""

from __future__ import annotations

from typing import Callable

import jax
import jax.numpy as jnp

from psiloom.batching import map_in_chunks
from psiloom.states.fast import FastUpdates, fast_updates_of

LogAmplitudeFn = Callable[[jax.Array], jax.Array]


def _local_block(log_amplitude: LogAmplitudeFn, operator, x, log_amp_x):
    x_conn, mels = operator.connections(x)  # (B, G, N), (B, G)
    b, g, n = x_conn.shape
    log_conn = log_amplitude(x_conn.reshape(b * g, n)).reshape(b, g)
    ratio = jnp.exp(log_conn - log_amp_x[:, None])
    terms = jnp.where(mels != 0, mels * ratio, 0)
    return jnp.sum(terms, axis=-1)


def _fast_local_block(fast: FastUpdates, operator, x):
    table = jnp.asarray(operator.flip_table)  # (G, K), −1 padding
    mels = operator.matrix_elements(x)  # (B, G)
    cache = fast.init(x)

    def one_connection(sites):  # the same K sites flipped in every sample
        flipped = -x[:, jnp.where(sites >= 0, sites, 0)]
        return fast.update(x, cache, sites, flipped)[0]

    delta = jax.vmap(one_connection, out_axes=1)(table)  # (B, G)
    moves = jnp.any(table >= 0, axis=1)
    ratio = jnp.where(moves, jnp.exp(delta), 1.0)
    terms = jnp.where(mels != 0, mels * ratio, 0)
    return jnp.sum(terms, axis=-1)


def local_values(
    log_amplitude: LogAmplitudeFn,
    operator,
    x: jax.Array,
    log_amp_x: jax.Array | None = None,
    chunk: int | None = None,
) -> jax.Array:
    """Local values ``O_loc(x)`` of ``operator`` for a batch ``x`` of shape ``(n_samples, n_sites)``.

    Args:
        log_amplitude: batched log-amplitude, ``(B, N) -> (B,)``, real or complex.
        operator: anything with a ``connections(x) -> (x_conn, mels)`` method (e.g. PauliSum).
        x: configurations, sample axis leading.
        log_amp_x: ``log ψ(x)`` when already known (saves one evaluation; unused on the fast path).
        chunk: evaluate at most this many samples at a time (bounds memory).
    Returns:
        ``(n_samples,)`` local values, complex if ψ or the matrix elements are complex.
    """
    if x.ndim != 2:
        raise ValueError(f"configurations must have shape (n_samples, n_sites), got {x.shape}")
    fast = fast_updates_of(log_amplitude) if hasattr(operator, "flip_table") else None
    if fast is not None:
        return map_in_chunks(lambda xs: _fast_local_block(fast, operator, xs), chunk, x)
    if log_amp_x is None:
        log_amp_x = map_in_chunks(log_amplitude, chunk, x)
    return map_in_chunks(lambda xs, ls: _local_block(log_amplitude, operator, xs, ls), chunk, x, log_amp_x)
