"""Compiled Metropolis sweeps for RBM-family trial states (CPU).

A Metropolis sweep makes ``S`` proposals in turn in every chain; on the fast path each costs
O(M) per chain (:mod:`psiloom.states.rbm`). Expressed in JAX, every proposal is a handful of
XLA kernels over the ``(n_chains, M)`` cache, and on a CPU their launch overhead, the
materialised intermediates and the scalar reductions cost more than the arithmetic itself.
This module runs the whole sweep as one loop nest compiled by Numba and called from JAX
through :func:`jax.pure_callback`, with the same mathematics as the fast update:

    P_j = p_j e^{d_j},   Q_j = q_j e^{−d_j},
    Δ log ψ = a·(x' − x) + Σ_j log[(P_j + Q_j) / 2],
    accept when  log u < 2 Δ log ψ,   then  (p, q) ← (2P, 2Q) / (P + Q),

where ``(p, q) = (1 + tanh θ, 1 − tanh θ)`` is the cached pair of every hidden unit and
``e^{±d}`` are products of rows of the tables ``e^{±2W}`` (see the RBM module docstring for
why this form is free of overflow and cancellation). Three things make it cheaper than the
XLA version: the cache of a chain is rewritten only when its proposal is accepted; a null
proposal (an exchange of two equal spins) costs nothing; and ``Σ_j log r_j`` is one logarithm
per chain and proposal — the factors are multiplied in groups whose product cannot overflow
(``4R ≤ 32`` factors ``2 r_j``, each within ``2e^{±d_max}``, with ``4R(d_max + log 2) ≤ 400``;
``d_max`` bounds the ``|d_j|`` any proposal can produce) and the running product is renormalised
by its binary exponent (``frexp``, exact) whenever it leaves ``2^{±300}``. The products are
accumulated in float64 also for a float32 cache. Chains run in parallel blocks of eight; the
chains of a block make proposal t before any makes t + 1, so the factor rows of a proposal
(precomputed for every entry of the move's table) are read once per block.

It serves moves that pick an entry of a fixed table (single flips, bond exchanges; random or
sequential order, :func:`~psiloom.sampling.moves.entry_table`) with real parameters; the
sampler falls back to the JAX path for everything else (complex parameters, moves such as
pair exchange or mixtures, a non-CPU backend, or Numba absent). Both give the same chain for the same random numbers to
rounding of the log-ratios (``tests/test_compiled_sweep.py``). The random numbers are drawn
in JAX and passed in: the kernel itself is deterministic. All sweeps of one
:meth:`~psiloom.sampling.MetropolisSampler.sample` call go to the kernel in one host call.
"""

from __future__ import annotations

import functools
import math

import jax
import jax.numpy as jnp
import numpy as np

from psiloom import parallel

try:  # Numba is a dependency, but the library stays usable (on the JAX path) without it
    import numba
except ImportError:  # pragma: no cover - exercised only where Numba is missing
    numba = None

FLIP, EXCHANGE = 1, 2  # proposal kinds = number of changed sites K

_LOG2 = math.log(2.0)
_LOW, _HIGH = 2.0 ** -300, 2.0 ** 300
_CHAIN_BLOCK = 8  # chains per parallel task (they share the factor rows of each proposal)
_TABLE_ENTRIES = 1 << 22  # per-position factor rows kept up to 2 x 4M entries (64 MiB in float64)


def available() -> bool:
    """Whether compiled sweeps can run here: Numba importable and JAX on the CPU."""
    return numba is not None and jax.default_backend() == "cpu"


def _compiled(fn, parallel=False):
    """Numba-compiled ``fn`` (compiled per argument types on first call, cached on disk), or
    ``fn`` itself without Numba (then never called: :func:`available` is False)."""
    return fn if numba is None else numba.njit(cache=True, nogil=True, parallel=parallel)(fn)


@_compiled
def _fill_factors(fwd_p, fwd_q, row, i, j, rise, fall, kind):
    """Row ``row`` of the forward factors (e^{d}, e^{−d}) of flipping site ``i`` from +1 to −1
    (``kind`` 1), or of swapping x_i = +1 and x_j = −1 (``kind`` 2); the backward change (−1 → +1,
    or the reverse swap) has the two rows exchanged."""
    m = fwd_p.shape[1]
    if kind == FLIP:
        for u in range(m):
            fwd_p[row, u] = fall[i, u]
            fwd_q[row, u] = rise[i, u]
    else:
        for u in range(m):
            fwd_p[row, u] = fall[i, u] * rise[j, u]
            fwd_q[row, u] = rise[i, u] * fall[j, u]


@functools.partial(_compiled, parallel=True)
def _sweep_kernel(x, plus, minus, log_amp, table, positions, log_u, rise, fall, bias, d_max, kind,
                  xs, log_amps, accepted):
    """In place: ``n_sweeps = len(positions)`` sweeps of ``S = positions.shape[1]`` proposals in
    every chain, proposal ``(s, t)`` of chain ``c`` flipping site ``table[positions[s, t, c], 0]``
    (``kind`` 1) or swapping the values at the two sites ``table[positions[s, t, c]]`` (``kind``
    2); ``positions`` (n_sweeps, S, n_chains), or (n_sweeps, S, 1) for the same in all chains.
    After sweep ``s`` the configurations and log-amplitudes go to ``xs[s]``, ``log_amps[s]`` and
    the number of accepted proposals (null ones included) to ``accepted[s]``."""
    n_chains, m = plus.shape
    n_positions = table.shape[0]
    # groups of 4R factors 2r_j, each within 2e^{±d_max}: |log group| ≤ 4R(d_max + log 2) ≤ 400,
    # so with the running product kept within 2^{±300} (e^{±208}) nothing over- or underflows
    if 4.0 * (d_max + _LOG2) > 400.0:
        n_full = 0  # huge weights: one factor at a time, renormalised after each
        group = 4
    else:
        group = 4 * min(8, int(100.0 / (d_max + _LOG2)))
        n_full = m - m % group
    # factor rows of every position, built once (or per proposal when they would not fit)
    precomputed = n_positions * m <= _TABLE_ENTRIES
    n_rows = n_positions if precomputed else n_chains  # otherwise one scratch row per chain
    fwd_p = np.empty((n_rows, m), plus.dtype)
    fwd_q = np.empty((n_rows, m), plus.dtype)
    if precomputed:
        for k in range(n_positions):
            _fill_factors(fwd_p, fwd_q, k, table[k, 0], table[k, kind - 1], rise, fall, kind)
    n_sweeps, n_steps = positions.shape[:2]
    shared = 1 if positions.shape[2] == 1 else 0  # one position per step for all chains
    accepted_per_chain = np.zeros((n_sweeps, n_chains), np.int64)
    n_blocks = (n_chains + _CHAIN_BLOCK - 1) // _CHAIN_BLOCK
    # chains are independent: blocks of chains run in parallel; within a block all chains make
    # proposal t before any makes t + 1, so a factor row is read once per block, not per chain
    for block in numba.prange(n_blocks):
        first = np.int64(block) * _CHAIN_BLOCK  # (a prange index is unsigned: keep arithmetic signed)
        last = min(first + _CHAIN_BLOCK, n_chains)
        ratio = np.empty(m, plus.dtype)
        # per-block accumulators (no cache line shared with another thread's chains)
        block_log_amp = log_amp[first:last].copy()
        block_accepted = np.zeros(last - first, np.int64)
        for s in range(n_sweeps):
            block_accepted[:] = 0
            for t in range(n_steps):
                for chain in range(first, last):
                    k = positions[s, t, (1 - shared) * chain] % n_positions
                    i = table[k, 0]
                    j = table[k, kind - 1]
                    xc = x[chain]
                    xi = xc[i]
                    xj = xc[j]
                    if kind == EXCHANGE and xi == xj:  # null move: Δ = 0, always accepted
                        block_accepted[chain - first] += 1
                        continue
                    if precomputed:
                        row = k
                    else:
                        row = chain
                        _fill_factors(fwd_p, fwd_q, row, i, j, rise, fall, kind)
                    bias_fwd = -2.0 * bias[i] if kind == FLIP else 2.0 * (bias[j] - bias[i])
                    if xi > 0:
                        ep = fwd_p[row]
                        em = fwd_q[row]
                        delta = bias_fwd
                    else:
                        ep = fwd_q[row]
                        em = fwd_p[row]
                        delta = -bias_fwd
                    pc = plus[chain]
                    qc = minus[chain]
                    for u in range(m):  # 2 r_j = P_j + Q_j (a vectorised loop)
                        ratio[u] = pc[u] * ep[u] + qc[u] * em[u]
                    prod = 1.0
                    exponent = 0
                    for b in range(0, n_full, group):
                        a0 = a1 = a2 = a3 = 1.0  # float64 accumulators, independent for pipelining
                        for u in range(b, b + group, 4):
                            a0 *= ratio[u]
                            a1 *= ratio[u + 1]
                            a2 *= ratio[u + 2]
                            a3 *= ratio[u + 3]
                        prod *= (a0 * a1) * (a2 * a3)
                        if not _LOW < prod < _HIGH:  # renormalise (exact: a power of two)
                            prod, e = math.frexp(prod)
                            exponent += e
                    for u in range(n_full, m):
                        prod, e = math.frexp(prod * ratio[u])
                        exponent += e
                    delta += math.log(prod) + (exponent - m) * _LOG2  # the (P + Q) / 2 halves: -m log 2
                    if log_u[s, t, chain] < 2.0 * delta:
                        block_accepted[chain - first] += 1
                        for u in range(m):  # (p, q) <- (2P, 2Q) / (P + Q)
                            inverse = 2.0 / ratio[u]
                            pc[u] = pc[u] * ep[u] * inverse
                            qc[u] = qc[u] * em[u] * inverse
                        block_log_amp[chain - first] += delta
                        if kind == FLIP:
                            xc[i] = -xi
                        else:
                            xc[i] = xj
                            xc[j] = xi
            for chain in range(first, last):
                xs[s, chain] = x[chain]
                log_amps[s, chain] = block_log_amp[chain - first]
                accepted_per_chain[s, chain] = block_accepted[chain - first]
        log_amp[first:last] = block_log_amp
    for s in range(n_sweeps):
        accepted[s] = accepted_per_chain[s].sum()


def _host_sweeps(kind, table, x, plus, minus, log_amp, positions, log_u, tables, bias_and_bound):
    # the kernel works in place on writable copies (the parallel loop also takes no read-only input)
    x, plus, minus, log_amp, log_u, tables, bias_and_bound = (
        np.array(a) for a in (x, plus, minus, log_amp, log_u, tables, bias_and_bound))
    n_sweeps = positions.shape[0]
    xs = np.empty((n_sweeps, *x.shape), x.dtype)
    log_amps = np.empty((n_sweeps, *log_amp.shape), log_amp.dtype)
    accepted = np.zeros(n_sweeps, np.int64)
    _sweep_kernel(x, plus, minus, log_amp, table, np.array(positions, np.int64), log_u, tables[0], tables[1],
                  bias_and_bound[:-1], float(bias_and_bound[-1]), kind, xs, log_amps, accepted)
    return xs, log_amps, plus, minus, accepted.astype(np.int32)


def make_sweeps(kernel, visible_bias, rise, fall):
    """The compiled sweeps of an RBM with real ``kernel`` W (N, M), its ``visible_bias`` (or None)
    and the fast-update tables ``rise = e^{2W}``, ``fall = e^{−2W}`` (in the cache dtype).

    Returns ``sweeps(x, cache, log_amp, table, positions, log_u, kind) -> (xs, log_amps, cache,
    accepted)``, the ``sweeps`` function of :class:`~psiloom.states.FastUpdates`: ``table``
    (P, K) a NumPy int array of the sites of the P possible proposals (K = ``kind`` = 1 flips,
    2 exchanges); ``positions`` (n_sweeps, S, n_chains) the entries of ``table`` proposed in turn
    (taken mod P), or (n_sweeps, S, 1) for the same entries in every chain; ``log_u``
    (n_sweeps, S, n_chains) the logarithms of the acceptance uniforms; ``xs`` (n_sweeps, n_chains,
    N) and ``log_amps`` (n_sweeps, n_chains) the chains after every sweep, ``cache`` that of
    ``xs[-1]`` (the input cache's type), ``accepted`` (n_sweeps,) int32 the accepted proposals
    (null ones included) per sweep. Usable inside ``jax.jit``: one host call for all sweeps (a
    host callback costs ~0.1-0.5 ms here, more than one sweep of a small state).
    """
    bias = jnp.zeros(kernel.shape[0], kernel.dtype) if visible_bias is None else visible_bias
    d_max = 4.0 * jnp.max(jnp.abs(kernel))  # |d| ≤ 2|W_i| + 2|W_j|
    bias_and_bound = jnp.concatenate([bias, d_max[None]]).astype(kernel.dtype)
    tables = jnp.stack([rise, fall])

    def sweeps(x, cache, log_amp, table, positions, log_u, kind: int):
        table = np.asarray(table, np.int64)
        if kind not in (FLIP, EXCHANGE) or table.ndim != 2 or table.shape[1] != kind:
            raise ValueError(f"compiled sweeps take flips (K=1) or exchanges (K=2), got kind={kind!r} "
                             f"with a table of shape {table.shape}")
        if table.min() < 0 or table.max() >= x.shape[-1]:
            raise ValueError(f"sites {table.min()}..{table.max()} outside the {x.shape[-1]}-site configuration")
        if positions.ndim != 3 or positions.shape[2] not in (1, x.shape[0]):
            raise ValueError(f"positions must have shape (n_sweeps, S, 1 or n_chains), got {positions.shape}")
        n_sweeps = positions.shape[0]

        def call(x, plus, minus, log_amp, *rest):  # shapes of the chains it is given
            shapes = (jax.ShapeDtypeStruct((n_sweeps, *x.shape), x.dtype),
                      jax.ShapeDtypeStruct((n_sweeps, *log_amp.shape), log_amp.dtype),
                      jax.ShapeDtypeStruct(plus.shape, plus.dtype), jax.ShapeDtypeStruct(minus.shape, minus.dtype),
                      jax.ShapeDtypeStruct((n_sweeps,), jnp.int32))
            return jax.pure_callback(lambda *a: _host_sweeps(kind, table, *a), shapes, x, plus, minus, log_amp,
                                     *rest, vmap_method="sequential")

        # parallel: with a sample mesh each device runs the host kernel on its own chains
        per_chain_positions = 2 if positions.shape[2] == x.shape[0] and x.shape[0] > 1 else None
        call = parallel.per_device(call, in_axes=(0, 0, 0, 0, per_chain_positions, 2, None, None),
                                   out_axes=(1, 1, 0, 0, "sum"))
        xs, log_amps, plus, minus, accepted = call(x, cache.plus, cache.minus, log_amp, positions, log_u,
                                                   tables, bias_and_bound)
        return xs, log_amps, cache._replace(plus=plus, minus=minus), accepted

    return sweeps
