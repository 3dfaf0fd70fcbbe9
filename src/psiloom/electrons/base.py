"""The trial-state interface for electrons in continuous space.

An electron trial state is a Flax module for a real wave function ψ(r_1, …, r_N) of electron
positions in bohr. Configurations have shape ``(..., n_electrons, 3)``: any leading batch shape,
then the electrons (the first ``n_up`` spin-up), then Cartesian components. Because ψ is real
but changes sign, the module returns

    __call__(x)      = log|ψ(x)|                 (what samplers, estimators and optimisers use)
    sign_and_log(x)  = (sign ψ(x), log|ψ(x)|)    (the sign, for antisymmetry checks)

To write a new one, subclass :class:`ElectronState` and implement
:meth:`ElectronState.signed_log_amplitude` for a batch ``(n_samples, n_electrons, 3)``
returning ``(sign, log|ψ|)``, each ``(n_samples,)`` (decorate it with ``@nn.compact`` when it
creates parameters). The base class reshapes around the last two axes, so a single
configuration ``(n_electrons, 3)`` maps to scalars.

For real ψ the variational energy gradient only needs ∂ log|ψ| / ∂θ, so the lattice-side
gradient, stochastic reconfiguration and training loop work on these modules unchanged.
"""

from __future__ import annotations

import jax.numpy as jnp

from psiloom.states.base import TrialState


class ElectronState(TrialState):
    """Base class: ``__call__(x) = log|ψ(x)|`` for ``x`` of shape ``(..., n_electrons, 3)``.

    A :class:`psiloom.states.TrialState` whose batch reshaping keeps the last *two* axes.
    """

    def __call__(self, x):
        return self.sign_and_log(x)[1]

    def log_amplitude(self, x):
        """log|ψ| of a batch ``(n_samples, n_electrons, 3)``."""
        return self.signed_log_amplitude(x)[1]

    def sign_and_log(self, x):
        """``(sign ψ, log|ψ|)`` with the leading shape of ``x``."""
        x = jnp.asarray(x)
        if x.ndim < 2 or x.shape[-1] != 3:
            raise ValueError(
                f"electron configurations need shape (..., n_electrons, 3) in bohr, got {x.shape}"
            )
        lead, n = x.shape[:-2], x.shape[-2]
        sign, log = self.signed_log_amplitude(x.reshape(-1, n, 3))
        return sign.reshape(lead), log.reshape(lead)

    def signed_log_amplitude(self, x):  # pragma: no cover - abstract
        """``(sign ψ, log|ψ|)`` of a batch ``(n_samples, n_electrons, 3)``; each ``(n_samples,)``."""
        raise NotImplementedError(f"{type(self).__name__} must implement signed_log_amplitude(self, x)")


def check_electron_count(name: str, x, expected: int) -> None:
    """Raise a ValueError when a configuration batch holds the wrong number of electrons."""
    if x.shape[-2] != expected:
        raise ValueError(f"{name} was built for {expected} electrons, got configurations of shape {x.shape}")
