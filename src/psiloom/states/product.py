"""Products of trial states: ψ = Π_k ψ_k, i.e. ``log ψ = Σ_k log ψ_k``."""

from __future__ import annotations

from typing import Sequence

import flax.linen as nn

from psiloom.states.base import TrialState


class ProductState(TrialState):
    """``log ψ(x) = Σ_k log ψ_k(x)`` over the trial states in ``factors``."""

    factors: Sequence[nn.Module]

    def log_amplitude(self, x):
        if not self.factors:
            raise ValueError("ProductState needs at least one factor")
        out = 0
        for f in self.factors:
            out = out + f(x)
        return out
