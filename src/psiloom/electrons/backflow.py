"""Coordinate backflow: quasi-particle positions at which the orbitals are evaluated.

Classical backflow (Feynman & Cohen, Phys. Rev. 102, 1189 (1956); Kwon, Ceperley & Martin,
PRB 48, 12037 (1993); López Ríos, Ma, Drummond, Towler & Needs, PRE 74, 066701 (2006)) keeps
the determinant form but evaluates every orbital at a displaced *quasi-particle* position

    q_i = r_i + ξ_i(x),        det[φ_a(r_i)]  →  det[φ_a(q_i)],

where the displacement ξ_i depends on all electrons. Relabelling two same-spin electrons
exchanges their quasi-particle positions (ξ is permutation-equivariant), hence two rows of the
matrix, so ψ stays exactly antisymmetric.

psiloom's displacement (:class:`BackflowShift`) has the two published terms — a pair term along
the electron–electron separations (Feynman & Cohen's η(r_ij) (r_i − r_j), spin-dependent as in
Kwon, Ceperley & Martin) and an electron–nucleus term along u_iI = r_i − R_I (López Ríos et
al.'s μ term) — with amplitudes read from the environment features h_i of
:class:`~psiloom.electrons.features.MomentMixer` instead of fixed polynomials:

    ξ_i = Σ_{j≠i} Σ_c [a_c(h_i) + a'_c(h_j)] k_c(i, j) Δ_ij / (N − 1)
        + Σ_I Σ_c b_c(h_i) e^{−β_c ρ(r_iI)} u_iI,

    k_c(i, j) = e^{−γ_c ρ(r_ij)} (1 + t_c s_ij),      Δ_ij = r_i − r_j,

with ρ(r) = sqrt(r² + λ²) − λ the softened distance, s_ij = ±1 for parallel/antiparallel spins,
learned rates γ_c, β_c > 0 and contrasts t_c ∈ (−1, 1), and a, a', b linear read-outs of the
features that start at zero (so ξ = 0 and training starts from the plain orbitals).

Properties the rest of psiloom relies on: every term is a smooth function of the displacement
vectors (Δ and u enter linearly, distances only through ρ), so cusp-free orbitals stay smooth
at coalescences and the Jastrow factor alone sets the Kato cusps; r e^{−γ ρ(r)} is bounded, so
|ξ_i| is bounded and orbitals that decay exponentially in q still decay in r (ψ stays
normalisable).
"""

from __future__ import annotations

import flax.linen as nn
import jax.numpy as jnp
import numpy as np

from psiloom.electrons.features import MomentMixer, electron_electron, electron_nuclear, spin_signs
from psiloom.electrons.system import Molecule


def _inverse_softplus(y):
    return np.log(np.expm1(np.asarray(y, dtype=np.float64)))


class BackflowShift(nn.Module):
    """Backflow displacements ξ ``(B, N, 3)`` (bohr) of a batch ``(B, N, 3)`` (module docstring).

    Attributes:
        system: the molecule.
        width, channels, layers, softening: sizes of the :class:`MomentMixer` features and the
            number C of radial channels of the displacement.
    """

    system: Molecule
    width: int = 16
    channels: int = 8
    layers: int = 2
    softening: float = 1.0

    @nn.compact
    def __call__(self, x):
        dtype = x.dtype
        sys_ = self.system
        n = x.shape[-2]
        c = self.channels
        h = MomentMixer(sys_, self.width, self.channels, self.layers, self.softening, name="features")(x)
        zeros = nn.initializers.zeros
        lam = self.softening
        rates0 = _inverse_softplus(np.geomspace(0.3, 3.0, c))

        u, r2n = electron_nuclear(x, sys_.positions)  # (B, N, M, 3), (B, N, M)
        rho_n = jnp.sqrt(r2n + lam**2) - lam
        beta = nn.softplus(self.param("nuclear_rates", lambda k: jnp.asarray(rates0, dtype)))
        b = nn.Dense(c, name="nuclear_amplitude", kernel_init=zeros, param_dtype=dtype)(h)  # (B, N, C)
        radial = jnp.exp(-rho_n[..., None] * beta)  # (B, N, M, C)
        shift = jnp.einsum("bimc,bic,bimx->bix", radial, b, u)
        if n == 1:
            return shift

        delta, r2 = electron_electron(x)  # (B, N, N, 3), (B, N, N)
        rho = (jnp.sqrt(r2 + lam**2) - lam)[..., None]
        gamma = nn.softplus(self.param("pair_rates", lambda k: jnp.asarray(rates0, dtype)))
        contrast = jnp.tanh(self.param("pair_contrast", zeros, (c,), dtype))
        spins = spin_signs(sys_, dtype)
        same = (spins[:, None] * spins[None, :])[..., None]
        off = (1.0 - jnp.eye(n, dtype=dtype))[..., None] / (n - 1)
        kernel = jnp.exp(-rho * gamma) * (1.0 + contrast * same) * off  # (B, N, N, C)
        a_self = nn.Dense(c, name="pair_amplitude_self", kernel_init=zeros, param_dtype=dtype)(h)
        a_other = nn.Dense(c, use_bias=False, name="pair_amplitude_other", kernel_init=zeros, param_dtype=dtype)(h)
        weight = jnp.einsum("bijc,bic->bij", kernel, a_self) + jnp.einsum("bijc,bjc->bij", kernel, a_other)
        return shift + jnp.einsum("bij,bijx->bix", weight, delta)
