"""Direct (exact, independent) sampling from autoregressive trial states.

For a trial state whose |ψ|² factorises into normalised conditionals,
p(x) = Π_i p(x_i | x_<i) (see :mod:`psiloom.states.autoregressive`), drawing x_0, then x_1
given x_0, and so on yields exact and mutually independent samples of |ψ|²: there is no
burn-in, no rejection, and the integrated autocorrelation time is exactly 1.

:class:`ChainRuleSampler` follows the same protocol as the Markov-chain samplers so that the
training loop and every optimiser use it unchanged: the "chains" are just the columns of the
sample array. The ``log_amplitude`` argument must be a :class:`psiloom.states.BoundState` of a
model with a ``sample(key, n_samples)`` method (e.g. :class:`psiloom.states.ChainRuleState`).
"""

from __future__ import annotations

from typing import NamedTuple

import jax
import jax.numpy as jnp

from psiloom._validation import positive_int
from psiloom.sampling.base import evaluate_log_amplitudes
from psiloom.sampling.metropolis import ChainState
from psiloom.spaces import SpinSpace
from psiloom.states.bound import BoundState


class DrawInfo(NamedTuple):
    """Info of a direct draw (every draw is accepted)."""
    accepted: jax.Array  # (n_chains,) always True: every draw is a new independent sample


class ChainRuleSampler:
    """Exact independent draws from an autoregressive trial state, ``n_chains`` per row.

    Args:
        space: the configuration space; its ``magnetisation`` must match the model's.
        n_chains: samples per row of the returned ``(n_per_chain, n_chains, N)`` array.
    """

    def __init__(self, space: SpinSpace, n_chains: int = 16):
        self.space = space
        self.n_chains = positive_int("n_chains", n_chains)

    def _check(self, log_amplitude) -> BoundState:
        if not isinstance(log_amplitude, BoundState):
            raise ValueError(
                "direct sampling needs the trial state itself: pass BoundState(model, variables) as "
                f"log_amplitude, got {type(log_amplitude).__name__}"
            )
        model = log_amplitude.model
        if not callable(getattr(model, "sample", None)):
            raise ValueError(f"{type(model).__name__} has no sample(key, n_samples) method for direct sampling")
        model_sz = getattr(model, "magnetisation", None)
        space_sz = self.space.magnetisation
        if (model_sz is None) != (space_sz is None) or (model_sz is not None and float(model_sz) != space_sz):
            raise ValueError(
                f"the model samples magnetisation={model_sz!r} but the space has magnetisation={space_sz!r}"
            )
        return log_amplitude

    def _draw(self, key, log_amplitude: BoundState, n: int) -> jax.Array:
        x = log_amplitude.apply_method("sample", key, n)
        if x.shape[-1] != self.space.n_sites:
            raise ValueError(f"the model draws {x.shape[-1]} sites, the space has {self.space.n_sites}")
        return x

    def init(self, key: jax.Array, log_amplitude: BoundState) -> ChainState:
        """One independent draw per chain (kept only to satisfy the sampler protocol)."""
        log_amplitude = self._check(log_amplitude)
        x = self._draw(key, log_amplitude, self.n_chains)
        return ChainState(x, evaluate_log_amplitudes(log_amplitude, x))

    def refresh(self, state: ChainState, log_amplitude) -> ChainState:
        """Recompute the cached log-amplitudes (nothing else depends on the previous draws)."""
        return ChainState(state.x, evaluate_log_amplitudes(log_amplitude, state.x))

    def step(self, key: jax.Array, state: ChainState, log_amplitude: BoundState):
        """A fresh independent draw for every chain: ``(state, DrawInfo)``."""
        log_amplitude = self._check(log_amplitude)
        x = self._draw(key, log_amplitude, self.n_chains)
        return ChainState(x, log_amplitude(x)), DrawInfo(jnp.ones((self.n_chains,), bool))

    def sample(self, key: jax.Array, state: ChainState, log_amplitude: BoundState, n_per_chain: int):
        """``n_per_chain · n_chains`` independent draws, shaped ``(n_per_chain, n_chains, N)``.

        Returns ``(samples, log_amps (n_per_chain, n_chains), state, acceptance = 1)``.
        """
        n_per_chain = positive_int("n_per_chain", n_per_chain)
        log_amplitude = self._check(log_amplitude)
        x = self._draw(key, log_amplitude, n_per_chain * self.n_chains)
        xs = x.reshape(n_per_chain, self.n_chains, x.shape[-1])
        logs = log_amplitude(xs)
        return xs, logs, ChainState(xs[-1], logs[-1]), jnp.ones((), jnp.float32)
