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
from psiloom.electrons.cusp_map import NuclearCuspMap
from psiloom.electrons.jastrow import CuspJastrow, NeuralJastrow
from psiloom.electrons.orbitals import BackflowOrbitals, SlaterTypeOrbitals
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
            n_down, n_down))`` (e.g. :class:`SlaterTypeOrbitals`, :class:`BackflowOrbitals`).
        jastrows: modules mapping ``(B, N, 3)`` to ``(B,)``, added to log|ψ|.
        cusp_map: optional per-electron coordinate map x → x̃ (e.g. :class:`NuclearCuspMap`):
            the orbital layer sees x̃; Jastrow factors that declare ``takes_mapped`` are called
            as ``jastrow(x, mapped=...)`` with the map's :class:`~psiloom.electrons.cusp_map.MappedCoordinates`,
            the others as ``jastrow(x)``.
    """

    orbitals: nn.Module
    jastrows: Sequence[nn.Module] = ()
    cusp_map: nn.Module | None = None

    def orbital_coordinates(self, x):
        """The coordinates the orbital layer sees: ``cusp_map(x)`` (:class:`NuclearCuspMap`) or ``x``."""
        return self._map(x)[0]

    def _map(self, x):
        """``(coordinates for the orbitals, what Jastrow factors get as mapped)``."""
        if self.cusp_map is None:
            return x, None
        mapped = self.cusp_map.mapped(x)
        return mapped.coordinates, mapped

    @nn.compact
    def signed_log_amplitude(self, x):
        coordinates, mapped = self._map(x)
        up, down = self.orbitals(coordinates)
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
            log = log + self._jastrow(jastrow, x, mapped)
        return sign, log

    def _mapped(self, jastrow) -> bool:
        return self.cusp_map is not None and getattr(jastrow, "takes_mapped", False)

    def _jastrow(self, jastrow, x, mapped):
        """A Jastrow factor's value; those that declare ``takes_mapped`` also get the cusp map's
        output (:class:`~psiloom.electrons.cusp_map.MappedCoordinates`)."""
        return jastrow(x, mapped=mapped) if self._mapped(jastrow) else jastrow(x)

    def orbital_matrices(self, x):
        """The orbital layer's ``(up, down)`` matrices for a batch ``(B, N, 3)``."""
        return self.orbitals(self.orbital_coordinates(x))

    def orbital_basis_values(self, x):
        """The orbital layer's ``basis_values`` (the functions its orbitals are linear
        combinations of) at the coordinates it sees; needs an orbital layer that has them."""
        return self.orbitals.basis_values(self.orbital_coordinates(x))

    def one_electron_log_factors(self, x):
        """``(B, N)``: the one-electron parts j_i of the Jastrow factors that provide them
        (``one_electron_terms``, e.g. the electron–nucleus term of :class:`CuspJastrow`).
        Since e^{Σ_i j_i} det[φ_a(r_i)] = det[φ_a(r_i) e^{j_i}], ψ reproduces a target
        determinant det[Φ] when the orbitals equal Φ e^{−j} (Hartree-Fock pretraining)."""
        total = jnp.zeros(x.shape[:-1], x.dtype)
        _, mapped = self._map(x)
        for jastrow in self.jastrows:
            if hasattr(jastrow, "one_electron_terms"):
                total = total + (jastrow.one_electron_terms(x, mapped=mapped) if self._mapped(jastrow)
                                 else jastrow.one_electron_terms(x))
        return total


def _cusp_map(system: Molecule, cusp_map: bool):
    return NuclearCuspMap(system, name="cusp_map") if cusp_map else None


def slater_jastrow(system: Molecule, n_det: int = 1, neural_jastrow: bool = True, width: int = 16,
                   layers: int = 2, cusp_map: bool = False, radial_terms: int = 0) -> SlaterJastrow:
    """Slater–Jastrow state: analytic Slater-type orbitals, cusp Jastrow (+ neural Jastrow);
    ``cusp_map=True`` adds a :class:`NuclearCuspMap` (and smooth 2p-like functions, "pc");
    ``radial_terms`` is the cusp Jastrow's number of short-range radial functions."""
    jastrows: list[nn.Module] = [CuspJastrow(system, radial_terms=radial_terms)]
    if neural_jastrow:
        jastrows.append(NeuralJastrow(system, width=width, layers=layers))
    return SlaterJastrow(SlaterTypeOrbitals(system, n_det, smooth_p=cusp_map), tuple(jastrows), _cusp_map(system, cusp_map))


def neural_slater_jastrow(system: Molecule, n_det: int = 4, width: int = 16, channels: int = 8, layers: int = 2,
                          jastrow_width: int = 16, envelope_term: bool = False, cusp_map: bool = False,
                          radial_terms: int = 0) -> SlaterJastrow:
    """Backflow state: :class:`BackflowOrbitals` determinants (analytic orbitals at quasi-particle
    positions r_i + ξ_i(x)), cusp and neural Jastrows; ``cusp_map=True`` adds a
    :class:`NuclearCuspMap` (the orbital layer, backflow included, sees its coordinates) and
    uses smooth 2p-like functions ("pc"); ``radial_terms`` is the cusp Jastrow's number of
    short-range radial functions (:class:`CuspJastrow`)."""
    return SlaterJastrow(
        BackflowOrbitals(system, n_det, width=width, channels=channels, layers=layers, envelope_term=envelope_term,
                         smooth_p=cusp_map),
        (CuspJastrow(system, radial_terms=radial_terms), NeuralJastrow(system, width=jastrow_width)),
        _cusp_map(system, cusp_map),
    )
