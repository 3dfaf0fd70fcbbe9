"""Parallel tempering: replicas at a ladder of inverse temperatures β with replica swaps.

Replica ``r`` of every chain targets

    π_r(x) ∝ |ψ(x)|^{2 β_r},        1 = β_0 > β_1 > … > β_{R−1} ≥ 0,

so the flattened replicas (small β) cross the barriers between the modes of |ψ|² and pass
configurations down the ladder to the physical replica β_0 = 1, whose samples are returned.
The joint target Π_r π_r(x_r) is sampled by two kinds of moves (Swendsen & Wang 1986;
Geyer 1991; Hukushima & Nemoto 1996):

* a Metropolis update of every replica with its own acceptance
  min(1, exp(2 β_r Re[log ψ(x') − log ψ(x)])) (symmetric proposal, see
  :mod:`psiloom.sampling.moves`): the β-weighted case of the shared acceptance step
  :func:`psiloom.sampling.base.metropolis_accept`, with the proposal evaluated as in
  :mod:`psiloom.sampling.metropolis` (fast updates where the state has them);
* an exchange of the configurations of neighbouring replicas r, r+1, accepted with

      min(1, exp((β_r − β_{r+1}) (ℓ(x_{r+1}) − ℓ(x_r)))),     ℓ(x) = 2 Re log ψ(x),

  which is the ratio of the joint target after and before the exchange. Pairs with even r
  and pairs with odd r are attempted on alternate rounds (the pairs of one round are
  disjoint, so they are exchanged in one vectorised gather).

Both moves leave Π_r π_r invariant, so the β_0 replica samples |ψ|² exactly. Each
:meth:`TemperingSampler.step` is one sweep of Metropolis proposals in every replica followed
by one exchange round.

States carry shape ``(n_replicas, n_chains, ...)``; the acceptance of every replica and the
exchange rate of every neighbouring pair over the most recent :meth:`TemperingSampler.sample`
call are kept in the state (``acceptance``, ``swap_rate``) for diagnostics.
"""

from __future__ import annotations

from typing import Any, Callable, NamedTuple, Sequence

import jax
import jax.numpy as jnp
import numpy as np

from psiloom.reduce import sample_mean, sample_sum
from psiloom.sampling import base
from psiloom.sampling.base import LogAmplitudeFn, burn_in_and_collect
from psiloom._validation import ArgumentTypeError, nonnegative_int, positive_int, probability
from psiloom.sampling.metropolis import attach_cache, proposal_log_amp
from psiloom.sampling.moves import Move, choose_move
from psiloom.spaces import SpinSpace
from psiloom.states.fast import FastUpdates, fast_updates_of


class TemperingState(NamedTuple):
    """Replicas ``(R, C, N)`` of every chain at the inverse temperatures ``betas``."""
    x: jax.Array  # (R, C, N) configurations of every replica of every chain
    log_amp: jax.Array  # (R, C) log ψ at x
    parity: jax.Array  # () int32: which pair set (even r or odd r) the next exchange round tries
    acceptance: jax.Array  # (R,) Metropolis acceptance per replica over the last sample() call
    swap_rate: jax.Array  # (R−1,) accepted / attempted exchanges per pair over the last sample() call (nan: never tried)
    cache: Any = None  # fast-update cache of x flattened to (R·C, ...), None on the generic path


class TemperingInfo(NamedTuple):
    """Acceptance of the Metropolis steps and of the replica exchanges of one step."""
    acceptance: jax.Array  # (R,) mean Metropolis acceptance of each replica in this step
    attempted: jax.Array  # (R−1,) bool: which neighbouring pairs were tried in this step
    swapped: jax.Array  # (R−1, C) bool: which pairs of which chains were exchanged


def geometric_betas(n_replicas: int, beta_min: float) -> np.ndarray:
    """A geometric ladder β_r = beta_min^{r/(R−1)}, r = 0 … R−1 (β_0 = 1, β_{R−1} = beta_min)."""
    n_replicas = positive_int("n_replicas", n_replicas)
    beta_min = probability("beta_min", beta_min)
    if n_replicas == 1:
        return np.ones(1)
    return beta_min ** (np.arange(n_replicas) / (n_replicas - 1))


def _check_betas(betas) -> np.ndarray:
    try:
        raw = np.asarray(betas)
    except (TypeError, ValueError) as err:  # ragged nesting
        raise ArgumentTypeError(f"betas must be a sequence of real numbers, got {betas!r}") from err
    if raw.dtype.kind not in "iuf":  # strings, bools, complex numbers, None, mixed objects
        raise ArgumentTypeError(f"betas must be a sequence of real numbers, got {betas!r}")
    arr = raw.astype(float).reshape(-1)
    if arr.size == 0:
        raise ValueError("betas must hold at least one inverse temperature")
    if not np.all(np.isfinite(arr)) or np.any(arr < 0.0) or np.any(arr > 1.0):
        raise ValueError(f"every beta must lie in [0, 1], got {arr.tolist()}")
    if arr[0] != 1.0:
        raise ValueError(f"betas[0] must be 1 (the replica that samples |ψ|²), got {arr[0]}")
    if np.any(np.diff(arr) >= 0.0):
        raise ValueError(f"betas must decrease strictly, got {arr.tolist()}")
    return arr


def tempered_metropolis_step(move: Move, betas: Sequence[float] | np.ndarray) -> Callable:
    """Pure kernel for one proposal per replica and chain, accepted with min(1, exp(2 β_r Re Δ log ψ)):

        step(key, x (R,C,N), log_amp (R,C), log_amplitude, log_u=None, cache=None, fast=None)
            -> (x, log_amp, cache, accepted (R,C))

    ``log_u`` (R, C) are the logs of the acceptance uniforms (drawn from ``key`` when omitted).
    With ``fast`` (the :class:`~psiloom.states.FastUpdates` of ``log_amplitude``) and a cache of
    the flattened replicas (leading axis R·C), Δ log ψ comes from the cache and the sites the
    move changed; otherwise ψ(x') is evaluated in full.
    """
    betas = _check_betas(betas)

    def step(key, x, log_amp, log_amplitude: LogAmplitudeFn, log_u=None, cache=None, fast: FastUpdates | None = None):
        r, c = log_amp.shape
        k_prop, k_acc = jax.random.split(key)
        flat, flat_log = x.reshape(r * c, *x.shape[2:]), log_amp.reshape(r * c)
        flat_new, sites = move(k_prop, flat)
        delta, log_new, cache_new = proposal_log_amp(flat, flat_log, cache, flat_new, sites, log_amplitude, fast)
        log_ratio = 2.0 * jnp.real(delta)
        beta = jnp.repeat(jnp.asarray(betas, dtype=log_ratio.dtype), c)  # replica-major, as the flattening
        if log_u is None:
            log_u = jnp.log(jax.random.uniform(k_acc, (r, c), dtype=log_ratio.dtype))
        current = (flat, flat_log, cache if cache_new is not None else None)
        (flat, flat_log, cache), accept = base.metropolis_accept(
            log_u.reshape(r * c), log_ratio, (flat_new, log_new, cache_new), current, beta=beta)
        return flat.reshape(x.shape), flat_log.reshape(r, c), cache, accept.reshape(r, c)

    return step


def replica_exchange(betas: Sequence[float] | np.ndarray) -> Callable:
    """Pure kernel ``exchange(key, x, log_amp, parity, cache=None) -> (x, log_amp, cache, attempted (R−1,),
    swapped (R−1,C))``: one round of neighbour exchanges over the pairs (r, r+1) with r ≡ parity (mod 2);
    a fast-update cache (leading axis R·C) travels with its configuration."""
    betas = _check_betas(betas)
    n_rep = len(betas)
    dbeta = -np.diff(betas)  # (R−1,) β_r − β_{r+1} > 0

    def exchange(key, x, log_amp, parity, cache=None):
        if n_rep == 1:
            return x, log_amp, cache, jnp.zeros((0,), bool), jnp.zeros((0, log_amp.shape[1]), bool)
        ell = 2.0 * jnp.real(log_amp)  # (R, C)
        log_acc = jnp.asarray(dbeta, ell.dtype)[:, None] * (ell[1:] - ell[:-1])  # (R−1, C)
        attempted = (jnp.arange(n_rep - 1) % 2) == parity
        u = jax.random.uniform(key, log_acc.shape, dtype=ell.dtype)
        swapped = attempted[:, None] & (jnp.log(u) < log_acc)
        s = swapped.astype(jnp.int32)
        # replica r takes the configuration of r+1 if pair (r, r+1) swapped, of r−1 if (r−1, r) did
        source = jnp.arange(n_rep)[:, None] + jnp.pad(s, ((0, 1), (0, 0))) - jnp.pad(s, ((1, 0), (0, 0)))
        x = jnp.take_along_axis(x, source.reshape(*source.shape, *([1] * (x.ndim - 2))), axis=0)
        log_amp = jnp.take_along_axis(log_amp, source, axis=0)
        if cache is not None:
            flat_source = (source * source.shape[1] + jnp.arange(source.shape[1])[None, :]).reshape(-1)
            cache = jax.tree_util.tree_map(lambda leaf: leaf[flat_source], cache)
        return x, log_amp, cache, attempted, swapped

    return exchange


class TemperingSampler:
    """Parallel tempering over ``len(betas)`` replicas of each of ``n_chains`` chains.

    Args:
        space: the configuration space.
        n_chains: number of independent chains (each with one replica per β).
        betas: inverse temperatures, ``betas[0] = 1`` then strictly decreasing to ≥ 0
            (e.g. :func:`geometric_betas`).
        move, bonds: the Metropolis proposal, chosen as in
            :class:`~psiloom.sampling.MetropolisChains`.
        sweep: Metropolis proposals per replica between exchange rounds (default ``n_sites``);
            one sweep plus one exchange round make a :meth:`step`, and samples are stored one
            step apart.
        burn_in: steps discarded at the start of every :meth:`sample` call.

    :meth:`sample` returns the configurations of the β = 1 replica and its acceptance; the
    acceptance per replica and the exchange rate per pair stay in the returned state. Trial
    states with fast amplitude updates (:mod:`psiloom.states.fast`) are updated through them,
    with one cache per replica that travels with its configuration in exchanges.
    """

    def __init__(self, space: SpinSpace, n_chains: int = 16, betas: Sequence[float] = (1.0, 0.5),
                 move: Move | None = None, bonds=None, sweep: int | None = None, burn_in: int = 0):
        self.space = space
        self.n_chains = positive_int("n_chains", n_chains)
        self.betas = _check_betas(betas)
        self.n_replicas = len(self.betas)
        self.sweep = space.n_sites if sweep is None else positive_int("sweep", sweep)
        self.burn_in = nonnegative_int("burn_in", burn_in)
        self.move = move = choose_move(space, move, bonds)
        self._metropolis = tempered_metropolis_step(move, self.betas)
        self._exchange = replica_exchange(self.betas)

    @staticmethod
    def _with_cache(state: TemperingState, fast: FastUpdates | None, recompute: bool = True) -> TemperingState:
        """Attach (or drop) the fast-update cache of all replicas, flattened to (R·C, ...)."""
        r, c = state.log_amp.shape
        flat = state.x.reshape(r * c, *state.x.shape[2:])
        return state._replace(cache=attach_cache(flat, state.cache, fast, recompute))

    def init(self, key: jax.Array, log_amplitude: LogAmplitudeFn) -> TemperingState:
        """Independent random configurations for every replica of every chain."""
        r, c = self.n_replicas, self.n_chains
        x = self.space.random(key, r * c)
        log_amp = base.evaluate_log_amplitudes(log_amplitude, x)
        real = jnp.real(log_amp).dtype
        state = TemperingState(
            x.reshape(r, c, *x.shape[1:]), log_amp.reshape(r, c), jnp.zeros((), jnp.int32),
            jnp.zeros((r,), real), jnp.zeros((r - 1,), real),
        )
        return self._with_cache(state, fast_updates_of(log_amplitude))

    def refresh(self, state: TemperingState, log_amplitude: LogAmplitudeFn) -> TemperingState:
        """Recompute the cached log-amplitudes (and fast-update cache) of all replicas."""
        r, c = state.log_amp.shape
        flat = state.x.reshape(r * c, *state.x.shape[2:])
        state = state._replace(log_amp=base.evaluate_log_amplitudes(log_amplitude, flat).reshape(r, c))
        return self._with_cache(state, fast_updates_of(log_amplitude))

    def _step(self, key, state: TemperingState, log_amplitude, fast):
        k_sweep, k_acc, k_swap = jax.random.split(key, 3)
        # draw the sweep's random numbers up front (cheaper than inside the loop on CPU)
        log_u = jnp.log(jax.random.uniform(k_acc, (self.sweep, *state.log_amp.shape),
                                           dtype=jnp.real(state.log_amp).dtype))

        def body(carry, draws):
            x, log_amp, cache, acc = carry
            k, lu = draws
            x, log_amp, cache, accepted = self._metropolis(k, x, log_amp, log_amplitude, lu, cache, fast)
            return (x, log_amp, cache, acc + sample_mean(accepted.astype(acc.dtype), axis=1)), None

        real = jnp.real(state.log_amp).dtype
        init = (state.x, state.log_amp, state.cache, jnp.zeros((self.n_replicas,), real))
        (x, log_amp, cache, acc), _ = jax.lax.scan(body, init, (jax.random.split(k_sweep, self.sweep), log_u))
        x, log_amp, cache, attempted, swapped = self._exchange(k_swap, x, log_amp, state.parity, cache)
        new = state._replace(x=x, log_amp=log_amp, parity=1 - state.parity, cache=cache)
        return new, TemperingInfo(acc / self.sweep, attempted, swapped)

    def step(self, key: jax.Array, state: TemperingState, log_amplitude: LogAmplitudeFn):
        """One sweep of Metropolis proposals in every replica, then one exchange round
        (fast updates when ``log_amplitude`` offers them, see :mod:`psiloom.states.fast`)."""
        fast = fast_updates_of(log_amplitude)
        return self._step(key, self._with_cache(state, fast, recompute=False), log_amplitude, fast)

    def sample(self, key: jax.Array, state: TemperingState, log_amplitude: LogAmplitudeFn, n_per_chain: int):
        """Burn in, then store the β = 1 replica ``n_per_chain`` times, one :meth:`step` apart.

        Returns ``(samples (n_per_chain, n_chains, N), log_amps (n_per_chain, n_chains), state,
        acceptance)``; ``state.acceptance`` and ``state.swap_rate`` hold the per-replica
        acceptance and per-pair exchange rate of the stored part.
        """
        n_per_chain = positive_int("n_per_chain", n_per_chain)
        fast = fast_updates_of(log_amplitude)  # asked once per call
        state = self._with_cache(state, fast, recompute=False)

        def sweep(k, st, i):
            return self._step(k, st, log_amplitude, fast)

        def record(st, info):
            tried = info.attempted.astype(info.acceptance.dtype)
            accepted = sample_mean(info.swapped.astype(info.acceptance.dtype), axis=1)
            return st.x[0], st.log_amp[0], info.acceptance, tried, accepted

        state, (xs, logs, acc, tried, accepted) = burn_in_and_collect(key, state, sweep, self.burn_in, n_per_chain,
                                                                      record)
        n_tried = sample_sum(tried)
        swap_rate = jnp.where(n_tried > 0, sample_sum(accepted) / jnp.maximum(n_tried, 1.0), jnp.nan)
        acceptance = sample_mean(acc)
        state = state._replace(acceptance=acceptance, swap_rate=swap_rate)
        return xs, logs, state, acceptance[0]
