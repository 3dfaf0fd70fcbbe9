"""Regularised solves of the TDVP system S θ̇ = G (:mod:`psiloom.dynamics.equation`).

S is estimated from samples and is often (nearly) singular: redundant parameters, directions
the samples do not resolve. Three regularisations, each a small frozen dataclass whose
``solve(system) -> θ̇`` is a pure, jit-compatible function:

:class:`DiagonalShift` (``shift``, ``relative``)
    θ̇ = (S + ε I + ε_rel diag S)⁻¹ G (an LU solve of the shifted, positive definite matrix).

:class:`PseudoInverse` (``rcond``)
    With the eigendecomposition S = V diag(σ) V†, keep only σ_k > rcond · σ_max:
    θ̇ = Σ_{σ_k > rcond σ_max} V_k (V_k† G)/σ_k. ``soft=True`` replaces the hard cut by the
    smooth factor 1/(1 + (rcond σ_max/σ_k)⁶) (Schmitt & Heyl 2020, from memory).

:class:`SignalToNoise` (``threshold``, ``rcond``)
    Schmitt & Heyl, PRL 125, 100503 (2020): in the eigenbasis of S the force components
    ρ_k = V_k† G = Σ_s w_s Q_sk (Q_sk = V_k† g_s, the per-sample contributions) carry Monte Carlo
    noise; their signal-to-noise ratio

        SNR_k = |ρ_k| / (σ(Q_{·k})/√n)

    (σ the standard deviation over the samples) decides which modes are kept. Following the paper
    (form from memory) each mode is damped smoothly,

        θ̇ = Σ_k V_k ρ_k / σ_k · 1/(1 + (threshold/SNR_k)⁶) · 1/(1 + (rcond σ_max/σ_k)⁶) .

    With exact estimators (n = ∞) SNR is infinite and only the spectral cut acts. Autocorrelation
    of the samples is ignored in σ (common practice), so the SNR is, if anything, overestimated.

All three return the same θ̇ as the plain inverse when S is well conditioned and the cuts are
small; ``make_regularisation`` builds one from a name for configuration files and benchmarks.
"""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp

from psiloom._validation import boolean, finite_real, one_of
from psiloom.dynamics.equation import TDVPSystem

__all__ = ["DiagonalShift", "PseudoInverse", "SignalToNoise", "make_regularisation", "REGULARISATIONS"]


def _nonnegative(name, value) -> float:
    return finite_real(name, value, minimum=0.0)


@dataclasses.dataclass(frozen=True)
class DiagonalShift:
    """θ̇ = (S + shift·I + relative·diag S)⁻¹ G (module docstring)."""

    shift: float = 1e-4
    relative: float = 0.0

    def __post_init__(self):
        object.__setattr__(self, "shift", _nonnegative("shift", self.shift))
        object.__setattr__(self, "relative", _nonnegative("relative", self.relative))
        if self.shift == 0 and self.relative == 0:
            raise ValueError("DiagonalShift needs shift > 0 or relative > 0 (else S may be singular)")

    def solve(self, system: TDVPSystem) -> jax.Array:
        """θ̇ solving the regularised ``S θ̇ = rhs`` of ``system`` (see the class docstring)."""
        s = system.matrix
        diag = jnp.real(jnp.diagonal(s))
        lam = self.shift + self.relative * diag
        a = s + jnp.diag(lam).astype(s.dtype)
        # LU, not Cholesky: on the CPU, jax's Cholesky of an 80×80 complex matrix took ~180 ms
        # against 0.25 ms for jnp.linalg.solve (measured on a loaded 2-core machine)
        return jnp.linalg.solve(a, system.rhs.astype(s.dtype))


def _eigh(system: TDVPSystem):
    sigma, v = jnp.linalg.eigh(system.matrix)
    sigma = jnp.maximum(sigma, 0.0)
    return sigma, v


def _soft(ratio):
    """1/(1 + ratio⁶) for ratio ≥ 0, without overflow (ratio may be huge or inf)."""
    r = jnp.minimum(ratio, 1e30)
    return 1.0 / (1.0 + r ** 6)


def _spectral_filter(sigma, rcond, soft):
    top = jnp.max(sigma)
    cut = rcond * top
    if soft:
        safe = jnp.where(sigma > 0, sigma, 1.0)
        return jnp.where(sigma > 0, _soft(cut / safe), 0.0)
    return (sigma > cut).astype(sigma.dtype)


@dataclasses.dataclass(frozen=True)
class PseudoInverse:
    """Spectral pseudo-inverse with a relative cutoff ``rcond`` (hard, or smooth with ``soft``)."""

    rcond: float = 1e-8
    soft: bool = False

    def __post_init__(self):
        object.__setattr__(self, "rcond", finite_real("rcond", self.rcond, minimum=0.0, maximum=1.0))
        object.__setattr__(self, "soft", boolean("soft", self.soft))

    def solve(self, system: TDVPSystem) -> jax.Array:
        """θ̇ solving the regularised ``S θ̇ = rhs`` of ``system`` (see the class docstring)."""
        sigma, v = _eigh(system)
        keep = _spectral_filter(sigma, self.rcond, self.soft)
        rho = jnp.conj(v).T @ system.rhs.astype(v.dtype)
        inv = jnp.where(keep > 0, keep / jnp.where(sigma > 0, sigma, 1.0), 0.0)
        return v @ (inv * rho)


@dataclasses.dataclass(frozen=True)
class SignalToNoise:
    """Signal-to-noise damping of the eigenmodes of S (Schmitt & Heyl 2020; module docstring)."""

    threshold: float = 4.0
    rcond: float = 1e-8

    def __post_init__(self):
        object.__setattr__(self, "threshold", _nonnegative("threshold", self.threshold))
        object.__setattr__(self, "rcond", finite_real("rcond", self.rcond, minimum=0.0, maximum=1.0))

    def signal_to_noise(self, system: TDVPSystem, v: jax.Array) -> jax.Array:
        """SNR_k of the force components in the eigenbasis ``v`` of S."""
        q = system.rhs_samples.astype(v.dtype) @ jnp.conj(v)  # Q_sk = V_k† g_s
        w = system.weights
        rho = w @ q
        spread = jnp.sqrt(jnp.maximum(w @ jnp.abs(q - rho) ** 2, 0.0))
        noise = spread / jnp.sqrt(system.n_effective)
        return jnp.where(noise > 0, jnp.abs(rho) / jnp.where(noise > 0, noise, 1.0), jnp.inf)

    def solve(self, system: TDVPSystem) -> jax.Array:
        """θ̇ solving the regularised ``S θ̇ = rhs`` of ``system`` (see the class docstring)."""
        sigma, v = _eigh(system)
        rho = jnp.conj(v).T @ system.rhs.astype(v.dtype)
        snr = self.signal_to_noise(system, v)
        damp = jnp.where(snr > 0, _soft(self.threshold / jnp.where(snr > 0, snr, 1.0)), 0.0)
        keep = _spectral_filter(sigma, self.rcond, soft=True) * damp
        inv = jnp.where(sigma > 0, keep / jnp.where(sigma > 0, sigma, 1.0), 0.0)
        return v @ (inv * rho)


#: Regularisations of the S solve by name, for :func:`make_regularisation`.
REGULARISATIONS = {"shift": DiagonalShift, "pinv": PseudoInverse, "snr": SignalToNoise}


def make_regularisation(name: str, **options):
    """A regularisation by name: ``"shift"`` (:class:`DiagonalShift`), ``"pinv"``
    (:class:`PseudoInverse`) or ``"snr"`` (:class:`SignalToNoise`), with its options."""
    name = one_of("regularisation", name, tuple(REGULARISATIONS))
    return REGULARISATIONS[name](**options)
