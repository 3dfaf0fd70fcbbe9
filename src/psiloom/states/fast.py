"""Fast amplitude updates: the protocol a trial state may implement.

Metropolis proposals and the connected configurations of a local energy change only a few
sites of ``x``. A trial state that can evaluate

    Δ log ψ = log ψ(x') − log ψ(x),     x' = x except at K listed sites,

in less than a full evaluation implements **one** extra method,

    def fast_updates(self) -> FastUpdates | None

(``None`` when the state cannot offer them for its current configuration, e.g. a wrapper whose
wrapped state has no fast path), reached through ``model.apply(variables, method="fast_updates")``.
It returns pure functions closed over whatever the state precomputes from its parameters (once
per parameter set, e.g. once per optimisation step):

    init(x) -> cache
        per-sample cache of a batch ``x`` (n, n_sites); every leaf has the sample axis leading.
    update(old_values, cache, sites, new_values) -> (delta, new_cache)
        ``sites``: int array (n, K), or (K,) for the same sites in every sample, padded with −1
        (the format returned by the moves of :mod:`psiloom.sampling.moves`);
        ``old_values``, ``new_values``: (n, K) values x_s and x'_s at those sites (entries at
        padding are ignored); ``delta``: (n,) Δ log ψ (complex for complex states, then defined
        modulo 2πi); ``new_cache``: the cache of x'.

The update sees only the values at the changed sites, never ``x`` itself: wrappers
(:class:`~psiloom.states.Symmetrized`) then move each image ``g·x`` without rebuilding it, and
systematic scans read and write only K sites. A state whose update needs more of ``x`` keeps it
in its cache.

An optional field hands samplers the plain arrays of an RBM-like state, for which they own
compiled sweep kernels (:mod:`psiloom.sampling.compiled`):

    dense_rbm: RBMArrays | None
        the real dense kernel W (N, M), the biases b (M,) and a (N,) (or None) and the tables
        e^{±2W} (cache dtype); the cache must then be an :class:`~psiloom.states.RBMCache`.

Consumers never call the method themselves. They receive ``log ψ`` as a
:class:`~psiloom.states.BoundState` (callable as ``x -> log ψ(x)``, which the training loop
passes) and ask :func:`fast_updates_of` once per call (per ``sample`` or local-energy call,
never per proposal): :class:`psiloom.sampling.MetropolisChains`,
:class:`psiloom.sampling.TemperingSampler` and :func:`psiloom.operators.local_estimates` (hence
``PauliSum.local_energy``) do so automatically. A trial state without the method, a plain
function, or ``BoundState(model, variables, fast=False)`` takes the generic path of full
re-evaluation. Both paths give the same results to rounding (``tests/test_fast_updates.py``).
"""

from __future__ import annotations

from typing import Any, Callable, NamedTuple

import jax
import jax.numpy as jnp

from psiloom.states.bound import BoundState


class RBMArrays(NamedTuple):
    """Plain arrays of a real RBM-like state for compiled kernels (see the module docstring)."""

    kernel: jax.Array  # (N, M) W, real
    hidden_bias: jax.Array | None  # (M,) b, or None
    visible_bias: jax.Array | None  # (N,) a, or None
    rise: jax.Array  # (N, M) e^{2W} in the cache dtype
    fall: jax.Array  # (N, M) e^{−2W} in the cache dtype


class FastUpdates(NamedTuple):
    """The pure functions of the fast-update protocol (see the module docstring)."""

    init: Callable[[jax.Array], Any]
    update: Callable[[jax.Array, Any, jax.Array, jax.Array], tuple[jax.Array, Any]]
    dense_rbm: RBMArrays | None = None


def supports_fast_updates(model) -> bool:
    """Whether ``model`` (a trial-state module) implements ``fast_updates``."""
    return callable(getattr(model, "fast_updates", None))


def fast_updates_of(log_amplitude) -> FastUpdates | None:
    """The fast-update functions of a bound trial state, or ``None`` (generic path).

    ``log_amplitude`` qualifies when it is a :class:`~psiloom.states.BoundState` with
    ``fast=True`` whose model implements ``fast_updates``. Each call evaluates the state's
    per-parameter precomputation, so call it once per parameter set, outside loops over
    proposals.
    """
    if not isinstance(log_amplitude, BoundState) or not log_amplitude.fast:
        return None
    if not supports_fast_updates(log_amplitude.model):
        return None
    out = log_amplitude.apply_method("fast_updates")
    if out is None:
        return None
    if not isinstance(out, FastUpdates):
        raise TypeError(
            f"{type(log_amplitude.model).__name__}.fast_updates must return FastUpdates(init, update) or None, "
            f"got {type(out).__name__}"
        )
    return out


def values_at(x: jax.Array, sites: jax.Array) -> jax.Array:
    """``x[s, sites[s, k]]`` for sites (n, K), or ``x[:, sites[k]]`` for shared sites (K,);
    entries at −1 padding read site 0 (callers mask them)."""
    idx = jnp.where(sites >= 0, sites, 0)
    if idx.ndim == 1:
        return x[:, idx]
    return jnp.take_along_axis(x, idx, axis=1)


def log_product(factors: jax.Array, block: int = 8) -> jax.Array:
    """``Σ_j log f_j`` over the last axis, evaluated as ``Σ_blocks log Π_{j∈block} f_j``.

    One logarithm per ``block`` factors instead of one per factor (logarithms dominate the
    cost of an update on CPU). A block product overflows only when ``block`` factors exceed
    the float range together (|log f| > 88 on average in float64); for complex factors the
    imaginary part is defined modulo 2π.
    """
    m = factors.shape[-1]
    n_blocks = -(-m // block)
    pad = n_blocks * block - m
    if pad:
        ones = jnp.ones((*factors.shape[:-1], pad), factors.dtype)
        factors = jnp.concatenate([factors, ones], axis=-1)
    grouped = factors.reshape(*factors.shape[:-1], block, n_blocks)  # blocks of strided factors
    return jnp.sum(jnp.log(jnp.prod(grouped, axis=-2)), axis=-1)
