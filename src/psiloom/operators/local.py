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
The fast path also bounds its working set (it takes at most ``chunk`` samples): the connections are taken
``CONNECTION_BLOCK`` at a time and the samples in blocks such that ``samples × connections ×
cache size`` stays near ``FAST_WORKING_SET`` numbers. The intermediates of one update are as
large as the cache (for a projected RBM, |G|·2M numbers per sample), and building them for all
samples and connections at once is several times slower on a CPU than blocks that stay small
(measured for a projected RBM on 10×10: 3.6 s per 1024 samples at once, 0.4-0.6 s in blocks of
64 samples × 16 connections; ``benchmarks/throughput.py`` times the local energy).
"""

from __future__ import annotations

from typing import Callable

import jax
import jax.numpy as jnp
import numpy as np

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


def check_spin_configurations(x, name: str = "x") -> None:
    """Raise ValueError unless every entry of ``x`` is +1 or −1.

    Local values of configurations holding 0/1, 0.5 or nan would otherwise come back finite
    and wrong (the matrix elements read ``x_i`` as a sign). The check runs on the host for
    concrete arrays only (one pass over the batch, outside ``jit``); traced arrays inside a
    jitted function are not checked (the samplers only ever produce ±1).
    """
    if isinstance(x, jax.core.Tracer):
        return
    arr = np.asarray(x)
    bad = ~((arr == 1) | (arr == -1))
    if bad.any():
        where = tuple(int(i) for i in np.argwhere(bad)[0])
        raise ValueError(
            f"{name} must hold spin configurations with entries ±1; entry {where} is {arr[where]!r} "
            "(0/1 occupations convert as x = 2n − 1)"
        )


CONNECTION_BLOCK = 16  # connections evaluated together on the fast path
FAST_WORKING_SET = 1 << 23  # numbers (64 MiB in float64) in flight per block on the fast path


def _fast_chunk(fast: FastUpdates, x) -> int:
    """Samples per block: the largest power of two with samples × CONNECTION_BLOCK × cache size
    ≤ FAST_WORKING_SET (powers of two divide the usual sample counts: no padding)."""
    cache = jax.eval_shape(fast.init, jax.ShapeDtypeStruct((1, *x.shape[1:]), x.dtype))
    per_sample = sum(max(1, int(leaf.size)) for leaf in jax.tree_util.tree_leaves(cache))
    fits = max(1, FAST_WORKING_SET // (CONNECTION_BLOCK * per_sample))
    return 1 << (fits.bit_length() - 1)


def _fast_local_block(fast: FastUpdates, operator, x):
    table = jnp.asarray(operator.flip_table)  # (G, K), −1 padding
    mels = operator.matrix_elements(x)  # (B, G)
    cache = fast.init(x)

    def one_connection(sites):  # the same K sites flipped in every sample
        old = x[:, jnp.where(sites >= 0, sites, 0)]
        return fast.update(old, cache, sites, -old)[0]

    # blocks of CONNECTION_BLOCK connections, vectorised inside a block (module docstring)
    delta = jax.lax.map(one_connection, table, batch_size=min(CONNECTION_BLOCK, table.shape[0])).T  # (B, G)
    moves = jnp.any(table >= 0, axis=1)
    ratio = jnp.where(moves, jnp.exp(delta), 1.0)
    terms = jnp.where(mels != 0, mels * ratio, 0)
    return jnp.sum(terms, axis=-1)


def local_estimates(
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
        chunk: evaluate at most this many samples at a time (bounds memory). ``None``: all at
            once on the generic path; the fast path takes blocks sized by the cache, never more
            than ``chunk`` samples (module docstring).
    Returns:
        ``(n_samples,)`` local values, complex if ψ or the matrix elements are complex.

    Raises:
        ValueError: for a concrete ``x`` holding anything but ±1 (not checked under ``jit``).
    """
    if x.ndim != 2:
        raise ValueError(f"configurations must have shape (n_samples, n_sites), got {x.shape}")
    n_op = getattr(operator, "n_sites", None)
    if isinstance(n_op, int) and x.shape[1] != n_op:
        raise ValueError(f"configurations have {x.shape[1]} sites (shape {tuple(x.shape)}), "
                         f"but the operator acts on {n_op} sites")
    check_spin_configurations(x)
    fast = fast_updates_of(log_amplitude) if hasattr(operator, "flip_table") else None
    if fast is not None:
        auto = _fast_chunk(fast, x)
        chunk = auto if chunk is None else min(int(chunk), auto)
        return map_in_chunks(lambda xs: _fast_local_block(fast, operator, xs), chunk, x)
    if log_amp_x is None:
        log_amp_x = map_in_chunks(log_amplitude, chunk, x)
    return map_in_chunks(lambda xs, ls: _local_block(log_amplitude, operator, xs, ls), chunk, x, log_amp_x)
