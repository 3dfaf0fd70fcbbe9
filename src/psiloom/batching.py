"""Evaluating large batches in bounded memory."""

from __future__ import annotations

from typing import Callable

import jax
import jax.numpy as jnp

from psiloom._validation import positive_int


def map_in_chunks(fn: Callable, chunk: int | None, *arrays):
    """Apply ``fn`` to the leading-axis batch of ``arrays`` in chunks of ``chunk`` rows.

    Bounds peak memory to one chunk (``jax.lax.map`` runs chunks sequentially). Pads the
    batch to a multiple of ``chunk`` with copies of the first row and drops the padding.
    ``chunk=None`` (or a chunk ≥ batch) evaluates everything at once.

    Why not ``jax.lax.map(f, x, batch_size=chunk)``: that maps a function of *one row* (vmapped
    over each chunk) and evaluates the remainder rows in a second program of another shape.
    ``fn`` here is a function of a *batch* — a trial state's ``log_amplitude`` or the blocked
    fast local energy, which size their own inner blocks by the batch — so it must see whole
    ``(chunk, ...)`` batches, all of one shape (one compilation). A per-row function should use
    ``jax.lax.map(..., batch_size=)`` directly (as ``SampleGeometry.log_derivatives`` does).
    """
    if chunk is not None:
        chunk = positive_int("chunk", chunk)
    n = arrays[0].shape[0]
    if chunk is None or chunk >= n:
        return fn(*arrays)
    n_chunks = -(-n // chunk)
    pad = n_chunks * chunk - n

    def padded(a):
        if pad:
            a = jnp.concatenate([a, jnp.broadcast_to(a[:1], (pad, *a.shape[1:]))], axis=0)
        return a.reshape(n_chunks, chunk, *a.shape[1:])

    out = jax.lax.map(lambda args: fn(*args), tuple(padded(a) for a in arrays))
    return jax.tree_util.tree_map(lambda o: o.reshape(n_chunks * chunk, *o.shape[2:])[:n], out)
