"""Fast amplitude updates: the protocol a trial state may implement, and its binding.

Metropolis proposals and the connected configurations of a local energy change only a few
sites of ``x``. A trial state that can evaluate

    Δ log ψ = log ψ(x') − log ψ(x),     x' = x except at K listed sites,

in less than a full evaluation implements **one** extra method,

    def fast_updates(self) -> FastUpdates | None

(``None`` when the state cannot offer them for its current configuration, e.g. a wrapper whose
wrapped state has no fast path), reached through ``model.apply(variables, method="fast_updates")``. It returns two pure
functions closed over whatever the state precomputes from its parameters (once per parameter
set, e.g. once per optimisation step):

    init(x) -> cache
        per-sample cache of a batch ``x`` (n, n_sites); every leaf has the sample axis leading.
    update(x, cache, sites, new_values) -> (delta, new_cache)
        ``sites``: int array (n, K), or (K,) for the same sites in every sample, padded with −1
        (the format returned by the moves of :mod:`psiloom.sampling.moves`);
        ``new_values``: (n, K) values x'_s at those sites (entries at padding are ignored);
        ``delta``: (n,) Δ log ψ (complex for complex states, then defined modulo 2πi);
        ``new_cache``: the cache of x'.

A third, optional function serves wrappers that know the old values at the changed sites
without holding ``x`` itself (e.g. :class:`~psiloom.states.Symmetrized`, whose images
``g·x`` would otherwise be rebuilt for every update):

    update_at(old_values, cache, sites, new_values) -> (delta, new_cache)
        the same as ``update`` with ``old_values`` (n, K) = the values of ``x`` at ``sites``;
        ``None`` (the default) when the state needs ``x`` itself.

A fourth, optional function runs whole Metropolis sweeps at once (a compiled kernel, e.g.
:mod:`psiloom.states.rbm_sweep`):

    sweeps(x, cache, log_amp, table, positions, log_u, kind) -> (xs, log_amps, cache, accepted)
        ``table`` (P, K): a NumPy array of the sites of the P possible proposals (K = ``kind`` =
        1 for flips, 2 for exchanges of the two sites' values); ``positions`` (n_sweeps, S, n) or
        (n_sweeps, S, 1): the entries proposed in turn (mod P) in every chain; ``log_u``
        (n_sweeps, S, n): log of the acceptance uniforms; ``xs`` (n_sweeps, n, n_sites) and
        ``log_amps`` (n_sweeps, n): the chains after every sweep; ``cache``: that of ``xs[-1]``;
        ``accepted`` (n_sweeps,) int: the accepted proposals per sweep. The chains must be those
        that ``update`` with the Metropolis rule produces from the same numbers.
        ``None`` (the default) when the state offers no such kernel.

Consumers never call the method themselves. They receive ``log ψ`` as a bound trial state
(:class:`~psiloom.states.BoundState`, callable as ``x -> log ψ(x)``, which the training loop
passes) and ask :func:`fast_updates_of` for the fast functions:
:class:`psiloom.sampling.MetropolisSampler` and :func:`psiloom.operators.local_values` (hence
``PauliSum.local_energy``) do so automatically. A trial state without the method, a plain
function, or a binding made with ``bind_amplitude(model, variables, fast=False)`` takes the
generic path of full re-evaluation. Both paths give the same results to rounding (tested in
``tests/test_fast_updates.py``).
"""

from __future__ import annotations

from typing import Any, Callable, NamedTuple

import jax
import jax.numpy as jnp

from psiloom.states.bound import BoundState


class FastUpdates(NamedTuple):
    """The two pure functions of the fast-update protocol (see the module docstring)."""

    init: Callable[[jax.Array], Any]
    update: Callable[[jax.Array, Any, jax.Array, jax.Array], tuple[jax.Array, Any]]
    update_at: Callable[[jax.Array, Any, jax.Array, jax.Array], tuple[jax.Array, Any]] | None = None
    sweeps: Callable[..., tuple[jax.Array, jax.Array, Any, jax.Array]] | None = None


def supports_fast_updates(model) -> bool:
    """Whether ``model`` (a trial-state module) implements ``fast_updates``."""
    return callable(getattr(model, "fast_updates", None))


@jax.tree_util.register_pytree_node_class
class BoundAmplitude(BoundState):
    """A :class:`~psiloom.states.BoundState` that can switch the fast path off.

    ``BoundAmplitude(model, variables, fast=False)(x)`` is ``model.apply(variables, x)`` and
    makes every consumer take the generic path of full re-evaluation. A plain ``BoundState``
    (or a ``BoundAmplitude`` with ``fast=True``) of a state implementing ``fast_updates``
    uses the fast path.
    """

    def __init__(self, model, variables, fast: bool = True):
        super().__init__(model, variables)
        self.use_fast = bool(fast)

    def tree_flatten(self):
        return (self.variables,), (self.model, self.use_fast)

    @classmethod
    def tree_unflatten(cls, aux, children):
        obj = object.__new__(cls)
        obj.model, obj.use_fast = aux
        obj.variables = children[0]
        return obj

    def __repr__(self) -> str:
        return f"BoundAmplitude({type(self.model).__name__}, fast={self.use_fast})"


def bind_amplitude(model, variables, fast: bool = True) -> BoundAmplitude:
    """Bind ``variables`` to ``model``: a callable ``x -> log ψ(x)``; ``fast=False`` forces the
    generic path."""
    return BoundAmplitude(model, variables, fast=fast)


def fast_updates_of(log_amplitude) -> FastUpdates | None:
    """The fast-update functions of a bound trial state, or ``None`` (generic path).

    ``log_amplitude`` qualifies when it is a :class:`~psiloom.states.BoundState` (or
    :class:`BoundAmplitude` with ``fast=True``) whose model implements ``fast_updates``.
    Each call evaluates the state's per-parameter precomputation, so call it once per
    parameter set, outside loops over proposals.
    """
    if not isinstance(log_amplitude, BoundState) or not getattr(log_amplitude, "use_fast", True):
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
