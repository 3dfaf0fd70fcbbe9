"""A trial state bound to its variables: ``log ψ`` as a callable that still knows its model.

Most samplers only need ``x ↦ log ψ(x)``. Some need more of the trial state: block Gibbs
sampling reads the RBM weights, direct sampling calls the autoregressive state's own
``sample`` method. :class:`BoundState` serves both: calling it gives
``model.apply(variables, x)``, and its ``model`` and ``variables`` attributes stay available.

It is a pytree (the variables are its leaves, the model is static), so it can be passed
through ``jax.jit`` and ``jax.lax`` control flow like any other argument.
"""

from __future__ import annotations

from typing import Any

import jax


@jax.tree_util.register_pytree_node_class
class BoundState:
    """``log ψ`` of ``model`` at fixed ``variables``: ``BoundState(model, variables)(x)``."""

    __slots__ = ("model", "variables", "__weakref__")

    def __init__(self, model, variables: Any):
        if not hasattr(model, "apply"):
            raise ValueError(f"BoundState needs a Flax module with .apply, got {model!r}")
        self.model = model
        self.variables = variables

    def __call__(self, x):
        return self.model.apply(self.variables, x)

    def apply_method(self, method: str, *args, **kwargs):
        """``model.apply(variables, *args, method=method)`` for another method of the model."""
        return self.model.apply(self.variables, *args, method=method, **kwargs)

    def tree_flatten(self):
        return (self.variables,), self.model

    @classmethod
    def tree_unflatten(cls, model, children):
        obj = object.__new__(cls)
        obj.model = model
        obj.variables = children[0]
        return obj

    def __repr__(self) -> str:
        return f"BoundState({type(self.model).__name__})"
