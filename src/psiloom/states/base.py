"""The trial-state interface.

A trial state is a Flax module mapping configurations to log-amplitudes ``log ψ(x)``
(complex in general: ``log ψ = log|ψ| + i·arg ψ``). To write a new one, subclass
:class:`TrialState` and implement :meth:`TrialState.log_amplitude` for a batch of shape
``(n_samples, n_sites)`` returning ``(n_samples,)``. Calling the module accepts any leading
batch shape (or a single configuration) and reshapes around that method, so samplers,
estimators, gradients and optimizers work unchanged on any subclass.

Parameters are an ordinary pytree (``model.init(key, x)``), so ``jax.grad``, ``jax.vmap``,
flattening for stochastic reconfiguration and checkpointing all work on them directly.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import flax.linen as nn


def default_real_dtype():
    """float64 when ``jax_enable_x64`` is on (recommended for SR accuracy), else float32."""
    return jnp.float64 if jax.config.jax_enable_x64 else jnp.float32


def default_complex_dtype():
    return jnp.complex128 if jax.config.jax_enable_x64 else jnp.complex64


class TrialState(nn.Module):
    """Base class: ``__call__(x) = log ψ(x)`` for ``x`` of shape ``(..., n_sites)``."""

    def __call__(self, x):
        x = jnp.asarray(x)
        if x.ndim == 0:
            raise ValueError(f"a configuration needs at least one axis, got a scalar of shape {x.shape}")
        lead, n = x.shape[:-1], x.shape[-1]
        out = self.log_amplitude(x.reshape(-1, n))
        return out.reshape(lead)

    def log_amplitude(self, x):  # pragma: no cover - abstract
        """``log ψ`` of a batch ``x`` of shape ``(n_samples, n_sites)``; returns ``(n_samples,)``."""
        raise NotImplementedError(f"{type(self).__name__} must implement log_amplitude(self, x)")


def init_parameters(model: nn.Module, space, key: jax.Array):
    """Initialise ``model``'s parameters for configurations of ``space``; returns the variables."""
    x = space.random(key, 1)
    return model.init(key, x)


def check_input_size(model: nn.Module, variables, space) -> None:
    """Raise a clear ValueError when ``variables`` were made for a different number of sites."""
    example = jax.eval_shape(lambda k: space.random(k, 1), jax.random.PRNGKey(0))
    probe = jax.ShapeDtypeStruct(example.shape, example.dtype)
    size = getattr(space, "n_sites", example.shape[1:])
    try:
        out = jax.eval_shape(model.apply, variables, probe)
    except Exception as err:  # flax reports a parameter shape mismatch in its own words
        raise ValueError(
            f"trial state {type(model).__name__} does not accept configurations of "
            f"{size} sites (the space's size): {err}"
        ) from err
    if out.shape != (1,):
        raise ValueError(
            f"trial state {type(model).__name__} must return one log-amplitude per configuration, "
            f"got output shape {out.shape} for input shape {example.shape}"
        )


def count_real_parameters(variables) -> int:
    """Number of real parameters (a complex parameter counts twice)."""
    leaves = jax.tree_util.tree_leaves(variables)
    return int(sum(l.size * (2 if jnp.iscomplexobj(l) else 1) for l in leaves))
