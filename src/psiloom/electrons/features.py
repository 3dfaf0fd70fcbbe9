"""Geometry of electron configurations and permutation-equivariant electron features.

Geometry (all lengths in bohr). For electrons r_i and nuclei R_I:

    u_iI = r_i − R_I,  r_iI = |u_iI|,          Δ_ij = r_i − r_j,  r_ij = |Δ_ij|.

Smooth versions. Distances have a cone-shaped kink at coalescence (|r| is not differentiable
at 0), which would add to the cusp of ψ there. The features that feed networks therefore use
the *softened* distance and direction

    ρ(r) = sqrt(r² + λ²) − λ,        n(u) = u / sqrt(r² + λ²),

both smooth functions of the displacement (ρ ≈ r²/2λ near 0, ≈ r − λ far away). Networks built
only from smooth features leave the electron–nucleus and electron–electron cusps entirely to the
Jastrow factor, which sets them exactly (Kato 1957).

:class:`MomentMixer` is psiloom's permutation-equivariant feature network. Each electron carries
a feature vector h_i (its own spin is one input). A layer forms, for every electron, two kinds of
pair-weighted *moments* of the other electrons' features, with radial kernels

    k_c(i, j) = exp(−γ_c ρ(r_ij)) · (1 + t_c s_ij),     s_ij = +1 same spin, −1 opposite,

(γ_c > 0 learned decay rates, t_c ∈ (−1, 1) learned spin contrasts, c = 1…C channels):

    scalar moment   m_ic = Σ_{j≠i} k_c(i, j) (A h_j)_c / (N − 1)
    vector moment   M_ic = Σ_{j≠i} k'_c(i, j) (B h_j)_c n(Δ_ij) / (N − 1)      (a 3-vector)

and updates  h_i ← h_i + tanh(W h_i + U m_i + V |M_i|² + b)  (|M_i|² squared norm per channel,
rotation invariant). Relabelling electrons permutes the rows of the output in the same way
(equivariance): sums over j are symmetric, and the spin contrast depends only on the spin pair.

Published ideas it combines (the combination is psiloom's): learned radial filters of
interparticle distances weighting neighbours' features (continuous-filter convolutions, Schütt
et al., NeurIPS 2017); rotation invariants from contracted vector moments of neighbour
directions (moment tensors, Shapeev, Multiscale Model. Simul. 14, 1153 (2016); Drautz, PRB 99,
014104 (2019)); residual updates (He et al., CVPR 2016); and one shared network for both spins
with a continuous spin contrast instead of separate same-spin and opposite-spin streams. In
psiloom the features feed the backflow displacement (:mod:`psiloom.electrons.backflow`), not
the orbital values directly.
"""

from __future__ import annotations

import flax.linen as nn
import jax.numpy as jnp
import numpy as np

from psiloom.electrons.system import Molecule


def electron_nuclear(x, positions):
    """``(u, r2)``: displacements ``(B, N, M, 3)`` and squared distances ``(B, N, M)``."""
    u = x[..., :, None, :] - jnp.asarray(positions, dtype=x.dtype)
    return u, jnp.sum(u * u, axis=-1)


def electron_electron(x):
    """``(Δ, r2)``: displacements r_i − r_j ``(B, N, N, 3)`` and squared distances ``(B, N, N)``."""
    d = x[..., :, None, :] - x[..., None, :, :]
    return d, jnp.sum(d * d, axis=-1)


def safe_distance(r2):
    """|r| from r² with a finite gradient where r² = 0 (the diagonal i = j): returns 0 there."""
    zero = r2 == 0
    return jnp.where(zero, 0.0, jnp.sqrt(jnp.where(zero, 1.0, r2)))


def soft_distance(r2, softening: float = 1.0):
    """ρ = sqrt(r² + λ²) − λ: smooth at r = 0, ≈ r at large r (bohr)."""
    return jnp.sqrt(r2 + softening**2) - softening


def spin_signs(system: Molecule, dtype=jnp.float64):
    """``(N,)`` +1 for the first n_up electrons, −1 for the rest."""
    return jnp.asarray(system.spins, dtype=dtype)


def one_electron_inputs(x, system: Molecule, softening: float = 1.0):
    """Per-electron inputs ``(B, N, 4 M + 1)``: ρ(r_iI), n(u_iI) for each nucleus, and the spin."""
    u, r2 = electron_nuclear(x, system.positions)
    s = jnp.sqrt(r2 + softening**2)
    rho = s - softening
    direction = u / s[..., None]
    b, n, m = r2.shape
    spin = jnp.broadcast_to(spin_signs(system, x.dtype)[:, None], (b, n, 1))
    return jnp.concatenate([rho, direction.reshape(b, n, 3 * m), spin], axis=-1)


def _inverse_softplus(y):
    return np.log(np.expm1(y))


class MomentMixer(nn.Module):
    """Permutation-equivariant electron features ``(B, N, 3) → (B, N, width)`` (see module doc).

    Attributes:
        system: the molecule (nuclear positions, n_up).
        width: feature size per electron.
        channels: number C of radial moment channels per layer.
        layers: number of moment-mixing layers.
        softening: λ (bohr) of the smooth distances.
    """

    system: Molecule
    width: int = 16
    channels: int = 8
    layers: int = 2
    softening: float = 1.0

    @nn.compact
    def __call__(self, x):
        dtype = x.dtype
        n = x.shape[-2]
        if n != self.system.n_electrons:
            raise ValueError(f"MomentMixer was built for {self.system.n_electrons} electrons, got shape {x.shape}")
        h = jnp.tanh(nn.Dense(self.width, name="embed", param_dtype=dtype)(one_electron_inputs(x, self.system, self.softening)))
        if n == 1 or self.layers == 0:
            return h
        delta, r2 = electron_electron(x)
        s = jnp.sqrt(r2 + self.softening**2)
        rho = (s - self.softening)[..., None]  # (B, N, N, 1)
        direction = delta / s[..., None]  # (B, N, N, 3)
        spins = spin_signs(self.system, dtype)
        same = (spins[:, None] * spins[None, :])[..., None]  # (N, N, 1)
        off = (1.0 - jnp.eye(n, dtype=dtype))[..., None] / (n - 1)
        rates0 = _inverse_softplus(np.geomspace(0.2, 3.0, self.channels))
        for layer in range(self.layers):
            def kernel(tag):
                rates = nn.softplus(self.param(f"decay_{tag}{layer}", lambda k, s: jnp.asarray(rates0, dtype), (self.channels,)))
                contrast = jnp.tanh(self.param(f"contrast_{tag}{layer}", nn.initializers.zeros, (self.channels,), dtype))
                return jnp.exp(-rho * rates) * (1.0 + contrast * same) * off  # (B, N, N, C)

            scalar_in = nn.Dense(self.channels, use_bias=False, name=f"scalar_in{layer}", param_dtype=dtype)(h)
            vector_in = nn.Dense(self.channels, use_bias=False, name=f"vector_in{layer}", param_dtype=dtype)(h)
            m = jnp.einsum("bijc,bjc->bic", kernel("s"), scalar_in)
            vec = jnp.einsum("bijc,bijx,bjc->bicx", kernel("v"), direction, vector_in)
            q = jnp.sum(vec * vec, axis=-1)
            update = (nn.Dense(self.width, name=f"self{layer}", param_dtype=dtype)(h)
                      + nn.Dense(self.width, use_bias=False, name=f"scalar_out{layer}", param_dtype=dtype)(m)
                      + nn.Dense(self.width, use_bias=False, name=f"vector_out{layer}", param_dtype=dtype)(q))
            h = h + jnp.tanh(update)
        return h
