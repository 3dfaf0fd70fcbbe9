"""The negative log-likelihood of a measurement record and its gradient.

For a trial state ψ_θ with normaliser Z(θ) = Σ_x |ψ_θ(x)|² and a batch of B shots (s, b),

    NLL(θ) = −(1/B) Σ_shots log p_θ,b(s) = −(1/B) Σ_shots 2 Re log ψ_θ,b(s) + log Z(θ),

with the rotated amplitudes ψ_b of :mod:`psiloom.tomography.rotations` (the same Z in every basis,
since the rotations are unitary). Its gradient is a data term minus a model term,

    ∇NLL = −(1/B) Σ_shots 2 Re ∇ log ψ_b(s)  +  E_{x∼|ψ|²/Z}[2 Re ∇ log ψ(x)],

(maximum-likelihood learning of a trial state from shots: Torlai, Mazzola, Carrasquilla,
Troyer, Melko & Carleo, Nat. Phys. 14, 447 (2018)). The data term is exact on every batch;
the model term (the gradient of log Z) is computed in one of four ways:

* ``"exact"``: log Z = logsumexp_x 2 Re log ψ(x) by enumerating all 2^N configurations;
* ``"normalised"``: Z = 1 by construction (the autoregressive
  :class:`~psiloom.states.ChainRuleState`), so the likelihood is exact with no model term;
* ``"contrastive"`` (CD-k, Hinton, Neural Comput. 14, 1771 (2002)): the expectation is replaced
  by the mean over chains started at the batch's outcomes after k block Gibbs updates
  (:func:`psiloom.sampling.gibbs_update`; RBMs with real parameters);
* ``"persistent"`` (PCD, Tieleman, ICML 2008): the same chains continue from one step to the next.

Sampled model terms enter as the surrogate ``(1/C) Σ_chains 2 Re log ψ(x_c)`` with the chain
configurations held fixed, whose gradient is the estimate above.

Gradients of complex parameters follow the package convention ∂L/∂Re θ + i ∂L/∂Im θ
(:func:`descent_direction`), so optax's ``θ ← θ − η g`` descends for real and complex θ alike.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
from jax.scipy.special import logsumexp

from psiloom.sampling.gibbs import gibbs_update, rbm_weights
from psiloom.states.bound import BoundState
from psiloom.tomography.rotations import rotated_log_amplitudes

#: How the model term of the gradient is computed (module docstring).
NORMALISERS = ("exact", "normalised", "contrastive", "persistent")

__all__ = [
    "NORMALISERS", "log_normaliser", "shot_log_probabilities", "negative_log_likelihood",
    "sampled_surrogate", "descent_direction", "gibbs_chains", "nll_and_gradient", "surrogate_gradient",
]


def log_normaliser(model, variables, configurations) -> jax.Array:
    """``log Z = log Σ_x |ψ(x)|²`` over the enumerated ``configurations`` (2^N, N)."""
    return logsumexp(2.0 * jnp.real(model.apply(variables, configurations)))


def shot_log_probabilities(model, variables, outcomes, sites, factors) -> jax.Array:
    """Unnormalised ``2 Re log ψ_b(s)`` of every shot of a batch (add −log Z for log p)."""
    return 2.0 * jnp.real(rotated_log_amplitudes(lambda x: model.apply(variables, x), outcomes, sites, factors))


def negative_log_likelihood(model, variables, outcomes, sites, factors, log_z) -> jax.Array:
    """Mean NLL of a batch of shots given ``log Z`` (0 for a normalised state)."""
    return -jnp.mean(shot_log_probabilities(model, variables, outcomes, sites, factors)) + log_z


def sampled_surrogate(model, variables, outcomes, sites, factors, chains) -> jax.Array:
    """``−(1/B) Σ 2 Re log ψ_b(s) + (1/C) Σ_c 2 Re log ψ(x_c)``: its gradient is the sampled
    NLL gradient (the chain configurations are constants); its value is not the NLL."""
    chains = jax.lax.stop_gradient(chains)
    model_term = jnp.mean(2.0 * jnp.real(model.apply(variables, chains)))
    return -jnp.mean(shot_log_probabilities(model, variables, outcomes, sites, factors)) + model_term


def descent_direction(grads):
    """jax.grad of a real loss → the convention ∂L/∂Re θ + i ∂L/∂Im θ (conjugate complex leaves)."""
    return jax.tree_util.tree_map(lambda g: jnp.conj(g) if jnp.iscomplexobj(g) else g, grads)


def gibbs_chains(key, model, variables, start, n_updates: int) -> jax.Array:
    """``n_updates`` block Gibbs updates of the chains ``start`` (C, N) under |ψ|² of a real RBM."""
    weights = rbm_weights(BoundState(model, variables, fast=False))
    keys = jax.random.split(key, n_updates)
    x, _ = jax.lax.scan(lambda x, k: (gibbs_update(k, x, weights), None), start, keys)
    return jax.lax.stop_gradient(x)


def nll_and_gradient(model, variables, outcomes, sites, factors, configurations=None):
    """``(NLL, gradient)`` with the exact model term (``configurations`` enumerated) or none
    (``configurations=None``: a normalised state)."""
    def loss(v):
        log_z = 0.0 if configurations is None else log_normaliser(model, v, configurations)
        return negative_log_likelihood(model, v, outcomes, sites, factors, log_z)

    value, grads = jax.value_and_grad(loss)(variables)
    return value, descent_direction(grads)


def surrogate_gradient(model, variables, outcomes, sites, factors, chains):
    """The sampled NLL gradient with the model term from ``chains`` (CD-k or PCD samples)."""
    grads = jax.grad(lambda v: sampled_surrogate(model, v, outcomes, sites, factors, chains))(variables)
    return descent_direction(grads)
