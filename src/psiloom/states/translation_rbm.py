"""A restricted Boltzmann machine with weights shared across the elements of a symmetry group.

With ``α`` feature filters ``w_f ∈ ℝ^N`` (or ℂ^N), one hidden unit per filter and group
element, and the hidden unit ``(f, g)`` seeing the configuration through ``g``:

    θ_{f,g}(x) = w_f · (g·x) + b_f ,
    log ψ(x)   = a Σ_i x_i + Σ_{f=1}^{α} Σ_{g∈G} log(2 cosh θ_{f,g}(x)) .

Replacing ``x`` by ``h·x`` only permutes the hidden units (``g h`` runs over G with g), so
ψ is invariant under the whole group: ``ψ(h·x) = ψ(x)``. For the translation group of a
lattice this is the translation-invariant RBM (Carleo & Troyer 2017): ``α|G|`` hidden units but
only ``α N + α + 1`` parameters, against ``α N² + α N + N`` for a dense RBM with the same hidden
density. The single visible bias ``a`` multiplies the total magnetisation (invariant under
permutations; with spin flips in the group it is fixed at zero).

Fast updates (:mod:`psiloom.states.fast`): the state is a dense RBM with the tied kernel
``W[j, (g, f)] = s_g w_f[g(j)]`` (N × α|G|), so it reuses the RBM's fast-update functions on
that kernel; Metropolis proposals and local energies then cost O(K·α|G|) per change instead of
a full O(N·α|G|) evaluation.
"""

from __future__ import annotations

from typing import Any

import jax.numpy as jnp
import numpy as np
import flax.linen as nn

from psiloom.lattices import Lattice
from psiloom._validation import finite_real, positive_int
from psiloom.states.base import TrialState, normal_init, default_complex_dtype, default_real_dtype
from psiloom.states.fast import FastUpdates
from psiloom.states.rbm import rbm_fast_updates, resolve_cache_dtype, sum_log_two_cosh
from psiloom.symmetry import SymmetryGroup, translations

__all__ = ["TranslationInvariantRBM"]


class TranslationInvariantRBM(TrialState):
    """Weight-shared RBM invariant under ``symmetry`` (default: all lattice translations).

    Attributes:
        symmetry: a :class:`~psiloom.lattices.Lattice` (its translation group is used) or any
            :class:`~psiloom.symmetry.SymmetryGroup` (e.g. a full space group with spin flips).
        alpha: number of feature filters (hidden-unit density per group element), integer ≥ 1.
        complex_params: complex filters and biases (ψ with a phase).
        visible_bias / hidden_bias: include the ``a`` / ``b_f`` terms.
        init_scale: initial parameters are Gaussian with standard deviation
            ``init_scale / sqrt(|G|)`` (each filter feeds ``|G|`` hidden units). Near zero
            weights log ψ is almost quadratic in them, the quantum geometric tensor scales like
            their square and stochastic-reconfiguration steps (∝ 1/weight) become erratic, so
            the default (0.4, i.e. 0.1 for the 16 translations of a 4×4 lattice) is larger
            than a dense RBM's.
        param_dtype: parameter dtype (default float64 with x64 enabled, else float32).
        cache_dtype: precision of the fast-update tables and caches (``float32``, ``float64``
            or ``None`` for the parameters'); see :mod:`psiloom.states.rbm`, "Cache precision".
    """

    symmetry: Any
    alpha: int = 1
    complex_params: bool = False
    visible_bias: bool = True
    hidden_bias: bool = True
    init_scale: float = 0.4
    param_dtype: Any = None
    cache_dtype: Any = None

    def _group(self) -> SymmetryGroup:
        if isinstance(self.symmetry, SymmetryGroup):
            return self.symmetry
        if isinstance(self.symmetry, Lattice):
            return translations(self.symmetry)
        raise ValueError(f"symmetry must be a Lattice or a SymmetryGroup, got {self.symmetry!r}")

    @nn.compact
    def log_amplitude(self, x):
        positive_int("alpha", self.alpha)  # number of filters
        finite_real("init_scale", self.init_scale, minimum=0.0)
        group = self._group()
        n = x.shape[-1]
        if n != group.n_sites:
            raise ValueError(f"configurations have {n} sites, the group acts on {group.n_sites}")
        dtype = self.param_dtype or (default_complex_dtype() if self.complex_params else default_real_dtype())
        resolve_cache_dtype(self.cache_dtype, dtype)  # a bad option fails here, not at the first sweep
        init = normal_init(self.init_scale / np.sqrt(len(group)))
        filters = self.param("filters", init, (n, int(self.alpha)), dtype)
        tied = self._tied_kernel(filters, group)  # (N, G, α)
        theta = jnp.einsum("bj,jgf->bgf", x.astype(dtype), tied)  # (B, G, α)
        if self.hidden_bias:
            theta = theta + self.param("hidden_bias", init, (int(self.alpha),), dtype)
        out = sum_log_two_cosh(theta, axis=(1, 2))
        if self.visible_bias and not np.any(group.flips < 0):
            a = self.param("visible_bias", init, (), dtype)
            out = out + a * jnp.sum(x, axis=-1).astype(dtype)
        return out

    @staticmethod
    def _tied_kernel(filters, group: SymmetryGroup):
        """``W[j, g, f] = s_g w_f[g(j)]``, so that θ_{f,g} = Σ_i w_f[i] (g·x)_i = Σ_j x_j W[j, g, f]
        (the weights are gathered once instead of the images of every configuration)."""
        images = jnp.asarray(group.images.T)  # (N, G): g(j)
        signs = jnp.asarray(group.flips, dtype=filters.dtype)
        return filters[images] * signs[None, :, None]

    def fast_updates(self) -> FastUpdates:
        """Fast updates through the equivalent dense RBM (see the module docstring)."""
        params = self.variables["params"]
        group = self._group()
        tied = self._tied_kernel(params["filters"], group)
        n, n_group, alpha = tied.shape
        hidden = visible = None
        if self.hidden_bias:
            hidden = jnp.broadcast_to(params["hidden_bias"], (n_group, alpha)).reshape(-1)
        if "visible_bias" in params:
            visible = jnp.full((n,), params["visible_bias"])
        return rbm_fast_updates(tied.reshape(n, n_group * alpha), hidden, visible, cache_dtype=self.cache_dtype)
