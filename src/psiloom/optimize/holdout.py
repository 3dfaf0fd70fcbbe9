"""Held-out check of a stochastic-reconfiguration step: does the step fitted on one batch of
samples also lower the energy on an independent batch?

The SR step δ = (S + ε I)⁻¹ F is solved on a *fit* batch (X, ε_E: the centred, scaled
log-derivatives and local energies of :class:`~psiloom.optimize.SampleGeometry`, S = XᵀX,
F = Xᵀ ε_E = ½ ∇E). Moving the parameters by −η δ changes log ψ at a sample by −η O δ and the
energy, to first order, by

    dE/dη = −∇E · δ = −2 (X δ) · ε_E        (hartree per unit learning rate for electrons).

On the fit batch this is the descent the solve promises; on a *held-out* batch, drawn
independently from the same state, (X_h δ) · ε_h estimates the descent the state really gets.
When samples are fewer than parameters a small shift lets δ fit the fit batch's noise: the
held-out descent is then a small fraction of the fit descent, and the held-out correlation
between X_h δ and ε_h (the Pearson correlation of −η O δ's decrease with E_L, both centred) is
low. Comparing shifts on the same two batches (:func:`held_out_scan`) shows which one generalises (a measured case is in
DEVELOPERS.md, "LiH's optimisation, measured"). The idea is the validation-set check of
statistical learning applied to the natural-gradient step (common practice).

Only a scalar shift ε is checked; the solve is the one :func:`stochastic_reconfiguration` uses
(the n × n sample-space form when rows < parameters, else the P × P form; exact linear algebra).
"""

from __future__ import annotations

from typing import NamedTuple

import jax
import jax.numpy as jnp

from psiloom._validation import finite_real
from psiloom.optimize.sr import _solve_dense, _solve_sample_space_scalar


class HeldOutCheck(NamedTuple):
    """What an SR step of shift ``shift`` does on the batch it was fitted on and on a held-out one.

    ``delta``: the step δ (flat real parameter vector, :func:`~psiloom.optimize.ravel_real` order).
    ``euclidean_length``: ‖δ‖. ``metric_length`` / ``held_out_metric_length``: ‖X δ‖ on each
    batch, i.e. (δᵀ S δ)^{1/2} with each batch's S. ``fit_descent`` / ``held_out_descent``:
    2 (X δ) · ε_E on each batch, the first-order energy decrease per unit learning rate
    (energy units of the local energies). ``fit_correlation`` / ``held_out_correlation``: the
    Pearson correlation of X δ with ε_E on each batch (1: the step lowers log ψ exactly where
    E_L is high). ``generalisation``: held_out_descent / fit_descent.
    """

    shift: float
    delta: jax.Array
    euclidean_length: float
    metric_length: float
    held_out_metric_length: float
    fit_descent: float
    held_out_descent: float
    fit_correlation: float
    held_out_correlation: float
    generalisation: float


@jax.jit
def _check(x, residual, x_held, residual_held, eps):
    force = x.T @ residual
    if x.shape[0] < x.shape[1]:
        delta = _solve_sample_space_scalar(x, residual, force, eps)
    else:
        delta = _solve_dense(x, force, eps)
    tiny = jnp.finfo(x.dtype).tiny

    def on(xb, rb):
        step = xb @ delta
        length = jnp.linalg.norm(step)
        overlap = step @ rb
        return length, 2.0 * overlap, overlap / jnp.maximum(length * jnp.linalg.norm(rb), tiny)

    fit, held = on(x, residual), on(x_held, residual_held)
    return delta, jnp.linalg.norm(delta), fit, held


def held_out_check(fit, held_out, shift: float = 1e-3) -> HeldOutCheck:
    """Solve the SR step of ``shift`` on the ``fit`` batch and measure it on both batches.

    ``fit``, ``held_out``: :class:`~psiloom.optimize.SampleGeometry` of two independent batches
    of the same state (same parameters), e.g. two draws of the search's sampler with their local
    energies; anything with ``jacobian()``, ``residual()`` and ``complex_output`` works.
    ``shift``: the absolute diagonal shift ε > 0 of :func:`stochastic_reconfiguration`.
    Returns a :class:`HeldOutCheck`. Costs one SR solve and two n × P products, plus the two
    batches' log-derivatives; to compare shifts, :func:`held_out_scan` forms those once.
    """
    return held_out_scan(fit, held_out, [shift])[0]


def held_out_scan(fit, held_out, shifts) -> list[HeldOutCheck]:
    """:func:`held_out_check` for each shift in ``shifts`` (a non-empty sequence), with the two
    batches' log-derivatives formed once. Call it between training steps, not inside them.

    For a trained electronic state (``search``, ``state`` of a
    :class:`~psiloom.train.GroundStateSearch`), two batches from independent chains::

        xs, *_ = search.vmc.draw(state.params, state.chains, key, 2, 5)  # (2, chains, N, 3)
        c = xs.shape[1] // 2  # independent chains: the first half fits, the second checks
        batches = [xs[:, :c].reshape(-1, *xs.shape[2:]), xs[:, c:].reshape(-1, *xs.shape[2:])]
        log_psi = lambda z: model.apply(state.params, z)
        fit, held = (SampleGeometry(model.apply, state.params, b,
                                    search.hamiltonian.local_energy(log_psi, b)) for b in batches)
        for check in held_out_scan(fit, held, [1e-3, 1e-2, 1e-1]):
            print(check.shift, check.held_out_correlation)
    """
    if isinstance(shifts, (str, bytes)) or not hasattr(shifts, "__len__") or not len(shifts):
        raise ValueError(f"shifts must be a non-empty sequence of positive numbers, got {shifts!r}")
    values = [finite_real("shift", shift, minimum=0.0) for shift in shifts]
    if 0.0 in values:
        raise ValueError("shift=0 leaves S + εI singular whenever samples are fewer than parameters or a "
                         "parameter does not change log ψ on the batch; use shift > 0")
    if bool(fit.complex_output) != bool(held_out.complex_output):
        raise ValueError(f"fit and held_out differ in complex_output ({fit.complex_output} vs "
                         f"{held_out.complex_output}): they must come from the same trial state")
    x, residual = jnp.asarray(fit.jacobian()), jnp.asarray(fit.residual())
    x_held, residual_held = jnp.asarray(held_out.jacobian()), jnp.asarray(held_out.residual())
    if x.shape[1] != x_held.shape[1]:
        raise ValueError(f"fit has {x.shape[1]} parameters and held_out {x_held.shape[1]}: both batches "
                         f"must come from the same trial state and parameters")
    for name, rows in (("fit", x.shape[0]), ("held_out", x_held.shape[0])):
        if rows < 2:
            raise ValueError(f"{name} has {rows} sample row(s); a held-out check needs at least 2 per batch")
    checks = []
    for eps in values:
        delta, norm, (m_fit, d_fit, c_fit), (m_held, d_held, c_held) = _check(
            x, residual, x_held, residual_held, jnp.asarray(eps, x.dtype))
        d_fit, d_held = float(d_fit), float(d_held)
        checks.append(HeldOutCheck(
            shift=eps, delta=delta, euclidean_length=float(norm), metric_length=float(m_fit),
            held_out_metric_length=float(m_held), fit_descent=d_fit, held_out_descent=d_held,
            fit_correlation=float(c_fit), held_out_correlation=float(c_held),
            generalisation=d_held / d_fit if d_fit != 0.0 else float("nan"),
        ))
    return checks
