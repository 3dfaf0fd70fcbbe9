"""Iterate averaging (Polyak-Ruppert) as an optax transformation.

Near convergence a stochastic optimiser's iterate θ_t wanders about the optimum θ* with a spread
set by the step size and the noise of the per-step estimates (for VMC: the finite batch of
samples behind the force and the metric). The mean of the iterates of the last stretch,

    θ̄_T = (1/m) Σ_{t = s+1}^{T} θ_t ,      θ_t = θ_{t-1} + u_{t-1} ,  m = T - s ,

averages that wander out: for a quadratic loss its excess over the optimum falls as 1/m while the
last iterate's stays at the level the step size sets (Ruppert 1988, Cornell ORIE TR 781; Polyak &
Juditsky, SIAM J. Control Optim. 30, 838 (1992)). The averaged parameters are a trial state of
their own: evaluate them in a separate pass (their energy is variational like any other's).

``iterate_average(start)`` passes the updates through unchanged and keeps θ̄ in its state; it
must be the last element of an ``optax.chain`` (it averages ``params + updates``, the parameters
the step will hold), e.g.::

    optax.chain(stochastic_reconfiguration(), optax.sgd(lr), iterate_average(start=1500))

and :func:`averaged_parameters` reads θ̄ back from the optimiser state (of the chain, or of a
training state's ``opt_state``). Optimisation itself is unchanged: the run follows θ_t, and a
search's history reports the energies of θ_t, not of θ̄.

Complex leaves are averaged as complex numbers; the mean is accumulated in the leaves' own dtype
(a running mean of many nearby iterates adds increments (θ_t - θ̄)/m that shrink with m: prefer
float64 parameters for long averaging windows).
"""

from __future__ import annotations

from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import optax

from psiloom._validation import integer


class IterateAverageState(NamedTuple):
    """State of :func:`iterate_average`.

    Attributes:
        n_updates: updates seen so far (int32); the iterate after update t is θ_{t+1}.
        n_averaged: iterates in the mean (int32; 0 until ``n_updates`` passes ``start``).
        mean: θ̄, a pytree like ``params`` (zeros while ``n_averaged`` is 0).
    """

    n_updates: jax.Array
    n_averaged: jax.Array
    mean: Any


def running_mean(mean, new, weight):
    """mean + (new − mean)·weight leaf by leaf, in each leaf's own dtype (complex leaves too)."""
    return jax.tree_util.tree_map(
        lambda m, x: (m + (x - m) * weight.astype(jnp.real(m).dtype)).astype(m.dtype), mean, new)


def find_unique_state(opt_state, state_type: type, transformation: str):
    """The one node of type ``state_type`` in an optimiser state (at any depth of a chain)."""
    is_state = lambda node: isinstance(node, state_type)
    found = [node for node in jax.tree_util.tree_leaves(opt_state, is_leaf=is_state) if is_state(node)]
    if len(found) != 1:
        name = transformation.split("(")[0]
        raise ValueError(f"the optimiser state holds {len(found)} {name} states; expected exactly one "
                         f"(chain {transformation} last)")
    return found[0]


def iterate_average(start: int = 0) -> optax.GradientTransformation:
    """Keep the running mean of the iterates produced from update number ``start`` on.

    Args:
        start: the number of updates after which averaging begins (≥ 0). The first iterate in
            the mean is the one produced by update ``start + 1`` (1-based), so with
            ``start = s`` after T updates the mean covers θ_{s+1} … θ_T (T - s iterates).

    Returns:
        a transformation whose ``update(updates, state, params)`` returns ``updates`` unchanged
        (``params`` is required: the mean is of ``params + updates``). Chain it last.
    """
    start = integer("iterate_average: start", start, minimum=0)

    def init(params):
        zeros = jax.tree_util.tree_map(jnp.zeros_like, params)
        return IterateAverageState(jnp.zeros((), jnp.int32), jnp.zeros((), jnp.int32), zeros)

    def update(updates, state, params=None):
        if params is None:
            raise ValueError("iterate_average needs the parameters: call update(updates, state, params)")
        n_updates = state.n_updates + 1
        averaging = n_updates > start
        n = state.n_averaged + averaging.astype(jnp.int32)
        weight = jnp.where(averaging, 1.0 / jnp.maximum(n, 1), 0.0)

        mean = running_mean(state.mean, jax.tree_util.tree_map(jnp.add, params, updates), weight)
        return updates, IterateAverageState(n_updates, n, mean)

    return optax.GradientTransformation(init, update)


def averaged_parameters(opt_state, *, minimum: int = 1):
    """θ̄ from an optimiser state that holds one :func:`iterate_average` (at any depth of a chain).

    Args:
        opt_state: the optimiser state (e.g. ``train_state.opt_state``).
        minimum: the fewest iterates the mean must hold (≥ 1); fewer raise ``ValueError`` (a mean
            of zero iterates is the zeros it starts from, not a trial state).

    Returns:
        the mean parameters (a pytree like ``params``).
    """
    minimum = integer("averaged_parameters: minimum", minimum, minimum=1)
    state = find_unique_state(opt_state, IterateAverageState, "iterate_average(start)")
    n = int(state.n_averaged)
    if n < minimum:
        raise ValueError(f"averaged_parameters: the mean holds {n} iterate(s) (after {int(state.n_updates)} updates), "
                         f"fewer than minimum={minimum}: run more updates past iterate_average's start")
    return state.mean
