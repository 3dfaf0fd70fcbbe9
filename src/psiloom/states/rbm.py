"""Restricted Boltzmann machine trial state.

With visible spins ``x_i = ±1`` and ``M = α·N`` hidden units ``h_j = ±1``,

    ψ(x) = Σ_h exp(Σ_i a_i x_i + Σ_j b_j h_j + Σ_ij W_ji h_j x_i)
         = exp(a·x) Π_j 2 cosh θ_j(x),        θ(x) = W x + b,

so ``log ψ(x) = a·x + Σ_j log(2 cosh θ_j)``. With complex parameters ψ carries a phase.
``log(2 cosh z)`` is evaluated stably for complex ``z`` as ``w + log1p(exp(−2w))`` with
``w = ±z`` chosen so that ``Re w ≥ 0``.
"""

from __future__ import annotations

from typing import Any

import jax.numpy as jnp
import flax.linen as nn

from psiloom.states.base import TrialState, default_complex_dtype, default_real_dtype


def log_two_cosh(z):
    """``log(2 cosh z)`` for real or complex ``z``, without overflow."""
    w = jnp.where(jnp.real(z) < 0, -z, z)
    return w + jnp.log1p(jnp.exp(-2.0 * w))


class RBM(TrialState):
    """RBM with hidden-unit density ``alpha`` (M = round(alpha·N) hidden units).

    Attributes:
        alpha: hidden units per visible spin (> 0).
        complex_params: complex weights (a phase-carrying ψ) instead of real ones.
        visible_bias / hidden_bias: include the ``a`` / ``b`` terms.
        init_scale: standard deviation of the Gaussian initial weights.
    """

    alpha: float = 1.0
    complex_params: bool = False
    visible_bias: bool = True
    hidden_bias: bool = True
    init_scale: float = 0.01
    param_dtype: Any = None

    def _dtype(self):
        if self.param_dtype is not None:
            return self.param_dtype
        return default_complex_dtype() if self.complex_params else default_real_dtype()

    def hidden_preactivation(self, x):
        """θ(x) = W x + b, shape ``(n_samples, M)`` (kept per chain by fast-update paths)."""
        n = x.shape[-1]
        if self.alpha <= 0:
            raise ValueError(f"alpha must be > 0, got {self.alpha}")
        m = max(1, int(round(self.alpha * n)))
        dtype = self._dtype()
        init = nn.initializers.normal(self.init_scale)
        kernel = self.param("kernel", init, (n, m), dtype)
        theta = x.astype(dtype) @ kernel
        if self.hidden_bias:
            theta = theta + self.param("hidden_bias", init, (m,), dtype)
        return theta

    @nn.compact
    def log_amplitude(self, x):
        theta = self.hidden_preactivation(x)
        out = jnp.sum(log_two_cosh(theta), axis=-1)
        if self.visible_bias:
            a = self.param("visible_bias", nn.initializers.normal(self.init_scale), (x.shape[-1],), self._dtype())
            out = out + x.astype(a.dtype) @ a
        return out
