"""Metropolis sampling of |ψ(x)|² over many independent chains.

The kernel follows the pure-function pattern: a :class:`ChainState` (configurations plus the
cached ``log ψ`` of each chain) and

    step(key, state, log_amplitude) -> (state, StepInfo)

performs one proposal per chain with the Metropolis acceptance

    A(x → x') = min(1, |ψ(x')/ψ(x)|²) = min(1, exp(2 Re[log ψ(x') − log ψ(x)])).

:class:`MetropolisSampler` bundles a move with chain counts, burn-in and thinning (a *sweep*
of ``n_sites`` proposals between stored samples by default). Chains persist between
optimisation steps: after a parameter update call :meth:`MetropolisSampler.refresh` to
recompute the cached log-amplitudes, then continue sampling from where the chains stood.

Samples come out with shape ``(n_per_chain, n_chains, n_sites)`` — time along the chain
first, chains second — and flatten to a leading sample axis of ``n_per_chain · n_chains``.
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from psiloom.sampling.moves import Move, bond_exchange, pair_exchange, single_flip
from psiloom.spaces import SpinSpace

LogAmplitudeFn = Callable[[jax.Array], jax.Array]


class ChainState(NamedTuple):
    x: jax.Array  # (n_chains, n_sites) current configurations
    log_amp: jax.Array  # (n_chains,) log ψ at x


class StepInfo(NamedTuple):
    accepted: jax.Array  # (n_chains,) bool: whether each chain moved
    log_ratio: jax.Array  # (n_chains,) 2 Re[log ψ(x') − log ψ(x)]


def metropolis_step(move: Move) -> Callable:
    """Build the pure kernel ``step(key, state, log_amplitude) -> (state, StepInfo)``."""

    def step(key: jax.Array, state: ChainState, log_amplitude: LogAmplitudeFn):
        k_prop, k_acc = jax.random.split(key)
        x_new, _ = move(k_prop, state.x)
        log_new = log_amplitude(x_new)
        log_ratio = 2.0 * jnp.real(log_new - state.log_amp)
        u = jax.random.uniform(k_acc, log_ratio.shape, dtype=log_ratio.dtype)
        accept = jnp.log(u) < log_ratio
        x = jnp.where(accept[:, None], x_new, state.x)
        log_amp = jnp.where(accept, log_new, state.log_amp)
        return ChainState(x, log_amp), StepInfo(accept, log_ratio)

    return step


def _positive_int(name: str, value, allow_zero: bool = False) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ValueError(f"{name} must be an integer, got {value!r}")
    if value < (0 if allow_zero else 1):
        raise ValueError(f"{name} must be {'>= 0' if allow_zero else '>= 1'}, got {value}")
    return int(value)


class MetropolisSampler:
    """Metropolis sampler over ``n_chains`` independent chains.

    Args:
        space: the configuration space (its magnetisation constraint picks the default move).
        n_chains: number of independent chains (the batch of one proposal).
        move: a proposal ``(key, x) -> x'``; default single flips for an unconstrained space,
            nearest-neighbour exchange over ``bonds`` (or any-pair exchange without bonds)
            for a fixed-magnetisation space.
        bonds: pairs for the exchange move (e.g. ``lattice.bonds``).
        sweep: proposals between stored samples (default ``n_sites``).
        burn_in: sweeps discarded at the start of every :meth:`sample` call.
    """

    def __init__(self, space: SpinSpace, n_chains: int = 16, move: Move | None = None, bonds=None,
                 sweep: int | None = None, burn_in: int = 0):
        self.space = space
        self.n_chains = _positive_int("n_chains", n_chains)
        self.sweep = space.n_sites if sweep is None else _positive_int("sweep", sweep)
        self.burn_in = _positive_int("burn_in", burn_in, allow_zero=True)
        if move is None:
            if space.constrained:
                move = bond_exchange(bonds) if bonds is not None else pair_exchange
            else:
                move = single_flip
        elif move is single_flip and space.constrained:
            raise ValueError(
                f"single_flip changes the magnetisation but the space fixes total_sz={space.total_sz}; "
                "use an exchange move"
            )
        self.move = move
        self._step = metropolis_step(move)

    def init(self, key: jax.Array, log_amplitude: LogAmplitudeFn) -> ChainState:
        """Random valid starting configurations and their log-amplitudes."""
        x = self.space.random(key, self.n_chains)
        return ChainState(x, log_amplitude(x))

    def refresh(self, state: ChainState, log_amplitude: LogAmplitudeFn) -> ChainState:
        """Recompute the cached log-amplitudes (after the parameters changed)."""
        return ChainState(state.x, log_amplitude(state.x))

    def step(self, key, state: ChainState, log_amplitude: LogAmplitudeFn):
        """One proposal per chain: ``(state, StepInfo)``."""
        return self._step(key, state, log_amplitude)

    def _sweep(self, key, state, log_amplitude):
        def body(carry, k):
            st, acc = carry
            st, info = self._step(k, st, log_amplitude)
            return (st, acc + jnp.mean(info.accepted.astype(jnp.float32))), None

        (state, acc), _ = jax.lax.scan(body, (state, jnp.zeros((), jnp.float32)), jax.random.split(key, self.sweep))
        return state, acc / self.sweep

    def sample(self, key: jax.Array, state: ChainState, log_amplitude: LogAmplitudeFn, n_per_chain: int):
        """Burn in, then store ``n_per_chain`` samples per chain, one sweep apart.

        Returns ``(samples, log_amps, state, acceptance)`` with samples of shape
        ``(n_per_chain, n_chains, n_sites)``, their log-amplitudes ``(n_per_chain, n_chains)``
        and the mean acceptance rate over the stored part.
        """
        n_per_chain = _positive_int("n_per_chain", n_per_chain)
        k_burn, k_run = jax.random.split(key)
        if self.burn_in:
            def burn(st, k):
                return self._sweep(k, st, log_amplitude)[0], None

            state, _ = jax.lax.scan(burn, state, jax.random.split(k_burn, self.burn_in))

        def collect(st, k):
            st, acc = self._sweep(k, st, log_amplitude)
            return st, (st.x, st.log_amp, acc)

        state, (xs, logs, acc) = jax.lax.scan(collect, state, jax.random.split(k_run, n_per_chain))
        return xs, logs, state, jnp.mean(acc)
