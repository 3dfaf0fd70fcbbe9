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

import re
from typing import ClassVar

import jax
import jax.numpy as jnp
import flax.errors
import flax.linen as nn


def default_real_dtype():
    """float64 when ``jax_enable_x64`` is on (recommended for SR accuracy), else float32."""
    return jnp.float64 if jax.config.jax_enable_x64 else jnp.float32


def normal_init(stddev: float):
    """Initializer ``(key, shape, dtype) -> stddev · N(0, 1)`` (complex dtypes: real and imaginary
    parts each of variance 1/2, as :func:`jax.random.normal`), drawn as one flat vector and
    reshaped: the same distribution as ``flax.linen.initializers.normal``, at a fraction of its
    compile time (threefry over a 2-d shape compiles to several times the code of a flat draw)."""
    def init(key, shape, dtype=jnp.float64):
        size = 1
        for n in shape:
            size *= int(n)
        return stddev * jax.random.normal(key, (size,), dtype).reshape(shape)

    return init


def default_complex_dtype():
    """complex128 when ``jax_enable_x64`` is on, else complex64."""
    return jnp.complex128 if jax.config.jax_enable_x64 else jnp.complex64


def check_width(x) -> int:
    """The number of sites of a batch ``x`` (its last axis); ``ValueError`` when it is zero."""
    n = x.shape[-1]
    if n < 1:
        raise ValueError(f"configurations need at least one site, got shape {tuple(x.shape)}")
    return n


def check_log_amplitudes(out, x, who: str = "the trial state"):
    """``out`` if it holds one log-amplitude per configuration of the batch ``x`` (B, N), i.e.
    has shape ``(B,)``; a ``ValueError`` otherwise (shapes are static: safe under ``jit``)."""
    expected = tuple(x.shape[:-1])
    if tuple(jnp.shape(out)) != expected:
        raise ValueError(
            f"{who} must return one log-amplitude per configuration: expected shape {expected} "
            f"for configurations of shape {tuple(x.shape)}, got {tuple(jnp.shape(out))}"
        )
    return out


def _built_for(message: str, n: int) -> str:
    """The number of sites a parameter was made for, read from Flax's shape-mismatch message
    (the existing shape's entry where the expected shape has ``n``); "another number of" if unclear."""
    shapes = re.findall(r"shape \(([0-9, ]*)\)", message)
    if len(shapes) >= 2:
        expected, existing = ([int(v) for v in s.split(",") if v.strip()] for s in shapes[:2])
        for want, have in zip(expected, existing):
            if want == n and have != n:
                return str(have)
    return "another number of"


class TrialState(nn.Module):
    """Base class: ``__call__(x) = log ψ(x)`` for ``x`` of shape ``(..., n_sites)``.

    ``sign_only_phase`` (class attribute, default False): a subclass sets it True when its
    log ψ is complex only to carry a sign, Im log ψ ∈ {0, π} (real amplitudes of either sign,
    e.g. determinants of real orbitals). With real parameters the optimizers then skip the
    identically zero derivatives of Im log ψ (:class:`~psiloom.optimize.SampleGeometry`). Setting
    it on a state whose phase varies with the parameters gives wrong SR steps.
    """

    sign_only_phase: ClassVar[bool] = False

    def __call__(self, x):
        x = jnp.asarray(x)
        if x.ndim == 0:
            raise ValueError(f"a configuration needs at least one axis, got a scalar of shape {x.shape}")
        lead, n = x.shape[:-1], check_width(x)
        flat = x.reshape(-1, n)
        try:
            out = self.log_amplitude(flat)
        except flax.errors.ScopeParamShapeError as err:
            built = _built_for(str(err), n)
            raise ValueError(
                f"trial state {type(self).__name__} was built for {built} sites, got configurations of "
                f"{n} sites (shape {tuple(x.shape)}): {str(err).split(' (https')[0]}"
            ) from err
        return check_log_amplitudes(out, flat, f"trial state {type(self).__name__}").reshape(lead)

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
