"""Group-equivariant feed-forward layers on lattice configurations, and a trial state built on them.

Features live on the elements of a symmetry group ``G`` (acting on configurations as in
:mod:`psiloom.symmetry`), following the idea of group convolutions (Cohen & Welling 2016)
applied to lattice trial states (Roth & MacDonald 2021). A feature map ``f(g)`` is *equivariant*
when transforming the input by ``h`` moves the features by the left-regular action:

    f_{h·x}(g) = f_x(h⁻¹ g)        for all h, g ∈ G.

Layers (``C``/``D`` channels in/out, sample axis leading):

* :class:`GroupLift` — configurations to features,
  ``f_d(g) = Σ_i K_{i d} (g⁻¹·x)_i + b_d``; equivariant because ``g⁻¹·(h·x) = (h⁻¹g)⁻¹·x``.
* :class:`GroupConv` — features to features, the group convolution
  ``f'_d(g) = Σ_{u∈G} Σ_c K_{c d}(u⁻¹ g) f_c(u) + b_d``; substituting ``u → h u`` shows
  ``f'_{h·x}(g) = f'_x(h⁻¹ g)``. Pointwise activations keep equivariance.

:class:`GroupConvNet` stacks a lift and ``len(features) − 1`` convolutions with activations
``σ``, sums the channels, ``φ(g) = Σ_d h^L_d(g)``, and pools over the group with the characters
of a sector:

    ψ(x) = (1/|G|) Σ_g χ(g)* exp(φ_x(g)) ,

so that ``ψ(h·x) = χ(h)* ψ(x)`` (psiloom's sector convention; for the trivial sector the state
is invariant). The pooling is a phase-aware log-sum-exp. Cost per configuration:
``O(|G|² C D)`` per convolution, ``O(|G| N D)`` for the lift. A one-layer net
(``features=(D,)``) has fast updates (:meth:`GroupConvNet.fast_updates`): a change of K sites
costs ``O(K |G| D)`` and, with log cosh, no transcendental function per unit (measured at
L = 20, |G| = 40, D = 8, 4096 samples: Metropolis sampling 1.7 s → 0.43 s and TFIM local
energies 1.7 s → 0.41 s per batch, two cores).
"""

from __future__ import annotations

from typing import Any, Callable, NamedTuple, Sequence

import jax
import jax.numpy as jnp
import numpy as np
import flax.linen as nn

from psiloom._validation import finite_real, positive_int
from psiloom.states.base import TrialState, default_complex_dtype, default_real_dtype
from psiloom.states.fast import FastUpdates, log_product
from psiloom.states.rbm import changed_sites, cosh_ratios, log_two_cosh, tanh_pair_cache
from psiloom.states.symmetric import log_sum_exp_weighted
from psiloom.symmetry import Sector, SymmetryGroup

__all__ = ["GroupLift", "GroupConv", "GroupConvNet", "GroupConvNetCache", "lift_kernel", "log_cosh"]


def log_cosh(z):
    """``log cosh z`` for real or complex ``z`` (stable; even, ≈ z²/2 near 0)."""
    return log_two_cosh(z) - jnp.log(2.0).astype(jnp.real(z).dtype)


def _check_features(name: str, value) -> int:
    return positive_int(name, value)


def _group_of(symmetry) -> SymmetryGroup:
    if isinstance(symmetry, Sector):
        return symmetry.group
    if isinstance(symmetry, SymmetryGroup):
        return symmetry
    raise ValueError(f"expected a SymmetryGroup or a Sector, got {symmetry!r}")


def lift_kernel(group: SymmetryGroup, kernel):
    """The lift's kernel on every group element, ``T[j, g, d] = s_g K[g⁻¹(j), d]`` (N, |G|, D), so
    that ``f_d(g) = Σ_i K_id (g⁻¹·x)_i = Σ_j x_j T[j, g, d]``: the kernel is gathered instead of
    the images of every configuration (``s_g`` is the element's spin flip, ±1)."""
    return kernel[jnp.asarray(group.perms.T)] * jnp.asarray(group.flips, dtype=kernel.dtype)[None, :, None]


class GroupConvNetCache(NamedTuple):
    """Per-sample cache of :meth:`GroupConvNet.fast_updates` (leading axis: samples)."""

    units: Any  # log cosh: the pair (1 ± tanh f) (n, |G| D); else the pre-activations f (n, |G|, D)
    phi: jax.Array  # (n, |G|) φ(g) = Σ_d σ(f_d(g))
    log_amplitude: jax.Array  # (n,) log ψ(x)


class GroupLift(nn.Module):
    """Lift configurations ``(B, N)`` to equivariant features ``(B, |G|, features)``."""

    group: SymmetryGroup
    features: int
    use_bias: bool = True
    init_scale: float = 1.0
    param_dtype: Any = None

    @nn.compact
    def __call__(self, x):
        group = _group_of(self.group)
        d = _check_features("features", self.features)
        if x.ndim != 2 or x.shape[-1] != group.n_sites:
            raise ValueError(f"GroupLift expects configurations (B, {group.n_sites}), got shape {x.shape}")
        dtype = self.param_dtype or default_real_dtype()
        scale = finite_real("init_scale", self.init_scale, minimum=0.0)
        kernel = self.param("kernel", nn.initializers.variance_scaling(scale, "fan_in", "normal"),
                            (group.n_sites, d), dtype)
        out = jnp.einsum("bj,jgd->bgd", x.astype(dtype), lift_kernel(group, kernel))
        if self.use_bias:
            out = out + self.param("bias", nn.initializers.zeros, (d,), dtype)
        return out


class GroupConv(nn.Module):
    """Group convolution of features ``(B, |G|, C) -> (B, |G|, features)`` (see module docstring)."""

    group: SymmetryGroup
    features: int
    use_bias: bool = True
    init_scale: float = 1.0
    param_dtype: Any = None

    @nn.compact
    def __call__(self, f):
        group = _group_of(self.group)
        d = _check_features("features", self.features)
        n_el = len(group)
        if f.ndim != 3 or f.shape[1] != n_el:
            raise ValueError(f"GroupConv expects features (B, {n_el}, C), got shape {f.shape}")
        c = f.shape[2]
        dtype = self.param_dtype or default_real_dtype()
        # fan-in of one output: |G| elements × C channels
        scale = finite_real("init_scale", self.init_scale, minimum=0.0)
        kernel = self.param("kernel", nn.initializers.variance_scaling(scale, "fan_in", "normal",
                                                                          in_axis=(0, 1), out_axis=2),
                            (n_el, c, d), dtype)
        table = group.multiplication_table()
        rel = table[group.inverses()]  # rel[u, g] = index of u⁻¹ g
        out = jnp.einsum("buc,ugcd->bgd", f.astype(jnp.result_type(f.dtype, dtype)), kernel[jnp.asarray(rel)])
        if self.use_bias:
            out = out + self.param("bias", nn.initializers.zeros, (d,), dtype)
        return out


class GroupConvNet(TrialState):
    """Equivariant network pooled onto a symmetry sector (see module docstring).

    Attributes:
        symmetry: a :class:`~psiloom.symmetry.Sector` (pooling with its characters) or a
            :class:`~psiloom.symmetry.SymmetryGroup` (trivial sector: an invariant state).
        features: channels of the lift and of each following convolution, e.g. ``(4, 4)``.
        activation: pointwise nonlinearity after every layer (default :func:`log_cosh`).
        complex_params: complex kernels (ψ with a phase).
        init_scale: variance scale of the fan-in initialisation.
    """

    symmetry: Any
    features: Sequence[int] = (4, 4)
    activation: Callable = log_cosh
    complex_params: bool = False
    init_scale: float = 0.1
    param_dtype: Any = None

    @nn.compact
    def log_amplitude(self, x):
        group = _group_of(self.symmetry)
        if len(self.features) < 1:
            raise ValueError(f"features must name at least one layer, got {self.features!r}")
        dtype = self.param_dtype or (default_complex_dtype() if self.complex_params else default_real_dtype())
        h = GroupLift(group, self.features[0], init_scale=self.init_scale, param_dtype=dtype, name="lift")(x)
        h = self.activation(h)
        for k, width in enumerate(self.features[1:]):
            h = GroupConv(group, width, init_scale=self.init_scale, param_dtype=dtype, name=f"conv{k}")(h)
            h = self.activation(h)
        return self._pool(jnp.sum(h, axis=-1))  # φ(g) = Σ_d h_d(g): (B, G)

    def _pool(self, phi):
        """log ψ = log[(1/|G|) Σ_g χ(g)* exp φ(g)] from φ (B, |G|)."""
        if isinstance(self.symmetry, Sector) and not self.symmetry.is_trivial:
            log_w = jnp.asarray(np.log(np.conj(self.symmetry.characters)))
            phi = phi.astype(jnp.result_type(phi.dtype, jnp.complex64))
        else:
            log_w = None
        return log_sum_exp_weighted(phi, log_w, axis=1) - np.log(phi.shape[1])

    def fast_updates(self) -> FastUpdates | None:
        """Fast updates of a one-layer net (``features=(D,)``); ``None`` (the generic path) with
        convolutions after the lift, whose every output depends on every site.

        The lift is linear in x: changing ``x_s`` by ``δ_s`` at the sites ``s`` moves its
        pre-activations by ``Δf_d(g) = Σ_s δ_s T[s, g, d]`` (:func:`lift_kernel`). With the
        default activation :func:`log_cosh` the update is the RBM's (:mod:`psiloom.states.rbm`:
        the cache holds ``1 ± tanh f`` per unit and ``φ(g)``; ``e^{±2T}`` tables, spins ±1), so
        ``φ'(g) = φ(g) + log Π_d cosh(f_d(g) + Δf_d(g)) / cosh f_d(g)`` costs multiplications and
        one logarithm per element g. Any other activation keeps ``f`` and re-applies it: ``O(K |G| D)``
        additions and |G| D activations instead of ``O(N |G| D)`` for a full evaluation.
        """
        if len(self.features) != 1:
            return None
        params = self.variables["params"]["lift"]
        tied = lift_kernel(_group_of(self.symmetry), params["kernel"])  # (N, G, D)
        n_sites, n_el, width = tied.shape
        bias = params.get("bias")

        def lifted_of(x):
            lifted = jnp.einsum("bj,jgd->bgd", x.astype(tied.dtype), tied)
            return lifted if bias is None else lifted + bias

        if self.activation is log_cosh:
            flat = tied.reshape(n_sites, n_el * width)
            rise, fall = jnp.exp(2.0 * flat), jnp.exp(-2.0 * flat)

            def init_pairs(x):
                lifted = lifted_of(x)
                phi = jnp.sum(log_cosh(lifted), axis=-1)
                return GroupConvNetCache(tanh_pair_cache(lifted.reshape(len(x), -1), tied.dtype), phi, self._pool(phi))

            def update_pairs(old_values, cache: GroupConvNetCache, sites, new_values):
                idx, dv = changed_sites(old_values, sites, new_values)
                if dv.shape[1] == 0:
                    return jnp.zeros(dv.shape[:1], cache.log_amplitude.dtype), cache
                ratio, pairs = cosh_ratios(cache.units, dv, rise[idx], fall[idx])
                phi = cache.phi + log_product(ratio.reshape(len(dv), n_el, width), block=8).astype(cache.phi.dtype)
                total = self._pool(phi)
                return total - cache.log_amplitude, GroupConvNetCache(pairs, phi, total)

            return FastUpdates(init_pairs, update_pairs)

        def init(x):
            lifted = lifted_of(x)
            phi = jnp.sum(self.activation(lifted), axis=-1)
            return GroupConvNetCache(lifted, phi, self._pool(phi))

        def update(old_values, cache: GroupConvNetCache, sites, new_values):
            idx, dv = changed_sites(old_values, sites, new_values)
            rows = tied[idx]  # (K, G, D) for shared sites, else (n, K, G, D)
            lifted = cache.units + jnp.einsum("nk,kgd->ngd" if idx.ndim == 1 else "nk,nkgd->ngd", dv, rows)
            phi = jnp.sum(self.activation(lifted), axis=-1)
            total = self._pool(phi)
            return total - cache.log_amplitude, GroupConvNetCache(lifted, phi, total)

        return FastUpdates(init, update)
