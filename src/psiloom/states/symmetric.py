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
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import flax.linen as nn

from psiloom.states.base import TrialState
from psiloom.symmetry import Sector, SymmetryGroup

__all__ = ["Symmetrized", "log_sum_exp_weighted"]


def log_sum_exp_weighted(log_terms, log_weights=None, axis: int = -1):
    """``log Σ exp(log_terms + log_weights)`` along ``axis`` for complex logs (stable).

    With ``m`` the largest real part, the sum ``s = Σ exp(l − m)`` has terms of modulus ≤ 1.
    If ``|s|`` is below ``16 K ε`` (``K`` terms, ``ε`` the machine epsilon) it carries no
    significant digit — the terms cancel to rounding noise — and is treated as an exact zero:
    the result is then ``m + log(tiny)`` (``tiny`` the smallest normal number), i.e. an
    amplitude ~1e-308 (float64) times the largest term. Real terms without weights give a
    real result (their sum is positive); complex terms or weights give a complex one.
    """
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

    def _sector(self) -> Sector:
        if isinstance(self.sector, Sector):
            return self.sector
        if isinstance(self.sector, SymmetryGroup):
            return Sector(self.sector, np.ones(len(self.sector)), "invariant")
        raise ValueError(f"sector must be a Sector or a SymmetryGroup, got {self.sector!r}")

    def log_amplitude(self, x):
        sec = self._sector()
        if self.spin_parity not in (None, 1, -1):
            raise ValueError(f"spin_parity must be None, +1 or -1, got {self.spin_parity!r}")
        group = sec.group
        b, n = x.shape
        if n != group.n_sites:
            raise ValueError(f"configurations have {n} sites, the group acts on {group.n_sites}")
        chi = np.asarray(sec.characters)
        images = group.orbit(x)  # (B, G, N)
        if self.spin_parity is not None:
            images = jnp.concatenate([images, -images], axis=1)
            chi = np.concatenate([chi, chi * self.spin_parity])
        g = images.shape[1]
        logs = self.base(images.reshape(b * g, n)).reshape(b, g)
        trivial = np.all(np.abs(chi - 1) < 1e-14)
        if trivial:
            log_w = None
        else:
            log_w = jnp.asarray(np.log(chi.astype(complex)))  # log|χ| = 0; phase arg χ
            logs = logs.astype(jnp.result_type(logs.dtype, jnp.complex64))
        return log_sum_exp_weighted(logs, log_w, axis=1) - np.log(g)
