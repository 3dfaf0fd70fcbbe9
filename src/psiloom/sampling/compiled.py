"""Compiled Metropolis sweeps for RBM-family trial states (CPU), fed the state's plain arrays.

A Metropolis sweep makes ``S`` proposals in turn in every chain; on the fast path each costs
O(M) per chain (:mod:`psiloom.states.rbm`), and the state hands out its plain arrays
(:class:`~psiloom.states.RBMArrays`: W, a, b and the tables e^{±2W}) for kernels like this one. Expressed in JAX, every proposal is a handful of
XLA kernels over the ``(n_chains, M)`` cache, and on a CPU their launch overhead, the
materialised intermediates and the scalar reductions cost more than the arithmetic itself.
This module runs the whole sweep as one loop nest compiled by Numba and called from JAX as an
XLA foreign function (:mod:`psiloom.sampling.xla_handlers`), with the same mathematics as the
fast update:

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
sequential order, :meth:`~psiloom.sampling.moves.Move.entry_table`) with real parameters; the
sampler falls back to the JAX path for everything else (complex parameters, moves such as
pair exchange or mixtures, a non-CPU backend, or Numba absent). Both give the same chain for
the same random numbers to rounding of the log-ratios (``tests/test_compiled_sweep.py``). The
random numbers are drawn in JAX and passed in: the kernel itself is deterministic. All sweeps
of one :meth:`~psiloom.sampling.MetropolisChains.sample` call go to the kernel in one call
(:func:`host_call`). A foreign function is looked up by name when the program runs, so unlike a
:func:`jax.pure_callback` (a Python object of the running process) it leaves the program that
calls it cacheable: a second process loads the compiled training step from JAX's persistent
cache instead of compiling it again (seconds on two cores; ``benchmarks/time_to_accuracy.py``).

Guards (errors raised by the call, never a crash or a silently wrong chain):
non-finite parameters, tables, caches, log-amplitudes or uniforms are refused before the
kernel runs; and where the hidden fields could reach the pair cache's limit (the smaller of
``1 ± tanh θ``, ~2e^{−2|θ|}, falls below the smallest normal number: |θ| ≳ 354 in float64, ≳ 44
in float32; the bound is max_j Σ_i |W_ij| + |b_j|) every accepted update checks the new pair
and the call fails once it underflows, instead of returning a finite but wrong log ψ.

Numba's on-disk cache goes to ``$NUMBA_CACHE_DIR`` when the user set it, else to
``$XDG_CACHE_HOME/psiloom/numba`` (``~/.cache/psiloom/numba``), never into the package folder.
"""

# mypy: disable-error-code="call-arg"
# (the Numba intrinsic xla_handlers.pointer is typed with its typing context as first parameter)
from __future__ import annotations

import functools
import math
import os

import jax
import jax.numpy as jnp
import numpy as np

from psiloom import parallel


def _user_cache_dir() -> str:
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "psiloom", "numba")


try:  # Numba is a dependency, but the library stays usable (on the JAX path) without it
    import numba
except ImportError:  # pragma: no cover - exercised only where Numba is missing
    numba = None  # type: ignore[assignment]  # the module or None; available() tells callers
else:
    if not os.environ.get("NUMBA_CACHE_DIR") and not getattr(numba.config, "CACHE_DIR", None):
        setattr(numba.config, "CACHE_DIR", _user_cache_dir())  # what NUMBA_CACHE_DIR would set; read when compiling

FLIP, EXCHANGE = 1, 2  # proposal kinds = number of changed sites K
_KINDS = {"flip": FLIP, "exchange": EXCHANGE}

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


def _sweep_kernel(x, plus, minus, log_amp, table, positions, log_u, rise, fall, bias, d_max, kind,
                  guard, tiny, xs, log_amps, accepted, failed):
    """In place: ``n_sweeps = len(positions)`` sweeps of ``S = positions.shape[1]`` proposals in
    every chain, proposal ``(s, t)`` of chain ``c`` flipping site ``table[positions[s, t, c], 0]``
    (``kind`` 1) or swapping the values at the two sites ``table[positions[s, t, c]]`` (``kind``
    2); ``positions`` (n_sweeps, S, n_chains), or (n_sweeps, S, 1) for the same in all chains.
    After sweep ``s`` the configurations and log-amplitudes go to ``xs[s]``, ``log_amps[s]`` and
    the number of accepted proposals (null ones included) to ``accepted[s]``. With ``guard``,
    every accepted update checks that no member of the new pair fell below ``tiny`` (the pair
    cache's limit, module docstring) and marks its block in ``failed`` otherwise."""
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
    accepted_per_chain = np.empty((n_sweeps, n_chains), np.int64)  # every entry written below
    n_blocks = (n_chains + _CHAIN_BLOCK - 1) // _CHAIN_BLOCK
    # chains are independent: blocks of chains run in parallel; within a block all chains make
    # proposal t before any makes t + 1, so a factor row is read once per block, not per chain
    for block in numba.prange(n_blocks):
        first = np.int64(block) * _CHAIN_BLOCK  # (a prange index is unsigned: keep arithmetic signed)
        last = min(first + _CHAIN_BLOCK, n_chains)
        ratio = np.empty(m, plus.dtype)
        # per-block accumulators (no cache line shared with another thread's chains)
        # (element loops rather than slices, .copy() or .sum(): the same work, seconds less to compile)
        block_log_amp = np.empty(last - first, log_amp.dtype)
        for chain in range(first, last):
            block_log_amp[chain - first] = log_amp[chain]
        block_accepted = np.empty(last - first, np.int64)
        for s in range(n_sweeps):
            for chain in range(last - first):
                block_accepted[chain] = 0
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
                        if guard:  # hidden fields may reach the pair cache's limit: check the new pair
                            lowest = 2.0
                            for u in range(m):
                                inverse = 2.0 / ratio[u]
                                pu = pc[u] * ep[u] * inverse
                                qu = qc[u] * em[u] * inverse
                                pc[u] = pu
                                qc[u] = qu
                                lowest = min(lowest, min(pu, qu))
                            if lowest < tiny:
                                failed[block] = 1
                        else:
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
                for i in range(x.shape[1]):
                    xs[s, chain, i] = x[chain, i]
                log_amps[s, chain] = block_log_amp[chain - first]
                accepted_per_chain[s, chain] = block_accepted[chain - first]
        for chain in range(first, last):
            log_amp[chain] = block_log_amp[chain - first]
    for s in range(n_sweeps):
        total = 0
        for chain in range(n_chains):
            total += accepted_per_chain[s, chain]
        accepted[s] = total


def _renamed(fn, name: str):
    """A copy of the plain function ``fn`` under another name (its own Numba cache entries)."""
    import types as pytypes
    copy = pytypes.FunctionType(fn.__code__.replace(co_name=name), fn.__globals__, name, fn.__defaults__)
    copy.__qualname__, copy.__doc__ = name, fn.__doc__
    return copy


# Two compilations of the kernel: chains in parallel blocks (Numba's parallel loop: ~12 s of
# compilation on a 2-core CPU the first time on a machine, then cached on disk) and one block
# after another (~2 s). The parallel one runs only where the work per proposal across chains,
# n_chains · M, reaches PARALLEL_WORK: below it the threads gain little and a newcomer's first
# run would pay the long compilation for nothing.
PARALLEL_WORK = 2048  #: n_chains · M (hidden units) from which the chains of a call are swept by several threads
_sweep_kernel_serial = (None if numba is None else  # inlined into its handler: its code is compiled once, there
                        numba.njit(nogil=True, inline="always")(_renamed(_sweep_kernel, "_sweep_kernel_serial")))
_sweep_kernel = _compiled(_sweep_kernel, parallel=True)


def pair_cache_limit(dtype) -> float:
    """|θ| beyond which the smaller member of the pair ``1 ± tanh θ`` (~2e^{−2|θ|}) falls below
    the smallest normal number of ``dtype``: ½ log(2 / tiny) (354.5 in float64, 44.0 in float32)."""
    return 0.5 * math.log(2.0 / float(np.finfo(dtype).tiny))


# messages of the refusals, in the order of the handler's error codes (NUL-terminated rows)
_NON_FINITE = ("parameters", "visible_bias_or_bounds", "cache", "cache_pair", "log_amplitudes", "configurations")
_LIMIT = len(_NON_FINITE) + 1  # message rows: the non-finite inputs, NaN uniforms, the pair-cache limit
_N_FLAGS = _LIMIT + 2  # a flag per refusal, then the guard (check every accepted update)
_MESSAGE_BYTES = 256


def _messages(dtype) -> np.ndarray:
    rows = [f"compiled sweeps: non-finite {name} (NaN or inf); check the trial state's parameters and the chains"
            for name in _NON_FINITE]
    rows += ["compiled sweeps: NaN among the acceptance uniforms", _limit_message(pair_cache_limit(dtype))]
    out = np.zeros((len(rows), _MESSAGE_BYTES), np.uint8)
    for i, row in enumerate(rows):
        raw = row.encode()[:_MESSAGE_BYTES - 1]
        out[i, :len(raw)] = np.frombuffer(raw, np.uint8)
    return out


def _limit_message(limit):
    return (f"compiled sweeps: a hidden field reached |θ| > {limit:.0f}, where the pair cache (1 ± tanh θ) "
            "underflows and fast updates lose log ψ; reduce the weights (or sample with fast=False)")


if numba is not None:
    from numba import carray

    from psiloom.sampling import xla_handlers as xh

    _I64 = np.zeros(1, np.int64)
    _I32 = np.zeros(1, np.int32)

    @numba.njit(nogil=True, inline="always")  # inlined into the handler: compiled once, there
    def _run_frame(frame, like, kernel) -> int:
        """The handler's body for the float type of ``like``: read the call frame (arguments
        x, plus, minus, log ψ, positions, log u, tables e^{±2W}, bias and bounds, the move table,
        the sizes, the refusal flags (checked in JAX before the call), the messages; results
        xs, log ψs, plus, minus, accepted), refuse or sweep. Kept small: every line here is
        compiled on a machine's first run."""
        f = carray(frame, (15,))
        if xh.answer_metadata(f):
            return 0
        sizes = carray(xh.pointer(xh.buffer_address(f, 9, False), _I64), (9,))
        kind, n_chains, n, m, n_sweeps, s, width, n_table, k = (sizes[0], sizes[1], sizes[2], sizes[3], sizes[4],
                                                                  sizes[5], sizes[6], sizes[7], sizes[8])
        flags = carray(xh.pointer(xh.buffer_address(f, 10, False), _I64), (_N_FLAGS,))
        messages = xh.buffer_address(f, 11, False)
        for code in range(_N_FLAGS - 1):
            if flags[code] != 0:
                return xh.error(frame, messages + code * _MESSAGE_BYTES)
        x_in = carray(xh.pointer(xh.buffer_address(f, 0, False), like), (n_chains, n))
        plus_in = carray(xh.pointer(xh.buffer_address(f, 1, False), like), (n_chains, m))
        minus_in = carray(xh.pointer(xh.buffer_address(f, 2, False), like), (n_chains, m))
        log_in = carray(xh.pointer(xh.buffer_address(f, 3, False), like), (n_chains,))
        positions = carray(xh.pointer(xh.buffer_address(f, 4, False), _I64), (n_sweeps, s, width))
        log_u = carray(xh.pointer(xh.buffer_address(f, 5, False), like), (n_sweeps, s, n_chains))
        tables = carray(xh.pointer(xh.buffer_address(f, 6, False), like), (2, n, m))
        bias_and_bounds = carray(xh.pointer(xh.buffer_address(f, 7, False), like), (n + 3,))
        table = carray(xh.pointer(xh.buffer_address(f, 8, False), _I64), (n_table, k))
        xs = carray(xh.pointer(xh.buffer_address(f, 0, True), like), (n_sweeps, n_chains, n))
        log_amps = carray(xh.pointer(xh.buffer_address(f, 1, True), like), (n_sweeps, n_chains))
        plus = carray(xh.pointer(xh.buffer_address(f, 2, True), like), (n_chains, m))
        minus = carray(xh.pointer(xh.buffer_address(f, 3, True), like), (n_chains, m))
        accepted_out = carray(xh.pointer(xh.buffer_address(f, 4, True), _I32), (n_sweeps,))
        # the kernel works in place: copies of x and log ψ, the caches straight into the results
        # (plain loops and np.empty: slice assignment, .copy(), np.zeros and .any() took seconds
        # more of Numba compilation here, paid on every machine's first run)
        x = np.empty((n_chains, n), like.dtype)
        log_amp = np.empty(n_chains, like.dtype)
        for c in range(n_chains):
            log_amp[c] = log_in[c]
            for i in range(n):
                x[c, i] = x_in[c, i]
            for j in range(m):
                plus[c, j] = plus_in[c, j]
                minus[c, j] = minus_in[c, j]
        accepted = np.empty(n_sweeps, np.int64)
        n_blocks = (n_chains + _CHAIN_BLOCK - 1) // _CHAIN_BLOCK
        failed = np.empty(n_blocks, np.int64)
        for i in range(n_blocks):
            failed[i] = 0
        guard = flags[_N_FLAGS - 1] != 0
        kernel(x, plus, minus, log_amp, table, positions, log_u, tables[0], tables[1],
               bias_and_bounds[:n], bias_and_bounds[n], kind, guard, bias_and_bounds[n + 2], xs, log_amps,
               accepted, failed)
        for i in range(n_blocks):
            if failed[i] != 0:
                return xh.error(frame, messages + _LIMIT * _MESSAGE_BYTES)
        for i in range(n_sweeps):
            accepted_out[i] = accepted[i]
        return 0

    _F64 = np.zeros(1, np.float64)
    _F32 = np.zeros(1, np.float32)


@functools.cache
def _handler(dtype: np.dtype, parallel: bool):
    """(name, Numba ``cfunc``) of the foreign-function handler for caches of ``dtype``, with the
    parallel or the serial kernel, made and registered with XLA on first use. Numba's threading
    layer is started first: a handler with the parallel kernel loaded from the on-disk cache does
    not start it and fails to link ("Symbol not found: allocate_sched")."""
    from psiloom.sampling import xla_handlers
    signature = numba.types.int64(numba.types.CPointer(numba.types.int64))
    compile_handler = numba.cfunc(signature, cache=True, nogil=True)
    if parallel:
        numba.get_num_threads()  # starts the threading layer
    if dtype == np.dtype(np.float64) and parallel:
        @compile_handler
        def handler_float64_parallel(frame):
            return _run_frame(frame, _F64, _sweep_kernel)
        handler = handler_float64_parallel
    elif dtype == np.dtype(np.float64):
        @compile_handler
        def handler_float64_serial(frame):
            return _run_frame(frame, _F64, _sweep_kernel_serial)
        handler = handler_float64_serial
    elif dtype == np.dtype(np.float32) and parallel:
        @compile_handler
        def handler_float32_parallel(frame):
            return _run_frame(frame, _F32, _sweep_kernel)
        handler = handler_float32_parallel
    elif dtype == np.dtype(np.float32):
        @compile_handler
        def handler_float32_serial(frame):
            return _run_frame(frame, _F32, _sweep_kernel_serial)
        handler = handler_float32_serial
    else:
        raise ValueError(f"compiled sweeps take float32 or float64 caches, got {dtype}")
    name = f"psiloom_rbm_sweeps_{dtype.name}_{'parallel' if parallel else 'serial'}"
    xla_handlers.register(name, handler)
    return name, handler


def host_call(kind: int, table: np.ndarray, x, plus, minus, log_amp, positions, log_u, arrays):
    """The one call of the compiled kernel on the host CPU: ``(xs, log_amps, plus, minus, accepted)`` of :func:`run_sweeps`.

    An XLA foreign-function call (:mod:`psiloom.sampling.xla_handlers`), not a Python callback,
    so a program containing it is kept in the persistent compilation cache. With a sample mesh
    active (:mod:`psiloom.parallel`) every device runs the kernel on its own chains
    (:func:`psiloom.parallel.per_device`); the accepted counts are summed over devices."""
    kernel = arrays.kernel
    dtype = np.dtype(plus.dtype)
    name, _ = _handler(dtype, x.shape[0] * plus.shape[1] >= PARALLEL_WORK)
    bias = jnp.zeros(kernel.shape[0], kernel.dtype) if arrays.visible_bias is None else arrays.visible_bias
    d_max = 4.0 * jnp.max(jnp.abs(kernel))  # |d| ≤ 2|W_i| + 2|W_j|
    field = jnp.sum(jnp.abs(kernel), axis=0)  # max_j |θ_j| over all x ≤ Σ_i |W_ij| + |b_j|
    if arrays.hidden_bias is not None:
        field = field + jnp.abs(arrays.hidden_bias)
    tables = jnp.stack([arrays.rise, arrays.fall]).astype(dtype)
    limit, tiny = pair_cache_limit(dtype), float(np.finfo(dtype).tiny)
    guard = jnp.max(field) >= limit  # max_j |θ_j| over all x may reach the limit: check every update

    def not_finite(a):
        return jnp.any(~jnp.isfinite(a))

    # the refusals, in the order of _NON_FINITE, then NaN uniforms (−inf is a legitimate log u, u = 0),
    # then a start beyond the pair cache's limit; a NaN or inf weight makes the tables non-finite
    flags = jnp.stack([not_finite(tables), not_finite(bias) | ~jnp.isfinite(d_max) | ~jnp.isfinite(jnp.max(field)),
                       not_finite(plus), not_finite(minus), not_finite(log_amp), not_finite(x),
                       jnp.any(jnp.isnan(log_u)),
                       guard & (jnp.minimum(jnp.min(plus), jnp.min(minus)) < tiny), guard]).astype(jnp.int64)
    bias_and_bounds = jnp.concatenate([bias, d_max[None], jnp.max(field)[None], jnp.full((1,), tiny)]).astype(dtype)
    n_sweeps = positions.shape[0]
    table = np.ascontiguousarray(table, np.int64)
    messages = _messages(dtype)

    def call(*args):  # one device's chains
        return _foreign_sweeps(name, dtype, kind, table, messages, n_sweeps, *args)

    per_chain_positions = 2 if positions.shape[2] == x.shape[0] and x.shape[0] > 1 else None
    call = parallel.per_device(call, in_axes=(0, 0, 0, 0, per_chain_positions, 2, None, None, None),
                               out_axes=(1, 1, 0, 0, "sum"))
    xs, log_amps, plus, minus, accepted = call(x, plus, minus, log_amp, positions, log_u, tables, bias_and_bounds,
                                               flags)
    return xs.astype(x.dtype), log_amps.astype(log_amp.dtype), plus, minus, accepted


def _foreign_sweeps(name: str, dtype, kind: int, table: np.ndarray, messages: np.ndarray, n_sweeps: int,
                    x, plus, minus, log_amp, positions, log_u, tables, bias_and_bounds, flags):
    """The foreign-function call of one device's chains (traced once per shape)."""
    shapes = (jax.ShapeDtypeStruct((n_sweeps, *x.shape), dtype),
              jax.ShapeDtypeStruct((n_sweeps, *log_amp.shape), dtype),
              jax.ShapeDtypeStruct(plus.shape, dtype),
              jax.ShapeDtypeStruct(minus.shape, dtype),
              jax.ShapeDtypeStruct((n_sweeps,), jnp.int32))
    sizes = np.array([kind, x.shape[0], x.shape[1], plus.shape[1], n_sweeps, positions.shape[1],
                      positions.shape[2], table.shape[0], table.shape[1]], np.int64)
    # has_side_effect: the call may refuse its input (an error), so XLA must not drop it
    return jax.ffi.ffi_call(name, shapes, vmap_method="sequential", has_side_effect=True)(
        x.astype(dtype), plus.astype(dtype), minus.astype(dtype), log_amp.astype(dtype),
        positions.astype(jnp.int64), log_u.astype(dtype), tables, bias_and_bounds, table, sizes, flags, messages)


def run_sweeps(arrays, x, cache, log_amp, table, positions, log_u, kind: str):
    """Metropolis sweeps of an RBM-like state with real parameters, in one compiled host call.

    ``arrays``: the state's :class:`~psiloom.states.RBMArrays` (``FastUpdates.dense_rbm``);
    ``cache``: its :class:`~psiloom.states.RBMCache` of ``x`` (n_chains, N); ``table`` (P, K) a
    NumPy int array of the sites of the P possible proposals, ``kind`` ``"flip"`` (K = 1) or
    ``"exchange"`` (K = 2); ``positions`` (n_sweeps, S, n_chains) the entries of ``table``
    proposed in turn (taken mod P), or (n_sweeps, S, 1) for the same entries in every chain;
    ``log_u`` (n_sweeps, S, n_chains) the logarithms of the acceptance uniforms.

    Returns ``(xs, log_amps, cache, accepted)``: ``xs`` (n_sweeps, n_chains, N) and ``log_amps``
    (n_sweeps, n_chains) the chains after every sweep, ``cache`` that of ``xs[-1]`` (the input
    cache's type), ``accepted`` (n_sweeps,) int32 the accepted proposals (null ones included)
    per sweep. Usable inside ``jax.jit``: one call for all sweeps (a call to the host costs
    ~0.1-0.5 ms here, more than one sweep of a small state). The chains are those that the fast
    update with the Metropolis rule produces from the same numbers.
    """
    k = _KINDS.get(kind) if isinstance(kind, str) else None
    table = np.asarray(table, np.int64)
    if k is None or table.ndim != 2 or table.shape[1] != k:
        raise ValueError(f"compiled sweeps take flips (K=1) or exchanges (K=2), got kind={kind!r} "
                         f"with a table of shape {table.shape}")
    if table.min() < 0 or table.max() >= x.shape[-1]:
        raise ValueError(f"sites {table.min()}..{table.max()} outside the {x.shape[-1]}-site configuration")
    if positions.ndim != 3 or positions.shape[2] not in (1, x.shape[0]):
        raise ValueError(f"positions must have shape (n_sweeps, S, 1 or n_chains), got {positions.shape}")
    xs, log_amps, plus, minus, accepted = host_call(k, table, x, cache.plus, cache.minus, log_amp, positions, log_u,
                                                    arrays)
    return xs, log_amps, cache._replace(plus=plus, minus=minus), accepted
