"""Two-body Jastrow trial state on spin configurations.

    log ψ(x) = Σ_{i<j} x_i W_ij x_j  (+ Σ_i a_i x_i)

W is stored as a full ``N × N`` matrix of which only the strict upper triangle enters, so
every pair has exactly one parameter. Complex W gives a phase.
"""

from __future__ import annotations

from typing import Any

import jax.numpy as jnp
import flax.linen as nn

from psiloom._validation import finite_real
from psiloom.states.base import TrialState, normal_init, check_width, default_complex_dtype, default_real_dtype


class TwoBodyJastrow(TrialState):
    """``log ψ(x) = Σ_{i<j} x_i W_ij x_j`` with an optional one-body field."""

    complex_params: bool = False
    one_body: bool = False
    init_scale: float = 0.01
    param_dtype: Any = None

    @nn.compact
    def log_amplitude(self, x):
        n = check_width(x)
        init = normal_init(finite_real("init_scale", self.init_scale, minimum=0.0))
        dtype = self.param_dtype or (default_complex_dtype() if self.complex_params else default_real_dtype())
        w = self.param("pair", init, (n, n), dtype)
        w = jnp.triu(w, k=1)
        xc = x.astype(dtype)
        out = jnp.einsum("bi,ij,bj->b", xc, w, xc)
        if self.one_body:
            out = out + xc @ self.param("field", init, (n,), dtype)
        return out
