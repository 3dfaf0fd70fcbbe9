"""A trial state bound to its variables: ``log ψ`` as a callable that still knows its model.

Most samplers only need ``x ↦ log ψ(x)``. Some need more of the trial state: block Gibbs
sampling reads the RBM weights, direct sampling calls the autoregressive state's own
``sample`` method, fast-update paths ask for the state's fast updates
(:mod:`psiloom.states.fast`). :class:`BoundState` serves all of them: calling it gives
``model.apply(variables, x)``, and its ``model`` and ``variables`` attributes stay available.
``fast=False`` makes every consumer take the generic path of full re-evaluation.

It is a pytree (the variables are its leaves, the model and the flag are static), so it can be
passed through ``jax.jit`` and ``jax.lax`` control flow like any other argument.
"""

from __future__ import annotations

from typing import Any

import jax

from psiloom._validation import boolean


@jax.tree_util.register_pytree_node_class
class BoundState:
    """``log ψ`` of ``model`` at fixed ``variables``: ``BoundState(model, variables, fast=True)(x)``.

    ``fast``: whether consumers may use the model's fast updates (when it offers them).
    """

    __slots__ = ("model", "variables", "fast", "__weakref__")

    def __init__(self, model, variables: Any, fast: bool = True):
        if not hasattr(model, "apply"):
            raise ValueError(f"BoundState needs a Flax module with .apply, got {model!r}")
        fast = boolean("fast", fast)
        self.model = model
        self.variables = variables
        self.fast = fast

    def __call__(self, x):
        return self.model.apply(self.variables, x)

    def apply_method(self, method: str, *args, **kwargs):
        """``model.apply(variables, *args, method=method)`` for another method of the model."""
        return self.model.apply(self.variables, *args, method=method, **kwargs)

    def tree_flatten(self):
        """Pytree protocol: the variables are the leaves; model and ``fast`` are static."""
        return (self.variables,), (self.model, self.fast)

    @classmethod
    def tree_unflatten(cls, aux, children):
        """Pytree protocol: rebuild from :meth:`tree_flatten`'s output without checks."""
        obj = object.__new__(cls)
        obj.model, obj.fast = aux
        obj.variables = children[0]
        return obj

    def __repr__(self) -> str:
        return f"BoundState({type(self.model).__name__}, fast={self.fast})"
