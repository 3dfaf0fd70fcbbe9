"""The linear system of the time-dependent variational principle (TDVP).

A trial state ψ_θ follows the exact evolution as closely as its family allows when θ̇ minimises
the distance (McLachlan's principle; Carleo & Troyer, Science 355, 602 (2017))

    D(θ̇) = ‖ Σ_k θ̇_k ΔO_k ψ − 𝒢 ψ ‖² / ‖ψ‖² ,         𝒢 = −i ΔH (real time),  −ΔH (imaginary time),

with O_k(x) = ∂ log ψ(x)/∂θ_k, ΔO = O − ⟨O⟩ and ΔH = H − ⟨H⟩ (the centring removes the norm and
global phase, which carry no physics). With the quantum geometric tensor and the force

    S_kl = ⟨ΔO_k* ΔO_l⟩ ,        F_k = ⟨ΔO_k* ΔE_loc⟩ ,      ⟨·⟩ over |ψ|²,

the stationary point solves one of two linear systems S θ̇ = G:

* **holomorphic** (complex parameters, log ψ holomorphic in them): complex θ̇,
  S θ̇ = −i F (real time), S θ̇ = −F (imaginary time);
* **real parameters** (any state; a complex leaf counts as its real and imaginary parts, exact also
  for non-holomorphic log ψ): real θ̇,
  Re S θ̇ = Im F (real time), Re S θ̇ = −Re F (imaginary time).

Real time is the Schrödinger equation i ∂_t ψ = H ψ (ħ = 1; t in inverse energy units of H);
imaginary time is ∂_τ ψ = −H ψ, which decays towards the ground state.

Estimators: from Markov-chain samples every average is the sample mean (weights 1/n); for
small spaces ``exact`` weights w_x = |ψ(x)|²/Σ_y|ψ(y)|² over all configurations make S, F and
⟨H⟩ exact. The per-sample contributions g_s to G (G = Σ_s w_s g_s) are kept for the
signal-to-noise regularisation (:mod:`psiloom.dynamics.regularisation`).

The TDVP residual (Hofmann, Fabiani, Mendes-Santos, Mauroux & Carleo, SciPost Phys. 12, 165
(2022)) is the relative distance left after the solve,

    r² = D(θ̇)/D(0) = (θ̇†Sθ̇ − 2 Re θ̇†G + Var H) / Var H ,

0 when the family follows the exact evolution, 1 when θ̇ = 0 (0 is returned for an eigenstate,
Var H = 0, which does not move).
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp
from jax.flatten_util import ravel_pytree

from psiloom.batching import map_in_chunks
from psiloom.optimize.flatten import ravel_real

__all__ = ["TDVPSystem", "flatten_parameters", "log_derivatives", "tdvp_system", "residual",
           "all_complex"]


class TDVPSystem(NamedTuple):
    """S θ̇ = G with what the regularisations and diagnostics need (module docstring).

    ``matrix`` (P, P): S (complex Hermitian, holomorphic) or Re S (real symmetric);
    ``rhs`` (P,): G; ``rhs_samples`` (n, P): per-sample g_s with G = Σ_s w_s g_s;
    ``weights`` (n,): w_s (sum 1); ``n_effective``: sample count for the noise of G (inf: exact);
    ``energy``: ⟨H⟩ (complex; its imaginary part is noise); ``variance``: Var H = ⟨|ΔE_loc|²⟩.
    """

    matrix: jax.Array
    rhs: jax.Array
    rhs_samples: jax.Array
    weights: jax.Array
    n_effective: jax.Array
    energy: jax.Array
    variance: jax.Array


def all_complex(params) -> bool:
    """Whether every inexact leaf of ``params`` is complex (needed by the holomorphic formulation)."""
    leaves = [l for l in jax.tree_util.tree_leaves(params) if jnp.issubdtype(jnp.result_type(l), jnp.inexact)]
    return bool(leaves) and all(jnp.iscomplexobj(l) for l in leaves)


def flatten_parameters(params, holomorphic: bool):
    """``(vector, unravel)``: complex vector of the leaves (holomorphic) or the real vector with
    complex leaves split into real and imaginary parts (:func:`psiloom.optimize.ravel_real`)."""
    if holomorphic:
        return ravel_pytree(params)
    return ravel_real(params)


def log_derivatives(apply_fn: Callable, params, x: jax.Array, holomorphic: bool, chunk: int | None = None):
    """O_sk = ∂ log ψ(x_s)/∂θ_k, shape ``(n, P)``, complex (real when log ψ and θ are real).

    Holomorphic: the complex derivative with respect to the complex vector of
    :func:`flatten_parameters`. Real parameters: derivatives of Re log ψ and Im log ψ with respect
    to each real component, combined as ∂Re + i ∂Im.
    """
    vec, unravel = flatten_parameters(params, holomorphic)

    def log_psi(v, xi):
        return apply_fn(unravel(v), xi[None])[0]

    out = jax.eval_shape(lambda v: log_psi(v, x[0]), vec)
    complex_out = jnp.issubdtype(out.dtype, jnp.complexfloating)
    if holomorphic:
        if not complex_out:
            raise ValueError("the holomorphic formulation needs a complex log ψ and complex parameters")

        def one(xi):
            return jax.grad(lambda v: log_psi(v, xi), holomorphic=True)(vec)
    elif complex_out:
        def one(xi):
            re = jax.grad(lambda v: jnp.real(log_psi(v, xi)))(vec)
            im = jax.grad(lambda v: jnp.imag(log_psi(v, xi)))(vec)
            return re + 1j * im
    else:
        def one(xi):
            return jax.grad(lambda v: log_psi(v, xi))(vec)

    return map_in_chunks(jax.vmap(one), chunk, x)


def tdvp_system(o: jax.Array, e_loc: jax.Array, weights: jax.Array | None = None,
                holomorphic: bool = False, imaginary: bool = False) -> TDVPSystem:
    """The TDVP system from log-derivatives ``o`` (n, P) and local energies ``e_loc`` (n,).

    ``weights``: probabilities of the rows (exact enumeration, w_x ∝ |ψ(x)|²); ``None`` for
    samples of |ψ|² (weights 1/n). See the module docstring for the formulas.
    """
    n = o.shape[0]
    ctype = jnp.result_type(o.dtype, e_loc.dtype, jnp.complex64)
    o = o.astype(ctype)
    e_loc = e_loc.astype(ctype)
    exact = weights is not None
    if weights is None:
        weights = jnp.full((n,), 1.0 / n, jnp.real(o).dtype)
    else:
        weights = weights / jnp.sum(weights)
    energy = weights @ e_loc
    d_o = o - weights @ o
    d_e = e_loc - energy
    variance = weights @ jnp.abs(d_e) ** 2
    force_samples = jnp.conj(d_o) * d_e[:, None]  # ΔO* ΔE per sample
    s = (jnp.conj(d_o) * weights[:, None]).T @ d_o
    if holomorphic:
        g = -force_samples if imaginary else -1j * force_samples
    else:
        s = jnp.real(s)
        g = -jnp.real(force_samples) if imaginary else jnp.imag(force_samples)
    rhs = weights @ g
    n_eff = jnp.asarray(jnp.inf if exact else float(n), jnp.real(o).dtype)
    return TDVPSystem(s, rhs, g, weights, n_eff, energy, variance)


def residual(system: TDVPSystem, theta_dot: jax.Array) -> jax.Array:
    """The relative TDVP residual r² = D(θ̇)/D(0) (module docstring), a real scalar in [0, ∞)."""
    v = theta_dot.astype(system.matrix.dtype) if jnp.iscomplexobj(system.matrix) else theta_dot
    quad = jnp.real(jnp.vdot(v, system.matrix @ v))
    cross = jnp.real(jnp.vdot(v, system.rhs))
    var = system.variance
    r2 = (quad - 2.0 * cross + var) / jnp.where(var > 0, var, 1.0)
    return jnp.where(var > 0, jnp.maximum(r2, 0.0), 0.0)
