"""Symmetrised trial states: projecting any trial state onto a symmetry sector.

For a base trial state ψ, a group ``G`` and characters ``χ`` of a 1-D representation
(a :class:`psiloom.symmetry.Sector`),

    ψ_χ(x) = (1/|G|) Σ_g χ(g) ψ(g·x)

is the orthogonal projection of ψ onto the sector: it obeys ``ψ_χ(h·x) = χ(h)* ψ_χ(x)`` for
every ``h`` (psiloom's sector convention, see :mod:`psiloom.symmetry`). An optional global
spin-flip parity ``p`` projects further, ``ψ_{χ,p}(x) = ½ [ψ_χ(x) + p ψ_χ(−x)]``, so that
``ψ(−x) = p ψ(x)`` (use it when the group itself has no spin flips).

The sum is evaluated in log space with complex weights (a phase-aware log-sum-exp):
with ``l_g = log ψ(g·x) + log χ(g)`` and ``m = max_g Re l_g``,

    log ψ_χ(x) = m + log Σ_g exp(l_g − m) − log |G| ,

so huge or tiny amplitudes neither overflow nor underflow. When the projection vanishes at
``x`` (possible in non-trivial sectors, e.g. a configuration invariant under a translation
whose character is not 1), the terms cancel to rounding noise; such sums are snapped to an
exact zero, ``log ψ = m + log(tiny)`` (see :func:`log_sum_exp_weighted`): a finite, negligible
amplitude that a Metropolis chain never moves to.

The output is real when the base output is real and all characters (and the parity) are +1;
otherwise it is complex (a real base state projected onto a sector with signs acquires signs).

Fast updates (:mod:`psiloom.states.fast`): when ``base`` has them, so does the projection.
With ``(g·x)_j = f_g x_{g⁻¹(j)}``, changing ``x`` at site ``i`` to ``v`` changes the image
``g·x`` at the single site ``g(i)`` to ``f_g v``. The cache keeps, per sample, the base cache
of every image and the terms ``l_g = log ψ(g·x)``; an update moves each image through the
base's own update (``O(|G|·K·M)`` for an RBM-like base with ``M`` hidden units, instead of
``O(|G|·N·M)`` for a new evaluation), adds the base's Δ to each ``l_g`` and takes the weighted
log-sum-exp again.
"""

from __future__ import annotations

from typing import Any, NamedTuple, cast

import jax
import jax.numpy as jnp
import numpy as np
import flax.linen as nn

from psiloom._validation import one_of
from psiloom.states.base import TrialState
from psiloom.states.fast import FastUpdates, supports_fast_updates
from psiloom.symmetry import Sector, SymmetryGroup

__all__ = ["Symmetrized", "SymmetrizedCache", "log_sum_exp_weighted", "projection_elements"]


class SymmetrizedCache(NamedTuple):
    """Per-sample cache of :class:`Symmetrized` fast updates (leading axis: samples)."""

    base: Any  # the base state's cache of all images, leaves shaped (n, |G|, ...)
    terms: jax.Array  # (n, |G|) l_g = log ψ_base(g·x)
    log_amplitude: jax.Array  # (n,) log ψ_χ(x) + log |G|


def log_sum_exp_weighted(log_terms, log_weights=None, axis: int = -1):
    """``log Σ exp(log_terms + log_weights)`` along ``axis`` for complex logs (stable).

    With ``m`` the largest real part, the sum ``s = Σ exp(l − m)`` has terms of modulus ≤ 1.
    If ``|s|`` is below ``16 K ε`` (``K`` terms, ``ε`` the machine epsilon) it carries no
    significant digit — the terms cancel to rounding noise — and is treated as an exact zero:
    the result is then ``m + log(tiny)`` (``tiny`` the smallest normal number), i.e. an
    amplitude ~1e-308 (float64) times the largest term. Real terms without weights give a
    real result (their sum is positive); complex terms or weights give a complex one.
    """
    # Not jax.nn.logsumexp(..., b=, return_sign=True): that takes real logs and signed real
    # weights, while image terms here are complex logs (phases) with complex characters, and a
    # sum that cancels to rounding noise must become the exact zero above, not noise.
    terms = log_terms if log_weights is None else log_terms + log_weights
    m = jax.lax.stop_gradient(jnp.max(jnp.real(terms), axis=axis, keepdims=True))
    m = jnp.where(jnp.isfinite(m), m, 0.0)
    s = jnp.sum(jnp.exp(terms - m), axis=axis)
    real_dtype = jnp.real(s).dtype
    tiny = jnp.finfo(real_dtype).tiny
    noise = 16.0 * terms.shape[axis] * jnp.finfo(real_dtype).eps
    if jnp.iscomplexobj(s):
        safe = jnp.where(jnp.abs(s) > noise, s, tiny)
    else:
        safe = jnp.where(s > noise, s, tiny)  # real terms: s > 0 unless it underflowed
    return jnp.squeeze(m, axis) + jnp.log(safe)


def projection_elements(sector: Sector | SymmetryGroup, spin_parity: int | None = None):
    """``(perms (E, N) in gather form, flips (E,), characters (E,))`` of a projection's elements,
    ``(e·x)_j = flips[e] x[perms[e, j]]``: the group's, followed by their spin-flipped copies
    when ``spin_parity`` is ±1 (their characters times the parity). A bare
    :class:`~psiloom.symmetry.SymmetryGroup` means the invariant sector (all characters 1)."""
    if isinstance(sector, SymmetryGroup):
        sector = Sector(sector, np.ones(len(sector)), "invariant")
    if not isinstance(sector, Sector):
        raise ValueError(f"sector must be a Sector or a SymmetryGroup, got {sector!r}")
    one_of("spin_parity", spin_parity, (None, 1, -1))
    group = sector.group
    perms, flips, chi = group.perms, np.asarray(group.flips), np.asarray(sector.characters)
    if spin_parity is not None:
        perms = np.concatenate([perms, perms])
        flips = np.concatenate([flips, -flips])
        chi = np.concatenate([chi, chi * spin_parity])
    return perms, flips, chi


class Symmetrized(TrialState):
    """Projection of a trial state ``base`` onto a symmetry ``sector``.

    Attributes:
        base: any trial state (a Flax module ``(B, N) -> (B,)``, or any leading shape).
        sector: a :class:`psiloom.symmetry.Sector` (group and characters), or a bare
            :class:`~psiloom.symmetry.SymmetryGroup`, meaning the trivial (invariant) sector.
        spin_parity: ``None`` (no extra projection), ``+1`` or ``−1``: additionally project onto
            ``ψ(−x) = p ψ(x)``.

    Cost: ``|G|`` (``2|G|`` with ``spin_parity``) evaluations of ``base`` per configuration.
    """

    base: nn.Module
    sector: Sector | SymmetryGroup
    spin_parity: int | None = None

    def _elements(self):
        """:func:`projection_elements` of this state's sector and parity."""
        return projection_elements(self.sector, self.spin_parity)

    @staticmethod
    def _log_weights(chi):
        """``log χ`` as complex weights, or None when every character is 1."""
        if np.all(np.abs(chi - 1) < 1e-14):
            return None
        return jnp.asarray(np.log(chi.astype(complex)))  # log|χ| = 0; phase arg χ

    @staticmethod
    def _images(x, perms, flips):
        """Every image ``e·x`` of a batch ``x`` (n, N): shape (n, E, N)."""
        return x[:, perms] * jnp.asarray(flips, dtype=x.dtype)[None, :, None]

    @staticmethod
    def _weighted_sum(terms, log_w):
        """``log Σ_e χ_e exp(l_e)`` over axis 1 (complex when the weights are)."""
        if log_w is not None:
            terms = terms.astype(jnp.result_type(terms.dtype, jnp.complex64))
        return log_sum_exp_weighted(terms, log_w, axis=1)

    def log_amplitude(self, x):
        perms, flips, chi = self._elements()
        b, n = x.shape
        if n != perms.shape[1]:
            raise ValueError(f"configurations have {n} sites, the group acts on {perms.shape[1]}")
        g = perms.shape[0]
        logs = self.base(self._images(x, perms, flips).reshape(b * g, n)).reshape(b, g)
        return self._weighted_sum(logs, self._log_weights(chi)) - np.log(g)

    def fast_updates(self) -> FastUpdates | None:
        """Fast updates through the base state's (module docstring); ``None`` without them."""
        if not supports_fast_updates(self.base):
            return None
        perms, flips, chi = self._elements()
        base = self.base.clone(parent=None)
        base_vars = {col: tree["base"] for col, tree in self.variables.items() if "base" in tree}
        base_fast = cast("FastUpdates | None", base.apply(base_vars, method="fast_updates"))
        if base_fast is None:
            return None
        images_tab = jnp.asarray(np.argsort(perms, axis=1))  # e(i): where site i goes
        signs = jnp.asarray(flips)
        log_w = self._log_weights(chi)

        def init(x):
            seen = self._images(x, perms, flips)  # (n, E, N)
            terms = jax.vmap(lambda y: base.apply(base_vars, y), in_axes=1, out_axes=1)(seen)
            cache = jax.vmap(base_fast.init, in_axes=1, out_axes=1)(seen)
            return SymmetrizedCache(cache, terms, self._weighted_sum(terms, log_w))

        def moved_and_values(sites, new_values):
            sites = jnp.asarray(sites)
            # sites shared by all samples (K,) stay shared within each image: (E, K); else (E, n, K)
            moved = jnp.where(sites >= 0, images_tab[:, jnp.where(sites >= 0, sites, 0)], -1)
            values = signs[:, None, None].astype(new_values.dtype) * new_values[None]  # (E, n, K)
            return moved, values

        def combine(cache, delta, base_cache):
            terms = cache.terms + delta.astype(cache.terms.dtype)  # (n, E)
            total = self._weighted_sum(terms, log_w)
            return total - cache.log_amplitude, SymmetrizedCache(base_cache, terms, total)

        def update(old_values, cache: SymmetrizedCache, sites, new_values):
            # the image e.x holds f_e x_i at e(i): its old values are f_e times those of x
            moved, values = moved_and_values(sites, new_values)
            old = signs[:, None, None].astype(old_values.dtype) * old_values[None]  # (E, n, K)
            one_image = jax.vmap(base_fast.update, in_axes=(0, 1, 0, 0), out_axes=(1, 1))
            return combine(cache, *one_image(old, cache.base, moved, values))

        return FastUpdates(init, update)
