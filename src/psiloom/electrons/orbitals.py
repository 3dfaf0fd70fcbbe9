"""Orbital layers: from electron positions to the matrices whose determinants form ψ.

Every orbital layer maps a batch ``x`` of shape ``(B, N, 3)`` to a pair of stacks of square
matrices, one per determinant d = 1…K and spin,

    up[b, d, i, a]   = φ^↑_{d,a}(r_i | x)    i, a < n_up      (electrons i are the up ones)
    down[b, d, i, a] = φ^↓_{d,a}(r_i | x)    i, a < n_down

:class:`SlaterTypeOrbitals` — analytic LCAO orbitals φ_a(r) = Σ_μ C_{aμ} χ_μ(r) over the
atom-centred Slater-type functions of :mod:`psiloom.electrons.basis`, with learnable exponents
ζ_μ and coefficients C (separate for each spin and determinant). Each entry depends on one
electron only.

:class:`BackflowOrbitals` — the same analytic orbitals evaluated at backflow quasi-particle
positions q_i = r_i + ξ_i(x) (:mod:`psiloom.electrons.backflow`), so that every entry depends on
the whole configuration:

    φ_{d,a}(r_i | x) = χ_{d,a}(q_i)  [+ e_{d,a}(r_i) f_{d,a}(h_i)  with ``envelope_term=True``]

where the optional additive term has the decaying envelope
e_{d,a}(r) = Σ_I π_{d,a,I} (1 + ζ_{a,I} r_iI) e^{−ζ_{a,I} r_iI} and a linear read-out f of the
backflow features h_i (initialised to zero). Exchanging two same-spin electrons exchanges two
rows of a matrix (ξ and h are equivariant), hence ψ changes sign exactly.

With ``cusp_free=True`` (default) the s-like pieces are smooth at the nuclei, leaving Kato's
cusps to :class:`~psiloom.electrons.jastrow.CuspJastrow`; with ``smooth_p=True`` the 2p-like
functions are smooth too ("pc"), and :class:`~psiloom.electrons.NuclearCuspMap` supplies the
cusps of the non-spherical parts.
"""

from __future__ import annotations

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np

from psiloom.electrons.backflow import BackflowShift
from psiloom.electrons.basis import BasisFunction, aufbau_guess, default_basis, normalisation
from psiloom.electrons.features import MomentMixer, electron_nuclear, safe_distance
from psiloom.electrons.system import Molecule
from psiloom._validation import positive_int


def _inverse_softplus(y):
    y = np.asarray(y, dtype=np.float64)
    return np.log(np.expm1(y))


def evaluate_basis(x, system: Molecule, basis: list[BasisFunction], zetas):
    """Values ``(B, N, K)`` of the K basis functions at every electron (normalised)."""
    u, r2 = electron_nuclear(x, system.positions)
    r = safe_distance(r2)
    centres = np.array([f.centre for f in basis])
    comps = np.array([f.component for f in basis])
    kinds = [f.kind for f in basis]
    r_k = r[..., centres]  # (B, N, K)
    pick = jnp.asarray(np.eye(3)[comps], x.dtype)  # (K, 3) one-hot Cartesian component
    u_k = jnp.sum(u[..., centres, :] * pick, axis=-1)
    is_ = lambda name: jnp.asarray([k == name for k in kinds])
    smooth = 1.0 + zetas * r_k  # (1 + ζr): zero radial slope at the nucleus
    prefactor = jnp.where(is_("sc"), smooth, 1.0)
    prefactor = jnp.where(is_("s2"), r_k * r_k, prefactor)
    prefactor = jnp.where(is_("p"), u_k, prefactor)
    prefactor = jnp.where(is_("pc"), u_k * smooth, prefactor)
    norms = normalisation("s", zetas)
    for name in ("sc", "s2", "p", "pc"):
        norms = jnp.where(is_(name), normalisation(name, zetas), norms)
    return norms * prefactor * jnp.exp(-zetas * r_k)


class SlaterTypeOrbitals(nn.Module):
    """Analytic LCAO orbitals over atom-centred Slater-type functions (see module docstring).

    Attributes:
        system: the molecule.
        n_det: number of determinants K.
        cusp_free: 1s-like functions without a nuclear cusp (pair with a nuclear Jastrow).
        smooth_p: 2p-like functions without an l = 1 slope of their own (pair with the cusp map).
        basis: basis functions (default :func:`~psiloom.electrons.basis.default_basis`).
        coefficients: optional starting coefficients ``(C_up, C_down)`` (default: aufbau guess).
        noise: scale of random perturbations added to the starting coefficients of
            determinants after the first (they would otherwise stay identical).
    """

    system: Molecule
    n_det: int = 1
    cusp_free: bool = True
    basis: tuple | None = None
    coefficients: tuple | None = None
    noise: float = 0.1
    smooth_p: bool = False

    def _basis(self):
        if self.basis is not None:
            return list(self.basis)
        return default_basis(self.system, self.cusp_free, smooth_p=self.smooth_p)

    @nn.compact
    def basis_values(self, x):
        """``(B, N, K)``: the K basis functions χ_k(r_i) at every electron, with the learned
        exponents. Every orbital is linear in them, φ_{d,a}(r_i) = Σ_k C_{d,a,k} χ_k(r_i)."""
        basis = self._basis()
        zetas = nn.softplus(self.param("exponents", lambda k: jnp.asarray(_inverse_softplus([f.zeta for f in basis]), x.dtype)))
        return evaluate_basis(x, self.system, basis, zetas)

    @nn.compact
    def __call__(self, x):
        dtype = x.dtype
        sys_ = self.system
        if x.shape[-2] != sys_.n_electrons:
            raise ValueError(f"orbitals were built for {sys_.n_electrons} electrons, got shape {x.shape}")
        positive_int("n_det", self.n_det)
        basis = self._basis()
        c_up, c_dn = self.coefficients if self.coefficients is not None else aufbau_guess(sys_, basis)
        chi = self.basis_values(x)  # (B, N, K)
        nu = sys_.n_up

        def coeff_init(start):
            start = jnp.asarray(start, dtype)

            def init(key):
                noise = self.noise * jax.random.normal(key, (self.n_det, *start.shape), dtype)
                noise = noise.at[0].set(0.0)
                return start[None] + noise
            return init

        c_up_p = self.param("coeff_up", coeff_init(c_up))  # (K, nu, n_basis)
        c_dn_p = self.param("coeff_down", coeff_init(c_dn))
        up = jnp.einsum("bik,dak->bdia", chi[:, :nu], c_up_p)
        down = jnp.einsum("bik,dak->bdia", chi[:, nu:], c_dn_p)
        return up, down


class BackflowOrbitals(nn.Module):
    """Analytic LCAO orbitals at backflow quasi-particle positions (see module docstring).

    Attributes:
        system: the molecule.
        n_det: number of determinants (all share one backflow displacement).
        width, channels, layers, softening: sizes of the :class:`~psiloom.electrons.backflow.BackflowShift`.
        cusp_free, smooth_p: passed to the analytic orbitals.
        envelope_term: add the enveloped neural term e(r_i) f(h_i) (off by default: see
            DEVELOPERS.md for the measurement).
    """

    system: Molecule
    n_det: int = 1
    width: int = 16
    channels: int = 8
    layers: int = 2
    softening: float = 1.0
    cusp_free: bool = True
    envelope_term: bool = False
    smooth_p: bool = False

    def _analytic(self):
        return SlaterTypeOrbitals(self.system, self.n_det, self.cusp_free, smooth_p=self.smooth_p, name="analytic")

    @nn.compact
    def basis_values(self, x):
        """``(B, N, K)``: the analytic basis functions at the quasi-particle positions, χ_k(q_i).
        Without the envelope term every orbital is linear in them (``SlaterTypeOrbitals.basis_values``)."""
        backflow = BackflowShift(self.system, self.width, self.channels, self.layers, self.softening, name="backflow")
        return self._analytic().basis_values(x + backflow(x))

    @nn.compact
    def __call__(self, x):
        dtype = x.dtype
        sys_ = self.system
        if x.shape[-2] != sys_.n_electrons:
            raise ValueError(f"orbitals were built for {sys_.n_electrons} electrons, got shape {x.shape}")
        backflow = BackflowShift(sys_, self.width, self.channels, self.layers, self.softening, name="backflow")
        shift = backflow(x)
        up, down = self._analytic()(x + shift)
        if not self.envelope_term:
            return up, down
        h = MomentMixer(sys_, self.width, self.channels, self.layers, self.softening, name="envelope_features")(x)
        _, r2 = electron_nuclear(x, sys_.positions)
        r = safe_distance(r2)  # (B, N, M)
        m, k = sys_.n_nuclei, self.n_det

        def block(name, hs, rs, base, n_orb):
            if n_orb == 0:
                return base
            b, n_el = hs.shape[:2]
            extra = nn.Dense(k * n_orb, name=f"extra_{name}", kernel_init=nn.initializers.zeros, param_dtype=dtype)(hs)
            extra = extra.reshape(b, n_el, k, n_orb).transpose(0, 2, 1, 3)
            zeta0 = np.sqrt(np.maximum(sys_.charges, 1.0))
            zeta = nn.softplus(self.param(f"envelope_rate_{name}",
                                          lambda key: jnp.broadcast_to(jnp.asarray(_inverse_softplus(zeta0), dtype), (n_orb, m))))
            weight = self.param(f"envelope_weight_{name}", lambda key: jnp.full((k, n_orb, m), 1.0 / m, dtype))
            zr = zeta[None, None] * rs[:, :, None, :]  # (B, n_el, n_orb, M)
            env = jnp.einsum("bian,dan->bdia", (1.0 + zr) * jnp.exp(-zr), weight)
            return base + env * extra

        nu = sys_.n_up
        return (block("up", h[:, :nu], r[:, :nu], up, sys_.n_up),
                block("down", h[:, nu:], r[:, nu:], down, sys_.n_down))
