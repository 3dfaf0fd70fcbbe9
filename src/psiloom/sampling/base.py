"""What every Markov-chain sampler shares: the interface, the acceptance step, the driver.

The sampler interface (:class:`Sampler`) is what :class:`psiloom.train.GroundStateSearch`
relies on. A kernel is built in two parts, as in most JAX Monte Carlo code: the kernel makes
a proposal (a pytree of per-chain quantities, chain axis leading) and its log acceptance
ratio, then hands both to the one acceptance step, :func:`metropolis_accept`:

    accept  ⇔  log u < β · log_ratio,     u ~ U[0, 1) per chain,

which is min(1, π(x')/π(x)) for a symmetric proposal with ``log_ratio = log π(x') − log π(x)``
(Metropolis et al. 1953); β = 1 for |ψ|², β_r for the tempered replicas π_r ∝ |ψ|^{2β_r}.
Lattice flips and exchanges (generic and fast paths, :mod:`~psiloom.sampling.metropolis`),
tempered replicas (:mod:`~psiloom.sampling.tempering`) and electron moves
(:mod:`psiloom.electrons.sampler`) all go through it; only the compiled CPU sweeps
(:mod:`~psiloom.sampling.compiled`) repeat the same comparison inside their Numba loop.

:func:`burn_in_and_collect` is the one burn-in / collection driver (``lax.scan`` loops)
used by those samplers: ``n_burn`` discarded sweeps, then ``n_keep`` sweeps whose results are
recorded; :func:`sweep_keys` gives the per-sweep keys, so a path outside the driver (the
compiled sweeps) can use exactly the same random numbers.
"""

from __future__ import annotations

from typing import Any, Callable, Protocol, runtime_checkable

import jax
import jax.numpy as jnp
import numpy as np

LogAmplitudeFn = Callable[[jax.Array], jax.Array]


@runtime_checkable
class Sampler(Protocol):
    """A Markov-chain (or direct) sampler of |ψ(x)|² over ``n_chains`` chains.

    ``sample`` returns ``(xs (n_per_chain, n_chains, ...), log_amps (n_per_chain, n_chains),
    state, acceptance)``; ``refresh`` recomputes what the state caches after the parameters of
    ``log_amplitude`` changed.
    """

    space: Any
    n_chains: int

    def init(self, key: jax.Array, log_amplitude: LogAmplitudeFn) -> Any:
        """Chain state at random starting configurations (with log ψ evaluated)."""

    def refresh(self, state: Any, log_amplitude: LogAmplitudeFn) -> Any:
        """Recompute what the state caches (log ψ) for new parameters."""

    def step(self, key: jax.Array, state: Any, log_amplitude: LogAmplitudeFn) -> tuple[Any, Any]:
        """One sweep of every chain: ``(new_state, info)``."""

    def sample(self, key: jax.Array, state: Any, log_amplitude: LogAmplitudeFn,
               n_per_chain: int) -> tuple[jax.Array, jax.Array, Any, jax.Array]:
        """``n_per_chain`` samples per chain: ``(xs, log_amps, state, acceptance)``, time-major."""


def evaluate_log_amplitudes(log_amplitude: LogAmplitudeFn, x: jax.Array) -> jax.Array:
    """``log_amplitude(x)`` for a batch ``x`` of shape ``(n, n_sites)``, checked to hold one
    log-amplitude per configuration (shape ``(n,)``; a ``ValueError`` otherwise). Samplers call
    it where a chain's log-amplitudes are first produced (``init``/``refresh``)."""
    from psiloom.states.base import check_log_amplitudes

    return check_log_amplitudes(log_amplitude(x), x, "log_amplitude")


def select(accepted: jax.Array, new, old):
    """Per-chain choice between two pytrees whose leaves have the chain axis leading
    (``accepted`` of shape ``(n_chains,)``); ``None`` leaves stay ``None``."""
    def pick(a, b):
        return jnp.where(accepted.reshape(accepted.shape + (1,) * (a.ndim - accepted.ndim)), a, b)

    return jax.tree_util.tree_map(pick, new, old)


def metropolis_accept(log_u: jax.Array, log_ratio: jax.Array, proposal, current, beta=None):
    """The Metropolis acceptance step shared by every sampler kernel.

    Args:
        log_u: ``(n_chains,)`` logarithms of uniforms on [0, 1) (−inf accepts anything).
        log_ratio: ``(n_chains,)`` log π(x') − log π(x) of the (symmetric) proposal; for
            |ψ|², ``2 Re[log ψ(x') − log ψ(x)]``.
        proposal, current: pytrees of the same structure (e.g. configuration, log ψ, cache),
            leaves with the chain axis leading.
        beta: optional inverse temperature(s) ``(n_chains,)`` weighting ``log_ratio``.

    Returns ``(chosen, accepted)``: the proposal where ``log u < β·log_ratio``, the current
    values elsewhere, and the ``(n_chains,)`` boolean decisions.
    """
    ratio = log_ratio if beta is None else beta * log_ratio
    accepted = log_u < ratio
    return select(accepted, proposal, current), accepted


def sweep_keys(key: jax.Array, n_burn: int, n_keep: int) -> tuple[jax.Array, jax.Array]:
    """The keys of the ``n_burn`` burn-in sweeps and of the ``n_keep`` stored sweeps of one
    :func:`burn_in_and_collect` call from its ``key``."""
    k_burn, k_run = jax.random.split(key)
    return jax.random.split(k_burn, n_burn), jax.random.split(k_run, n_keep)


def scan_sweeps(sweep: Callable, state, keys, first: int = 0, record: Callable | None = None):
    """``len(keys)`` sweeps in a ``lax.scan``: ``sweep(key, state, index) -> (state, stats)``
    with ``index = first, first + 1, …``; returns the final state and the stacked
    ``record(state, stats)`` (``None`` without ``record``). ``keys`` may be any pytree of
    per-sweep inputs with a leading sweep axis (e.g. random numbers drawn beforehand)."""
    def body(st, draw):
        k, i = draw
        st, stats = sweep(k, st, i)
        return st, (None if record is None else record(st, stats))

    indices = first + jnp.arange(jax.tree_util.tree_leaves(keys)[0].shape[0], dtype=jnp.int32)
    return jax.lax.scan(body, state, (keys, indices))


def burn_in_and_collect(key: jax.Array, state, sweep: Callable, n_burn: int, n_keep: int, record: Callable,
                        burn_sweep: Callable | None = None):
    """Run ``n_burn`` sweeps (of ``burn_sweep``, default ``sweep``) and discard them, then
    ``n_keep`` sweeps storing ``record(state, stats)`` after each.

    ``sweep(key, state, index) -> (state, stats)``; ``index`` counts sweeps from 0 over the
    whole call (burn-in first). Returns ``(state, records)`` with every leaf of ``records``
    stacked along a leading axis of length ``n_keep``.
    """
    burn_keys, keep_keys = sweep_keys(key, n_burn, n_keep)
    if n_burn and burn_sweep is None:
        # one scan over all sweeps, the burn-in records dropped after it: the sweep is compiled
        # once, not once per loop (a sizeable part of a small program's compile time)
        state, records = scan_sweeps(sweep, state, jnp.concatenate([burn_keys, keep_keys]), record=record)
        return state, jax.tree_util.tree_map(lambda r: r[n_burn:], records)
    if n_burn:
        state, _ = scan_sweeps(burn_sweep or sweep, state, burn_keys)
    return scan_sweeps(sweep, state, keep_keys, first=n_burn, record=record)


def place_starts(space, x: jax.Array, starts) -> jax.Array:
    """``x`` (``(n_chains, n_sites)``) with its first ``k`` rows replaced by ``starts``.

    ``starts`` is one configuration or ``(k, n_sites)`` of them, ``1 ≤ k ≤ n_chains``; each must
    belong to ``space`` (checked on the host, naming the first bad row). Used to start some chains
    where training never went (e.g. the two Néel states) so that R̂ can show missed weight.
    """
    starts = np.asarray(starts, dtype=np.float64)
    if starts.ndim == 1:
        starts = starts[None]
    if starts.ndim != 2 or starts.shape[1] != x.shape[1] or not 1 <= starts.shape[0] <= x.shape[0]:
        raise ValueError(f"starts must have shape (k, {x.shape[1]}) with 1 <= k <= n_chains = {x.shape[0]}, "
                         f"got {starts.shape}")
    bad = np.flatnonzero(~space.contains(starts))
    if bad.size:
        raise ValueError(f"starts row {int(bad[0])} is not a configuration of the space "
                         f"({space!r}): {starts[bad[0]].tolist()}")
    return x.at[: starts.shape[0]].set(jnp.asarray(starts, x.dtype))
