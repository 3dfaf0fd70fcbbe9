"""Winsorized local energies for the gradient: outliers pulled to a window around the median.

Near nodes of ψ, or early in an optimisation, a few samples can carry local energies far from
the bulk. They barely move the mean but dominate the gradient's noise. The clipped values

    m = median_s E_loc(x_s),      w = k · mean_s |E_loc(x_s) − m|,
    Ẽ_loc(x_s) = m + clip(E_loc(x_s) − m, −w, +w)

replace E_loc in the gradient and in the SR residual only; the reported energy estimate stays
unclipped. For complex local energies the real part is clipped around the median of the real
part and the imaginary part is kept. ``k`` (``width``) of a few units touches only far outliers;
``k → ∞`` leaves every value unchanged.

The window (median ± k mean absolute deviations, k = 5) is the rule used for neural
wavefunctions of molecules by Pfau, Spencer, Matthews & Foulkes, Phys. Rev. Research 2, 033429
(2020), Methods (from memory); pulling outliers to the window edge instead of dropping them is
winsorizing in the statistician's sense. ``GroundStateSearch(winsorize=k)`` switches it on.

Gradient-norm clipping and learning-rate schedules are optax's own
(``optax.clip_by_global_norm``, ``optax.linear_schedule``, ...) and compose with
:func:`psiloom.optimize.stochastic_reconfiguration` in ``optax.chain``; put
``clip_by_global_norm`` after the SR transformation to bound the norm of the update δ.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

from psiloom._validation import positive_real
from psiloom.reduce import sample_mean, sample_median


def _check_width(width) -> float:
    return positive_real("clipping width", width)


def winsorize_local_energies(e_loc: jax.Array, width: float = 5.0) -> jax.Array:
    """Clip local energies to ``median ± width · mean|E_loc − median|`` (see module docstring).

    Args:
        e_loc: local energies, sample axis leading, shape ``(n,)``; real or complex.
        width: k > 0, the half-width in units of the mean absolute deviation from the median.
    Returns:
        Array like ``e_loc`` with outliers pulled to the window edges.
    """
    k = _check_width(width)
    e_loc = jnp.asarray(e_loc)
    if e_loc.ndim != 1:
        raise ValueError(f"local energies must have shape (n_samples,), got {e_loc.shape}")
    re = jnp.real(e_loc)
    centre = sample_median(re)
    half_width = k * sample_mean(jnp.abs(re - centre))
    clipped = centre + jnp.clip(re - centre, -half_width, half_width)
    if jnp.iscomplexobj(e_loc):
        return jax.lax.complex(clipped, jnp.imag(e_loc)).astype(e_loc.dtype)
    return clipped
