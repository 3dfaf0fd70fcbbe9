"""Restricted Boltzmann machine trial state.

With visible spins ``x_i = ±1`` and ``M = α·N`` hidden units ``h_j = ±1``,

    ψ(x) = Σ_h exp(Σ_i a_i x_i + Σ_j b_j h_j + Σ_ij W_ji h_j x_i)
         = exp(a·x) Π_j 2 cosh θ_j(x),        θ(x) = W x + b,

so ``log ψ(x) = a·x + Σ_j log(2 cosh θ_j)``. With complex parameters ψ carries a phase.
``log(2 cosh z)`` is evaluated stably for complex ``z`` as ``w + log1p(exp(−2w))`` with
``w = ±z`` chosen so that ``Re w ≥ 0``.

Fast updates (:mod:`psiloom.states.fast`). Changing spins at sites ``s_k`` by
``δ_k = x'_{s_k} − x_{s_k} ∈ {0, ±2}`` shifts ``θ`` by ``d = Σ_k δ_k W_{s_k}``. The cache of a
configuration holds, per hidden unit, the pair

    p_j = 1 + tanh θ_j,   q_j = 1 − tanh θ_j     (p_j + q_j = 2, both in [0, 2]),

computed without cancellation. With ``P = p e^{d}`` and ``Q = q e^{−d}``,

    r_j = (P_j + Q_j) / 2 = cosh(θ_j + d_j) / cosh θ_j ,
    log ψ(x') − log ψ(x) = a·(x' − x) + Σ_j log r_j ,

and the cache of ``x'`` is ``(P/r, Q/r)``. ``e^{±d_j}`` is a product of rows of the tables
``exp(±2W)`` computed once per parameter set, so an update costs O(K·M) multiplications, one
reciprocal per unit and one logarithm per eight units (``log Π r`` over blocks; two units in
32-bit precision): no exponential. Every quantity is relative to the current configuration:
``r_j`` lies within ``e^{±|d_j|}`` of 1 however far a chain has moved since the cache was
built, so a block of eight overflows only for ``|d| > 88`` (|W| ≳ 22) and the pair never
leaves [0, 2]. (A cache relative to the configuration where it was built, ``P ∝ e^{θ − θ₀}``,
overflows a block product once a chain reaches much larger hidden fields than there; see
``test_long_walk_to_huge_hidden_fields_stays_finite_and_exact``.) For real parameters every
term is positive: the ratio carries no cancellation at any ``|θ|``. Spins must be ±1 and the
sites of one change distinct; the tables overflow only for ``|W| > 354`` (float64). The smaller
member of the pair, ~2e^{−2|θ|}, underflows once ``|θ| > 354`` (float64; ~44 in float32), and a
later change of sign of θ_j then loses it: the updates are exact while every |θ_j| a chain
visits stays below that (``init`` rebuilds the pair every step; a measured failure beyond it is in
the documentation's benchmark notes).

Cache precision (``cache_dtype``). The tables and the cache may be held in float32 while the
parameters, full evaluations and everything downstream stay in float64: the update streams the
``(n, M)`` pair and ``K`` table rows through memory once per proposal or connected
configuration, so halving their width about halves the cost of Metropolis sweeps and local
energies of large states. Each log-ratio then carries a rounding error of order ``√M·ε₃₂`` (at
most ``4M·ε₃₂``; ε₃₂ ≈ 1.2e-7) and local energies a relative error of ~1e-6 (measurements: the
documentation's benchmark notes), far below statistical errors of 1e-4 or more. The cache is rebuilt from θ in the parameters' precision
whenever ``init`` runs (every optimisation step), so the rounding of a chain's successive
updates accumulates only over one step's sweeps. In float32 the tables overflow for
``|W| > 44``. It is an opt-in: the default keeps the parameters' precision.

Compiled sweeps. For real parameters the fast updates also hand out the plain arrays of the
state (``dense_rbm``: W, a and the tables e^{±2W}); :class:`~psiloom.sampling.MetropolisChains`
feeds them to its compiled CPU sweeps (:mod:`psiloom.sampling.compiled`, the same update in one
Numba loop nest) for single flips and bond exchanges.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import flax.linen as nn

from psiloom._validation import finite_real, positive_real
from psiloom.states.base import TrialState, normal_init, check_width, default_complex_dtype, default_real_dtype
from psiloom.states.fast import FastUpdates, RBMArrays, log_product


def log_two_cosh(z):
    """``log(2 cosh z)`` for real or complex ``z``, without overflow."""
    w = jnp.where(jnp.real(z) < 0, -z, z)
    return w + jnp.log1p(jnp.exp(-2.0 * w))


def sum_log_two_cosh(z, axis=-1):
    """``Σ log(2 cosh z)`` over ``axis`` (an int or a tuple of axes).

    For real ``z`` it sums ``|z| + log1p(e^{−2|z|})`` without the branch of
    :func:`log_two_cosh` (about 1.5× faster on CPU, where this elementwise part, not the
    ``x @ W`` product, dominates an RBM evaluation); complex ``z`` takes :func:`log_two_cosh`.
    """
    if jnp.iscomplexobj(z):
        return jnp.sum(log_two_cosh(z), axis=axis)
    a = jnp.abs(z)
    return jnp.sum(a, axis=axis) + jnp.sum(jnp.log1p(jnp.exp(-2.0 * a)), axis=axis)


class RBMCache(NamedTuple):
    """Per-sample cache of the RBM fast updates (leading axis: samples); see the module docstring."""

    plus: jax.Array  # (n, M) p = 1 + tanh θ
    minus: jax.Array  # (n, M) q = 1 − tanh θ


def _one_plus_minus_tanh(theta):
    """``(1 + tanh θ, 1 − tanh θ)`` without cancellation, for real or complex ``θ``."""
    positive = jnp.real(theta) >= 0
    q = jnp.exp(-2.0 * jnp.where(positive, theta, -theta))  # |q| ≤ 1
    big = 2.0 / (1.0 + q)
    small = big * q
    return jnp.where(positive, big, small), jnp.where(positive, small, big)


class RBM(TrialState):
    """RBM with hidden-unit density ``alpha`` (M = round(alpha·N) hidden units).

    Attributes:
        alpha: hidden units per visible spin (> 0).
        complex_params: complex weights (a phase-carrying ψ) instead of real ones.
        visible_bias / hidden_bias: include the ``a`` / ``b`` terms.
        init_scale: standard deviation of the Gaussian initial weights.
        param_dtype: parameter dtype (default float64 with x64 enabled, else float32).
        cache_dtype: precision of the fast-update tables and caches, ``float32`` or ``float64``
            (``None``: the parameters'); see "Cache precision" in the module docstring.
    """

    alpha: float = 1.0
    complex_params: bool = False
    visible_bias: bool = True
    hidden_bias: bool = True
    init_scale: float = 0.01
    param_dtype: Any = None
    cache_dtype: Any = None

    def _dtype(self):
        if self.param_dtype is not None:
            return self.param_dtype
        return default_complex_dtype() if self.complex_params else default_real_dtype()

    def hidden_preactivation(self, x):
        """θ(x) = W x + b, shape ``(n_samples, M)`` (kept per chain by fast-update paths)."""
        n = check_width(x)
        alpha = positive_real("alpha", self.alpha)
        init_scale = finite_real("init_scale", self.init_scale, minimum=0.0)
        m = max(1, int(round(alpha * n)))
        dtype = self._dtype()
        resolve_cache_dtype(self.cache_dtype, dtype)  # a bad option fails here, not at the first sweep
        init = normal_init(init_scale)
        kernel = self.param("kernel", init, (n, m), dtype)
        theta = x.astype(dtype) @ kernel
        if self.hidden_bias:
            theta = theta + self.param("hidden_bias", init, (m,), dtype)
        return theta

    @nn.compact
    def log_amplitude(self, x):
        theta = self.hidden_preactivation(x)
        out = sum_log_two_cosh(theta, axis=-1)
        if self.visible_bias:
            scale = finite_real("init_scale", self.init_scale, minimum=0.0)
            a = self.param("visible_bias", normal_init(scale), (x.shape[-1],), self._dtype())
            out = out + x.astype(a.dtype) @ a
        return out

    def fast_updates(self) -> FastUpdates:
        """Fast-update functions (see the module docstring); call via
        ``model.apply(variables, method="fast_updates")`` or :func:`psiloom.states.fast_updates_of`."""
        params = self.variables["params"]
        return rbm_fast_updates(
            params["kernel"],
            params.get("hidden_bias") if self.hidden_bias else None,
            params.get("visible_bias") if self.visible_bias else None,
            cache_dtype=self.cache_dtype,
        )


def resolve_cache_dtype(cache_dtype, param_dtype):
    """The dtype of fast-update tables and caches: ``cache_dtype`` (``float32``/``float64`` or
    ``None`` for ``param_dtype``'s precision), complex when ``param_dtype`` is complex."""
    param_dtype = jnp.dtype(param_dtype)
    if cache_dtype is None:
        return param_dtype
    try:
        real = jnp.dtype(cache_dtype)
    except TypeError:
        real = None
    if real is None or real not in (jnp.dtype(jnp.float32), jnp.dtype(jnp.float64)):  # (dtype == None is True)
        raise ValueError(f"cache_dtype must be float32, float64 or None, got {cache_dtype!r}")
    if jnp.issubdtype(param_dtype, jnp.complexfloating):
        return jnp.dtype(jnp.complex64 if real == jnp.float32 else jnp.complex128)
    return real


def changed_sites(old_values, sites, new_values):
    """``(idx, δ)`` of a fast update's change: the sites with −1 padding replaced by 0, and
    ``δ = x' − x`` at them, zero at padding (shapes of ``sites``: (K,) shared or (n, K))."""
    sites = jnp.asarray(sites)
    valid = sites >= 0
    idx = jnp.where(valid, sites, 0)
    return idx, jnp.where(valid, new_values - old_values, 0).astype(old_values.dtype)


def cosh_ratios(cache: RBMCache, dv, up_rows, down_rows):
    """Per-unit ratios ``r = cosh(θ + d) / cosh θ`` and the cache of ``θ + d`` (module docstring).

    ``cache``: the pair (1 ± tanh θ), (n, M); ``dv``: (n, K) spin changes δ_k ∈ {0, ±2};
    ``up_rows`` / ``down_rows``: the rows of ``e^{2W}`` / ``e^{−2W}`` at the changed sites,
    (K, M) shared or (n, K, M). Only multiplications and one reciprocal per unit.
    """
    e_plus = e_minus = None
    for k in range(dv.shape[1]):
        up = (dv[:, k] > 0)[:, None]
        down = (dv[:, k] < 0)[:, None]
        f_plus = jnp.where(up, up_rows[..., k, :], jnp.where(down, down_rows[..., k, :], 1.0))
        f_minus = jnp.where(up, down_rows[..., k, :], jnp.where(down, up_rows[..., k, :], 1.0))
        e_plus = f_plus if e_plus is None else e_plus * f_plus
        e_minus = f_minus if e_minus is None else e_minus * f_minus
    if e_plus is None or e_minus is None:
        raise ValueError("cosh_ratios needs at least one changed site (K ≥ 1)")
    plus, minus = cache.plus * e_plus, cache.minus * e_minus
    ratio = 0.5 * (plus + minus)  # cosh(θ + d) / cosh θ per unit
    inverse = 1.0 / ratio
    return ratio, RBMCache(plus * inverse, minus * inverse)


def tanh_pair_cache(theta, cache_dtype) -> RBMCache:
    """The cache pair ``(1 + tanh θ, 1 − tanh θ)`` of pre-activations θ, in ``cache_dtype``."""
    return RBMCache(*(half.astype(cache_dtype) for half in _one_plus_minus_tanh(theta)))


def rbm_fast_updates(kernel, hidden_bias=None, visible_bias=None, cache_dtype=None) -> FastUpdates:
    """Fast updates of ``log ψ(x) = a·x + Σ_j log 2cosh θ_j``, ``θ = xW + b`` (module docstring).

    ``kernel`` W: (N, M); ``hidden_bias`` b: (M,) or None; ``visible_bias`` a: (N,) or None;
    ``cache_dtype``: ``float32``/``float64`` precision of the tables and caches (None: the
    kernel's). Δ log ψ is returned in the kernel's dtype. Any trial state that is an RBM with
    tied or structured weights (e.g. :class:`~psiloom.states.TranslationInvariantRBM`) can
    build its effective ``W`` and reuse these functions.
    """
    ctype = resolve_cache_dtype(cache_dtype, kernel.dtype)
    rise = jnp.exp(2.0 * kernel).astype(ctype)  # e^{d} for a spin going −1 → +1 (δ = +2)
    fall = jnp.exp(-2.0 * kernel).astype(ctype)  # e^{d} for a spin going +1 → −1 (δ = −2)
    log_block = 8 if jnp.finfo(ctype).bits == 64 else 2

    def init(x):
        theta = x.astype(kernel.dtype) @ kernel
        if hidden_bias is not None:
            theta = theta + hidden_bias
        return tanh_pair_cache(theta, ctype)

    def update(old_values, cache: RBMCache, sites, new_values):
        idx, dv = changed_sites(old_values, sites, new_values)
        delta = jnp.zeros(dv.shape[:1], kernel.dtype)
        if visible_bias is not None:
            delta = delta + jnp.sum(dv * visible_bias[idx], axis=1)
        if dv.shape[1] == 0:  # K = 0: nothing changes
            return delta, cache
        ratio, new_cache = cosh_ratios(cache, dv, rise[idx], fall[idx])
        return delta + log_product(ratio, block=log_block).astype(kernel.dtype), new_cache

    dense = None if jnp.iscomplexobj(kernel) else RBMArrays(kernel, hidden_bias, visible_bias, rise, fall)
    return FastUpdates(init, update, dense)
