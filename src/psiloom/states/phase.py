"""A pure phase built from a real trial state: ``log ψ(x) = i·f(x)``, ``f = Re log ψ_inner``.

Multiplying a positive amplitude state by it (``ProductState([amplitude, PurePhase(inner)])``)
separates modulus and phase, |ψ| from one network and arg ψ = f from the other, as in the
amplitude/phase pair of RBMs of neural-network state tomography (Torlai et al., Nat. Phys. 14,
447 (2018)). |ψ(x)| = 1 everywhere, so the phase factor never changes the Born probabilities in
the σᶻ basis. The inner state should be real (e.g. an :class:`~psiloom.states.RBM` with real
parameters); an imaginary part of its output is discarded.
"""

from __future__ import annotations

import flax.linen as nn
import jax.numpy as jnp

from psiloom.states.base import TrialState


class PurePhase(TrialState):
    """``log ψ(x) = i · Re log ψ_inner(x)`` (see the module docstring)."""

    inner: nn.Module

    def log_amplitude(self, x):
        if not isinstance(self.inner, nn.Module):
            raise TypeError(f"PurePhase needs a Flax module as inner, got {type(self.inner).__name__}")
        return 1j * jnp.real(self.inner(x))
