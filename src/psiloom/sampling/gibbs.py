"""Block Gibbs sampling of |ψ|² for restricted Boltzmann machines with real parameters.

Derivation
----------
Write the RBM (see :mod:`psiloom.states.rbm`) with visible spins ``v ∈ {±1}^N``, hidden spins
``h ∈ {±1}^M`` and the energy

    E(v, h) = −a·v − b·h − vᵀ W h,        ψ(v) = Σ_h exp(−E(v, h)).

For real ``a, b, W`` every term is positive, so ψ(v) > 0 and

    |ψ(v)|² = ψ(v) ψ(v) = Σ_{h, h'} exp(−E(v, h) − E(v, h')),

a sum over two independent copies ``h, h'`` of the hidden layer. Hence |ψ(v)|² is the
marginal of the joint distribution on (v, h, h')

    π(v, h, h') ∝ exp(−E(v, h) − E(v, h'))
               = exp(2 a·v + b·(h + h') + vᵀ W (h + h')).

Both block conditionals of π factorise over single spins:

* given v, the copies are independent and each hidden spin is independent,
  with θ = Wᵀ v + b:  π(h_j = +1 | v) = π(h'_j = +1 | v) = σ(2 θ_j);
* given (h, h'), the visible spins are independent, with φ = 2a + W (h + h'):
  π(v_i = +1 | h, h') = σ(2 φ_i),

where σ(z) = 1 / (1 + e^{−z}) (for a spin s = ±1 with weight e^{s z}, P(s = +1) = σ(2z)).
Alternating exact draws from these two conditionals is a two-block Gibbs sampler
(Geman & Geman 1984): each half-step leaves π invariant, so π — and with it its v-marginal
|ψ|² — is stationary; all conditionals are strictly positive, so the chain is irreducible and
aperiodic and converges to π. No proposal is ever rejected.

Requirements: an unconstrained spin space (the visible update resamples every spin
independently and cannot hold a magnetisation fixed) and real parameters (for complex
weights exp(−E) is not positive and the two-copy identity above fails). Both raise
``ValueError``.

The sampler needs the weights, not only ``x ↦ log ψ``: pass a
:class:`psiloom.states.BoundState` (the training loop does) as the ``log_amplitude`` argument.
"""

from __future__ import annotations

from typing import NamedTuple

import jax
import jax.numpy as jnp

from psiloom.reduce import sample_mean
from psiloom._validation import nonnegative_int, positive_int
from psiloom.sampling.base import evaluate_log_amplitudes
from psiloom.sampling.metropolis import ChainState
from psiloom.spaces import SpinSpace
from psiloom.states.bound import BoundState
from psiloom.states.rbm import RBM


class GibbsInfo(NamedTuple):
    """What one block-Gibbs sweep did, per chain."""
    moved: jax.Array  # (n_chains,) bool: whether the visible configuration changed
    changed_fraction: jax.Array  # (n_chains,) fraction of visible spins that changed


class RBMWeights(NamedTuple):
    """Real RBM arrays for block Gibbs: p(x, h) ∝ exp(a·x + b·h + xᵀW h)."""
    visible_bias: jax.Array  # a, (N,)
    kernel: jax.Array  # W, (N, M)
    hidden_bias: jax.Array  # b, (M,)


def rbm_weights(state: BoundState) -> RBMWeights:
    """The real ``(a, W, b)`` of an RBM bound to its variables (missing biases → zeros).

    Raises ValueError when ``state`` is not a bound :class:`~psiloom.states.RBM` with real
    parameters.
    """
    if not isinstance(state, BoundState):
        raise ValueError(
            "block Gibbs sampling needs the RBM weights: pass BoundState(model, variables) as "
            f"log_amplitude, got {type(state).__name__}"
        )
    model = state.model
    if not isinstance(model, RBM):
        raise ValueError(f"block Gibbs sampling needs an RBM trial state, got {type(model).__name__}")
    if model.complex_params:
        raise ValueError("block Gibbs sampling needs real RBM parameters, got complex_params=True")
    params = state.variables["params"] if "params" in state.variables else state.variables
    try:
        kernel = params["kernel"]
    except (KeyError, TypeError) as err:
        raise ValueError(f"RBM variables lack a 'kernel' entry: {err}") from err
    for name, leaf in params.items():
        if jnp.iscomplexobj(leaf):
            raise ValueError(f"block Gibbs sampling needs real RBM parameters, '{name}' has dtype {leaf.dtype}")
    n, m = kernel.shape
    a = params["visible_bias"] if "visible_bias" in params else jnp.zeros((n,), kernel.dtype)
    b = params["hidden_bias"] if "hidden_bias" in params else jnp.zeros((m,), kernel.dtype)
    return RBMWeights(a, kernel, b)


def gibbs_update(key: jax.Array, x: jax.Array, weights: RBMWeights) -> jax.Array:
    """One block Gibbs update (h, h' | v) then (v | h, h') for a batch ``x`` of shape (C, N)."""
    a, w, b = weights
    k_h, k_v = jax.random.split(key)
    theta = x.astype(w.dtype) @ w + b  # (C, M)
    u_h = jax.random.uniform(k_h, (2, *theta.shape), dtype=w.dtype)
    hidden = jnp.where(u_h < jax.nn.sigmoid(2.0 * theta)[None], 1.0, -1.0).astype(w.dtype)  # (2, C, M)
    field = 2.0 * a + (hidden[0] + hidden[1]) @ w.T  # (C, N)
    u_v = jax.random.uniform(k_v, field.shape, dtype=w.dtype)
    return jnp.where(u_v < jax.nn.sigmoid(2.0 * field), 1.0, -1.0).astype(x.dtype)


class BlockGibbsSampler:
    """Block Gibbs sampler for real-parameter RBMs over ``n_chains`` chains.

    Args:
        space: an unconstrained :class:`~psiloom.spaces.SpinSpace`.
        n_chains: number of independent chains.
        sweep: Gibbs updates between stored samples (each update resamples every spin).
        burn_in: sweeps discarded at the start of every :meth:`sample` call.

    ``log_amplitude`` arguments must be :class:`~psiloom.states.BoundState` of an RBM. The
    reported acceptance is the fraction of updates that changed a chain's configuration.
    """

    def __init__(self, space: SpinSpace, n_chains: int = 16, sweep: int = 1, burn_in: int = 0):
        if space.is_sector:
            raise ValueError(
                f"block Gibbs sampling resamples every spin independently and cannot keep "
                f"magnetisation={space.magnetisation} fixed: use an unconstrained SpinSpace"
            )
        self.space = space
        self.n_chains = positive_int("n_chains", n_chains)
        self.sweep = positive_int("sweep", sweep)
        self.burn_in = nonnegative_int("burn_in", burn_in)

    def _weights(self, log_amplitude) -> RBMWeights:
        weights = rbm_weights(log_amplitude)
        if weights.kernel.shape[0] != self.space.n_sites:
            raise ValueError(
                f"RBM has {weights.kernel.shape[0]} visible spins, the space has {self.space.n_sites} sites"
            )
        return weights

    def init(self, key: jax.Array, log_amplitude: BoundState) -> ChainState:
        """Random starting configurations and their log-amplitudes."""
        self._weights(log_amplitude)
        x = self.space.random(key, self.n_chains)
        return ChainState(x, evaluate_log_amplitudes(log_amplitude, x))

    def refresh(self, state: ChainState, log_amplitude) -> ChainState:
        """Recompute the cached log-amplitudes (after the parameters changed)."""
        return ChainState(state.x, evaluate_log_amplitudes(log_amplitude, state.x))

    def step(self, key: jax.Array, state: ChainState, log_amplitude: BoundState):
        """One block Gibbs update per chain: ``(state, GibbsInfo)``."""
        weights = self._weights(log_amplitude)
        x = gibbs_update(key, state.x, weights)
        changed = x != state.x
        info = GibbsInfo(jnp.any(changed, axis=1), jnp.mean(changed, axis=1))
        return ChainState(x, log_amplitude(x)), info

    def _sweep(self, key, x, weights):
        def body(carry, k):
            x, moved = carry
            x_new = gibbs_update(k, x, weights)
            return (x_new, moved + sample_mean(jnp.any(x_new != x, axis=1).astype(jnp.float32))), None

        (x, moved), _ = jax.lax.scan(body, (x, jnp.zeros((), jnp.float32)), jax.random.split(key, self.sweep))
        return x, moved / self.sweep

    def sample(self, key: jax.Array, state: ChainState, log_amplitude: BoundState, n_per_chain: int):
        """Burn in, then store ``n_per_chain`` samples per chain, ``sweep`` updates apart.

        Returns ``(samples (n_per_chain, n_chains, N), log_amps (n_per_chain, n_chains), state,
        acceptance)`` with acceptance the fraction of updates that moved a chain.
        """
        n_per_chain = positive_int("n_per_chain", n_per_chain)
        weights = self._weights(log_amplitude)
        k_burn, k_run = jax.random.split(key)
        x = state.x
        if self.burn_in:
            x, _ = jax.lax.scan(lambda x, k: (self._sweep(k, x, weights)[0], None), x,
                                jax.random.split(k_burn, self.burn_in))

        def collect(x, k):
            x, moved = self._sweep(k, x, weights)
            return x, (x, moved)

        x, (xs, moved) = jax.lax.scan(collect, x, jax.random.split(k_run, n_per_chain))
        logs = log_amplitude(xs)
        return xs, logs, ChainState(x, logs[-1]), sample_mean(moved)
