"""Antisymmetric trial states: spin-factorised multi-determinant expansions times Jastrow factors.

    ψ(x) = e^{J(x)} Σ_{d=1}^{K} w_d det[φ^↑_{d,a}(r_i | x)] det[φ^↓_{d,a}(r_j | x)]

(i over the n_up spin-up electrons, j over the n_down spin-down ones). Each determinant is
evaluated as a signed logarithm (``jnp.linalg.slogdet``) and the sum with learned real weights
w_d as a signed log-sum-exp, so nothing overflows:

    log|Σ_d w_d s_d e^{l_d}| = m + log|Σ_d w_d s_d e^{l_d − m}|,   m = max_d l_d,

with the sign of the sum kept separately. Swapping two same-spin electrons swaps two rows of
one matrix in every determinant, so ψ changes sign exactly; swapping an up and a down electron
is not a symmetry of the spin-factorised form (it is the usual spin-assigned representation).
"""

from __future__ import annotations

from typing import Sequence

import flax.linen as nn
import jax
import jax.numpy as jnp

from psiloom.electrons.base import ElectronState
from psiloom.electrons.jastrow import CuspJastrow, NeuralJastrow
from psiloom.electrons.orbitals import NeuralOrbitals, SlaterTypeOrbitals
from psiloom.electrons.system import Molecule


def signed_log_det(matrices):
    """``(sign, log|det|)`` over the last two axes; a 0×0 matrix has determinant 1."""
    if matrices.shape[-1] != matrices.shape[-2]:
        raise ValueError(f"determinants need square matrices, got shape {matrices.shape}")
    if matrices.shape[-1] == 0:
        lead = matrices.shape[:-2]
        return jnp.ones(lead, matrices.dtype), jnp.zeros(lead, matrices.dtype)
    return jnp.linalg.slogdet(matrices)


def signed_log_sum_exp(signs, logs, weights=None, axis: int = -1):
    """``(sign, log|Σ w s e^l|)`` along ``axis`` (weights broadcast against ``signs``).

    JAX's signed log-sum-exp (shifted by the largest ``l``, which carries no gradient)."""
    b = signs if weights is None else signs * weights
    log_abs, sign = jax.nn.logsumexp(logs, axis=axis, b=b, return_sign=True)
    return sign, log_abs


class SlaterJastrow(ElectronState):
    """``ψ = e^{Σ J} Σ_d w_d det↑_d det↓_d`` from any orbital layer and Jastrow factors.

    Attributes:
        orbitals: a module mapping ``(B, N, 3)`` to ``(up (B, K, n_up, n_up), down (B, K,
            n_down, n_down))`` (e.g. :class:`SlaterTypeOrbitals`, :class:`NeuralOrbitals`).
        jastrows: modules mapping ``(B, N, 3)`` to ``(B,)``, added to log|ψ|.
    """

    orbitals: nn.Module
    jastrows: Sequence[nn.Module] = ()

    @nn.compact
    def signed_log_amplitude(self, x):
        up, down = self.orbitals(x)
        s_up, l_up = signed_log_det(up)
        s_dn, l_dn = signed_log_det(down)
        signs, logs = s_up * s_dn, l_up + l_dn  # (B, K)
        n_det = signs.shape[-1]
        if n_det > 1:
            weights = self.param("det_weights", lambda k: jnp.full((n_det,), 1.0 / n_det, x.dtype))
            sign, log = signed_log_sum_exp(signs, logs, weights)
        else:
            sign, log = signs[:, 0], logs[:, 0]
        for jastrow in self.jastrows:
            log = log + jastrow(x)
        return sign, log

    def orbital_matrices(self, x):
        """The orbital layer's ``(up, down)`` matrices for a batch ``(B, N, 3)``."""
        return self.orbitals(x)


def slater_jastrow(system: Molecule, n_det: int = 1, neural_jastrow: bool = True, width: int = 16,
                   layers: int = 2) -> SlaterJastrow:
    """Slater–Jastrow state: analytic Slater-type orbitals, cusp Jastrow (+ neural Jastrow)."""
    jastrows: list[nn.Module] = [CuspJastrow(system)]
    if neural_jastrow:
        jastrows.append(NeuralJastrow(system, width=width, layers=layers))
    return SlaterJastrow(SlaterTypeOrbitals(system, n_det), tuple(jastrows))


def neural_slater_jastrow(system: Molecule, n_det: int = 4, width: int = 16, channels: int = 8, layers: int = 2,
                          jastrow_width: int = 16) -> SlaterJastrow:
    """Neural-orbital state: :class:`NeuralOrbitals` determinants, cusp and neural Jastrows."""
    return SlaterJastrow(
        NeuralOrbitals(system, n_det, width=width, channels=channels, layers=layers),
        (CuspJastrow(system), NeuralJastrow(system, width=jastrow_width)),
    )
