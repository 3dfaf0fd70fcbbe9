"""Stochastic reconfiguration (natural gradient) as an optax transformation.

Given the real quantum geometric tensor S = Re⟨ΔO* ΔO⟩ = XᵀX and the force F = ½ ∇E
(see :mod:`psiloom.optimize.gradient`), the update direction is

    δ = (S + ε I)⁻¹ F ,

with diagonal shift ε (a float or an optax schedule of the step count). Chained with
``optax.sgd(η)`` this gives θ ← θ − η δ, a discretised imaginary-time step of length η
(Sorella 1998; Carleo & Troyer 2017). The transformation needs the per-sample geometry and
receives it as the extra keyword argument ``geometry`` (a :class:`SampleGeometry`), which the
training step passes to every transformation of an ``optax.chain``.

Solvers: ``"dense"`` forms the P×P matrix S and uses a Cholesky solve (cheap for few
parameters).
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp
import optax

from psiloom.optimize.flatten import ravel_real


class SRState(NamedTuple):
    count: jax.Array


def _as_schedule(value, name) -> Callable:
    if callable(value):
        return value
    v = float(value)
    if not v >= 0:
        raise ValueError(f"{name} must be >= 0, got {value!r}")
    return lambda count: v


def stochastic_reconfiguration(shift=1e-3, solver: str = "dense") -> optax.GradientTransformationExtraArgs:
    """Precondition the energy gradient with (S + shift·I)⁻¹, S the quantum geometric tensor.

    Args:
        shift: diagonal shift ε ≥ 0, a float or a schedule ``count -> ε``.
        solver: ``"dense"`` (P×P Cholesky).
    """
    if solver not in ("dense",):
        raise ValueError(f"unknown SR solver {solver!r}; available: 'dense'")
    shift_fn = _as_schedule(shift, "shift")

    def init(params):
        del params
        return SRState(count=jnp.zeros((), jnp.int32))

    def update(updates, state, params=None, *, geometry=None, **extra):
        del params, extra
        if geometry is None:
            raise ValueError(
                "stochastic_reconfiguration needs the keyword argument geometry=SampleGeometry(...); "
                "the psiloom training step passes it automatically"
            )
        g, unravel = ravel_real(updates)
        force = 0.5 * g
        x = geometry.jacobian()
        s = x.T @ x
        eps = shift_fn(state.count)
        s = s + eps * jnp.eye(s.shape[0], dtype=s.dtype)
        chol = jax.scipy.linalg.cho_factor(s, lower=True)
        delta = jax.scipy.linalg.cho_solve(chol, force)
        return unravel(delta.astype(g.dtype)), SRState(count=state.count + 1)

    return optax.GradientTransformationExtraArgs(init, update)
