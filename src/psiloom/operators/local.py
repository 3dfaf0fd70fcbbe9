"""Local estimators of operators on lattice configurations.

For an operator O and a trial state ψ, the local value at configuration x is

    O_loc(x) = Σ_{x'} ⟨x|O|x'⟩ ψ(x') / ψ(x) = Σ_g m_g(x) exp(log ψ(x'_g) − log ψ(x)),

so that ⟨ψ|O|ψ⟩/⟨ψ|ψ⟩ = E_{x∼|ψ|²}[O_loc(x)]. With O = H this is the local energy.
The sum runs over the fixed number of connections of :meth:`PauliSum.connections`.
"""

from __future__ import annotations

from typing import Callable

import jax
import jax.numpy as jnp

from psiloom.batching import map_in_chunks

LogAmplitudeFn = Callable[[jax.Array], jax.Array]


def _local_block(log_amplitude: LogAmplitudeFn, operator, x, log_amp_x):
    x_conn, mels = operator.connections(x)  # (B, G, N), (B, G)
    b, g, n = x_conn.shape
    log_conn = log_amplitude(x_conn.reshape(b * g, n)).reshape(b, g)
    ratio = jnp.exp(log_conn - log_amp_x[:, None])
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
        log_amp_x: ``log ψ(x)`` when already known (saves one evaluation).
        chunk: evaluate at most this many samples at a time (bounds memory).
    Returns:
        ``(n_samples,)`` local values, complex if ψ or the matrix elements are complex.
    """
    if x.ndim != 2:
        raise ValueError(f"configurations must have shape (n_samples, n_sites), got {x.shape}")
    if log_amp_x is None:
        log_amp_x = map_in_chunks(log_amplitude, chunk, x)
    return map_in_chunks(lambda xs, ls: _local_block(log_amplitude, operator, xs, ls), chunk, x, log_amp_x)
