"""A small feed-forward network trial state.

    h⁰ = x,   h^{l+1} = g(W^l h^l + b^l),   log|ψ(x)| = w_r·h^L,   arg ψ(x) = w_φ·h^L

with ``g`` a smooth activation (default ``tanh``). The phase head exists only when
``complex_output`` is set; with it, ψ can represent sign structures that the modulus-only
network cannot.
"""

from __future__ import annotations

from typing import Any, Callable, Sequence

import jax.numpy as jnp
import flax.linen as nn

from psiloom._validation import positive_int, positive_real
from psiloom.states.base import TrialState, check_width, default_real_dtype


class FeedForward(TrialState):
    """Dense layers of widths ``hidden`` (as multiples of N when ``widths_per_site``)."""

    hidden: Sequence[float] = (2.0,)
    widths_per_site: bool = True
    activation: Callable = jnp.tanh
    complex_output: bool = False
    param_dtype: Any = None

    def _widths(self, n: int) -> list[int]:
        """Layer widths for ``n`` sites; ``hidden`` must be a sequence of positive numbers
        (positive integers when not ``widths_per_site``)."""
        if isinstance(self.hidden, (str, bytes)) or not isinstance(self.hidden, Sequence):
            raise TypeError(f"hidden must be a sequence of layer widths such as (2.0,), got {self.hidden!r} "
                            f"({type(self.hidden).__name__})")
        if self.widths_per_site:
            return [max(1, int(round(positive_real(f"hidden[{k}]", w) * n))) for k, w in enumerate(self.hidden)]
        return [positive_int(f"hidden[{k}]", w) for k, w in enumerate(self.hidden)]

    @nn.compact
    def log_amplitude(self, x):
        n = check_width(x)
        widths = self._widths(n)
        dtype = self.param_dtype or default_real_dtype()
        h = x.astype(dtype)
        for k, features in enumerate(widths):
            h = self.activation(nn.Dense(features, param_dtype=dtype, dtype=dtype, name=f"layer{k}")(h))
        out = nn.Dense(1, use_bias=False, param_dtype=dtype, dtype=dtype, name="modulus")(h)[:, 0]
        if self.complex_output:
            phase = nn.Dense(1, use_bias=False, param_dtype=dtype, dtype=dtype, name="phase")(h)[:, 0]
            out = out + 1j * phase
        return out
