"""Jastrow factors: symmetric multiplicative correlation terms ψ = e^{J(x)} · (determinants).

:class:`CuspJastrow` fixes the Kato cusp conditions (Kato 1957) exactly:

    J_cusp = Σ_{i<j} a_ij r_ij / (1 + r_ij / b_ij)  −  Σ_{i,I} Z_I r_iI / (1 + r_iI / c_I),

    a_ij = 1/2 for antiparallel spins, 1/4 for parallel spins (fixed), b_ij > 0 learned
    (one length for each spin pairing), c_I > 0 learned per nucleus.

Since ∂/∂r [a r/(1 + r/b)] = a at r = 0 whatever b is, the spherically averaged logarithmic
derivative of ψ at a coalescence is +1/2 (antiparallel), +1/4 (parallel) and −Z_I
(electron–nucleus) provided the rest of ψ is smooth there, as psiloom's cusp-free orbitals are.
Each term saturates at large distances (a·b, −Z_I c_I), so the orbitals set the decay.

With ``radial_terms = K > 0`` it adds short-range radial expansions that leave every cusp alone,

    J_radial = Σ_{i,I} Σ_k α_{σ_i,I,k} g(r_iI / ℓ_{I,k})  +  Σ_{i<j} Σ_k γ_{p_ij,k} g(r_ij / m_k),

    g(t) = (1 + t) e^{−t} = 1 − t²/2 + t³/3 − …   (g'(0) = 0: no change of slope at a coalescence),

with coefficients α per electron spin σ_i, nucleus and length and γ per spin pairing p_ij
(parallel, antiparallel) and length, all starting at zero, and learned lengths starting on the
grids ℓ_{I,k} = 2^k / (8 Z_I) and m_k = 2^k / 10 bohr (k = 0 … K−1). They give the state radial
freedom on the scale of a core (Li's 1s shell is ~0.3 bohr across), which the neural term's
softened distances (λ = 1 bohr) cannot resolve: expanding a one-body Jastrow in a few
fixed-shape radial functions is common practice in QMC Jastrow factors (the particular
functions here are our choice).

:class:`NeuralJastrow` adds a learnable symmetric part built from smooth features only (it
leaves the cusps alone): electron–electron–nucleus pair terms and one-electron terms,

    J_nn = Σ_{i<j} F(ρ_ij, s_ij, {ρ_iI + ρ_jI, ρ_iI ρ_jI}_I) + Σ_i G({ρ_iI}_I, s_i),

with ρ the softened distances of :mod:`psiloom.electrons.features`, s_ij = s_i s_j the spin
pairing, F and G small tanh networks whose last layers start at zero (so J_nn = 0 initially).
Both factors are symmetric under exchanging any two same-spin electrons.

With a :class:`~psiloom.electrons.NuclearCuspMap` in the state, both factors receive its output
(:class:`~psiloom.electrons.cusp_map.MappedCoordinates`) as ``mapped``, so that the smooth
gradients they have at a nucleus get the l = 1 cusp too. The neural term is evaluated at x̃.
Nucleus I's electron–nucleus term sees x̃ less I's own term of the map: unmapped near I, where
its form −Z_I r/(1 + r/c_I) is the cusp itself (mapping it there would add a curvature
−(Z_I²/2) r², a local-energy bump of ~1.5 Z_I² hartree across the map's range, measured as a
7× training variance on LiH), and mapped near the other nuclei. The electron–electron term uses
the blended separation

    d_ij = r̃_ij + (r_ij − r̃_ij) w(r_ij / s),     w(t) = (1 − t²)³ for t < 1, else 0,

with s from :func:`~psiloom.electrons.cusp_map.pair_blend_range`: d_ij = r_ij + O(r_ij³) keeps its
cusps exact (the map would stretch them near a nucleus), and d_ij = r̃_ij once the electrons are
more than s apart. Only while another electron is within s of one at a nucleus does the
electron–electron term miss the l = 1 cusp.
"""

from __future__ import annotations

from typing import ClassVar

import flax.linen as nn
import jax.numpy as jnp
import numpy as np

from psiloom._validation import nonnegative_int
from psiloom.electrons.cusp_map import cutoff, pair_blend_range
from psiloom.electrons.features import electron_electron, electron_nuclear, safe_distance, soft_distance, spin_signs
from psiloom.electrons.system import Molecule


def _inverse_softplus(y):
    return np.log(np.expm1(np.asarray(y, dtype=np.float64)))


def cusp_coefficients(system: Molecule, dtype=jnp.float64):
    """``(N, N)`` matrix of a_ij: 1/4 for parallel, 1/2 for antiparallel spins (diagonal 0)."""
    s = spin_signs(system, dtype)
    same = s[:, None] * s[None, :] > 0
    a = jnp.where(same, 0.25, 0.5)
    return a * (1.0 - jnp.eye(system.n_electrons, dtype=dtype))


class CuspJastrow(nn.Module):
    """Cusp-exact Jastrow factor ``J_cusp`` (see module docstring); returns J of shape ``(B,)``.

    Attributes:
        system: the molecule.
        nuclear: include the electron–nucleus term (set False when the orbitals carry the
            nuclear cusp themselves, e.g. plain Slater "s" functions).
        electronic: include the electron–electron term.
        radial_terms: K, the number of short-range radial functions per nucleus and per spin
            pairing (module docstring; 0: none).
    """

    system: Molecule
    nuclear: bool = True
    electronic: bool = True
    radial_terms: int = 0
    takes_mapped: ClassVar[bool] = True  # SlaterJastrow passes the cusp map's coordinates

    def __post_init__(self):
        nonnegative_int("radial_terms", self.radial_terms)
        super().__post_init__()

    @nn.compact
    def __call__(self, x, mapped=None):
        """J ``(B,)`` at ``x``, or with the cusp map's ``mapped`` coordinates x̃ (module docstring)."""
        dtype = x.dtype
        sys_ = self.system
        total = jnp.zeros(x.shape[:-2], dtype)
        if self.electronic and sys_.n_electrons > 1:
            lengths = nn.softplus(self.param("ee_length", lambda k: jnp.asarray(_inverse_softplus([1.0, 1.0]), dtype)))
            s = spin_signs(sys_, dtype)
            same = s[:, None] * s[None, :] > 0
            b = jnp.where(same, lengths[0], lengths[1])
            _, r2 = electron_electron(x)
            r = safe_distance(r2)
            if mapped is not None:
                r_mapped = safe_distance(electron_electron(mapped.coordinates)[1])
                r = r_mapped + (r - r_mapped) * cutoff(r / pair_blend_range(sys_))
            a = cusp_coefficients(sys_, dtype)
            total = total + 0.5 * jnp.sum(a * r / (1.0 + r / b), axis=(-2, -1))
            if self.radial_terms:
                k = self.radial_terms
                self.param("ee_radial_length", lambda key: jnp.asarray(_inverse_softplus(2.0 ** np.arange(k) / 10.0), dtype))
                self.param("ee_radial_coeff", nn.initializers.zeros, (2, k), dtype)
                total = total + self._pair_radial(r)
        if self.nuclear:
            z = jnp.asarray(sys_.charges, dtype)
            c = nn.softplus(self.param("en_length", lambda k: jnp.asarray(_inverse_softplus(1.0 / sys_.charges), dtype)))
            r = safe_distance(self._nuclear_r2(x, mapped))
            total = total - jnp.sum(z * r / (1.0 + r / c), axis=(-2, -1))
            if self.radial_terms:
                k = self.radial_terms
                start = (2.0 ** np.arange(k))[None, :] / (8.0 * np.asarray(sys_.charges, float)[:, None])  # (M, K)
                self.param("en_radial_length", lambda key: jnp.asarray(_inverse_softplus(start), dtype))
                self.param("en_radial_coeff", nn.initializers.zeros, (2, sys_.n_nuclei, k), dtype)
                total = total + jnp.sum(self._nuclear_radial(r), axis=-1)
        return total

    def _nuclear_radial(self, r):
        """``(B, N)``: each electron's Σ_{I,k} α_{σ_i,I,k} g(r_iI / ℓ_{I,k}) from ``r`` ``(B, N, M)``."""
        lengths = nn.softplus(self.get_variable("params", "en_radial_length"))
        alpha = self.get_variable("params", "en_radial_coeff")
        channel = (np.asarray(self.system.spins) < 0).astype(int)  # 0 for spin up, 1 for spin down
        t = r[..., None] / lengths  # (B, N, M, K)
        return jnp.sum(alpha[channel] * (1.0 + t) * jnp.exp(-t), axis=(-2, -1))

    def _pair_radial(self, r):
        """``(B,)``: Σ_{i<j} Σ_k γ_{p_ij,k} g(r_ij / m_k) from the separations ``r`` ``(B, N, N)``."""
        sys_ = self.system
        lengths = nn.softplus(self.get_variable("params", "ee_radial_length"))
        gamma = self.get_variable("params", "ee_radial_coeff")
        s = np.asarray(sys_.spins)
        pairing = (s[:, None] * s[None, :] < 0).astype(int)  # 0 parallel, 1 antiparallel
        upper = jnp.asarray(np.triu(np.ones((sys_.n_electrons,) * 2), k=1), r.dtype)
        t = r[..., None] / lengths  # (B, N, N, K)
        return jnp.sum(upper[..., None] * gamma[pairing] * (1.0 + t) * jnp.exp(-t), axis=(-3, -2, -1))

    def _nuclear_r2(self, x, mapped):
        """``(B, N, M)`` squared electron–nucleus distances, each nucleus's at x̃ less that
        nucleus's own shift when ``mapped`` is given (module docstring)."""
        if mapped is None:
            return electron_nuclear(x, self.system.positions)[1]
        u = mapped.without_own_term() - jnp.asarray(self.system.positions, x.dtype)
        return jnp.sum(u * u, axis=-1)

    def one_electron_terms(self, x, mapped=None):
        """``(B, N)``: each electron's share −Σ_I Z_I r_iI / (1 + r_iI / c_I) (+ its radial
        expansion Σ_{I,k} α_{σ_i,I,k} g(r_iI / ℓ_{I,k})) of the electron–nucleus term (zeros
        without it), with the cusp map's ``mapped`` as in
        ``__call__``. A product of one-electron factors, so it can be moved into the orbitals
        (used by Hartree-Fock pretraining). Call on a bound module."""
        sys_ = self.system
        r2 = self._nuclear_r2(x, mapped)
        if not self.nuclear:
            return jnp.zeros(r2.shape[:-1], x.dtype)
        c = nn.softplus(self.get_variable("params", "en_length"))
        r = safe_distance(r2)
        terms = -jnp.sum(jnp.asarray(sys_.charges, x.dtype) * r / (1.0 + r / c), axis=-1)
        return terms + self._nuclear_radial(r) if self.radial_terms else terms


class NeuralJastrow(nn.Module):
    """Learnable smooth symmetric Jastrow term ``J_nn`` (see module docstring); shape ``(B,)``.

    Attributes:
        system: the molecule.
        width: hidden width of the pair and one-electron networks.
        layers: hidden layers of each network.
        softening: λ (bohr) of the softened distances.
    """

    system: Molecule
    width: int = 16
    layers: int = 2
    softening: float = 1.0
    takes_mapped: ClassVar[bool] = True  # smooth everywhere: evaluated at the cusp map's x̃

    def _mlp(self, inputs, name):
        h = inputs
        for k in range(self.layers):
            h = jnp.tanh(nn.Dense(self.width, name=f"{name}_{k}", param_dtype=inputs.dtype)(h))
        out = nn.Dense(1, name=f"{name}_out", kernel_init=nn.initializers.zeros, param_dtype=inputs.dtype)(h)
        return out[..., 0]

    @nn.compact
    def __call__(self, x, mapped=None):
        """J_nn ``(B,)`` at ``x``, or at the cusp map's x̃ (``mapped.coordinates``) if given."""
        x = x if mapped is None else mapped.coordinates
        dtype = x.dtype
        sys_ = self.system
        n = sys_.n_electrons
        lam = self.softening
        _, r2n = electron_nuclear(x, sys_.positions)
        rho_n = soft_distance(r2n, lam)  # (B, N, M)
        spins = spin_signs(sys_, dtype)
        b = x.shape[0]
        one = jnp.concatenate([jnp.exp(-rho_n), rho_n / (1.0 + rho_n),
                               jnp.broadcast_to(spins[:, None], (b, n, 1))], axis=-1)
        total = jnp.sum(self._mlp(one, "one"), axis=-1)
        if n > 1:
            _, r2 = electron_electron(x)
            rho = soft_distance(r2, lam)[..., None]  # (B, N, N, 1)
            same = jnp.broadcast_to((spins[:, None] * spins[None, :])[None, :, :, None], rho.shape)
            sum_n = rho_n[:, :, None, :] + rho_n[:, None, :, :]
            prod_n = rho_n[:, :, None, :] * rho_n[:, None, :, :]
            pair = jnp.concatenate([jnp.exp(-rho), rho / (1.0 + rho), same,
                                    jnp.exp(-0.5 * sum_n), prod_n / (1.0 + prod_n)], axis=-1)
            upper = jnp.triu(jnp.ones((n, n), dtype), k=1)
            total = total + jnp.sum(self._mlp(pair, "pair") * upper, axis=(-2, -1))
        return total
