"""Metropolis sampling of |ψ(x)|² over many independent chains.

The kernel follows the pure-function pattern: a :class:`ChainState` (configurations plus the
cached ``log ψ`` of each chain) and

    step(key, state, log_amplitude) -> (state, StepInfo)

performs one proposal per chain with the Metropolis acceptance

    A(x → x') = min(1, |ψ(x')/ψ(x)|²) = min(1, exp(2 Re[log ψ(x') − log ψ(x)])).

The proposal is built here; the acceptance itself is the one step shared by every sampler,
:func:`psiloom.sampling.base.metropolis_accept`, and the burn-in / collection loop is
:func:`psiloom.sampling.base.burn_in_and_collect`.

:class:`MetropolisChains` bundles a move with chain counts, burn-in and thinning (a *sweep*
of ``n_sites`` proposals between stored samples by default). Chains persist between
optimisation steps: after a parameter update call :meth:`MetropolisChains.refresh` to
recompute the cached log-amplitudes, then continue sampling from where the chains stood.

Samples come out with shape ``(n_per_chain, n_chains, n_sites)`` — time along the chain
first, chains second — and flatten to a leading sample axis of ``n_per_chain · n_chains``.

Proposal order: ``order="random"`` (default) draws every proposal independently in every
chain; ``order="sequential"`` visits the sites (single flips) or bonds (exchange) in a fixed
order, the same in all chains (:class:`~psiloom.sampling.moves.OrderedMove`, a systematic
scan). Both leave |ψ|² invariant; the sequential order is the faster one with fast updates,
because every chain changes the same sites and the trial state's tables need no per-chain
gather (about 2× on a 100-site RBM, ``benchmarks/throughput.py``); on the fast path it reads
and writes only the K changed sites of ``x`` instead of building every ``x'``.

Compiled sweeps: when the trial state hands out its plain RBM arrays (the real RBM and its
weight-shared variants; ``FastUpdates.dense_rbm``), all sweeps of a
:meth:`MetropolisChains.sample` call run on the CPU in the sampler's Numba kernel
(:mod:`psiloom.sampling.compiled`), in one host call, when the move is single flips or a bond
exchange (either order; :meth:`~psiloom.sampling.moves.Move.entry_table`): the
proposals and uniforms are drawn in JAX exactly as on the JAX path and passed in, so both give
the same chains (``compiled_sweeps=False`` keeps the JAX loop). A sequential sweep continues
the cycle across sweeps of one :meth:`MetropolisChains.sample` call and restarts it at
position 0 in every call.

Fast updates: when ``log_amplitude`` is a bound trial state implementing the protocol of
:mod:`psiloom.states.fast` (e.g. the RBM), the chain state also carries the per-chain cache
(for the RBM the pair 1 ± tanh θ of every hidden unit) and each proposal costs O(K·M) for the K sites the
move changed, instead of a full O(N·M) evaluation. The random numbers are drawn exactly as
on the generic path, so both paths produce the same chain for the same key (to rounding of
the log-ratios). The cached log-amplitude is then accumulated, ``log ψ(x') = log ψ(x) + Δ``;
:meth:`MetropolisChains.refresh` (called by the training loop every step) recomputes both.
"""

from __future__ import annotations

from typing import Any, Callable, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import boolean, nonnegative_int, one_of, positive_int
from psiloom.sampling import base
from psiloom.sampling.base import LogAmplitudeFn, burn_in_and_collect
from psiloom.sampling.moves import FLIP, Move, OrderedMove, apply_entries, choose_move
from psiloom.spaces import SpinSpace
from psiloom.states.fast import FastUpdates, fast_updates_of, values_at


class ChainState(NamedTuple):
    """State of the Metropolis chains: configurations, log ψ there and the fast-update cache."""
    x: jax.Array  # (n_chains, n_sites) current configurations
    log_amp: jax.Array  # (n_chains,) log ψ at x
    cache: Any = None  # fast-update cache of x (leading axis n_chains), None on the generic path


class StepInfo(NamedTuple):
    """What one Metropolis sweep did, per chain."""
    accepted: jax.Array  # (n_chains,) bool: whether each chain moved
    log_ratio: jax.Array  # (n_chains,) 2 Re[log ψ(x') − log ψ(x)]


def attach_cache(x, cache, fast: FastUpdates | None, recompute: bool = True):
    """The fast-update cache a chain state of ``x`` (sample axis leading) should carry: ``None``
    on the generic path, ``fast.init(x)`` when asked to ``recompute`` or missing, else ``cache``."""
    if fast is None:
        return None
    if recompute or cache is None:
        return fast.init(x)
    return cache


def proposal_log_amp(x, log_amp, cache, x_new, sites, log_amplitude: LogAmplitudeFn, fast: FastUpdates | None):
    """``(Δ, log ψ(x'), cache of x')`` of proposals ``x_new`` that changed ``sites``: from the
    fast-update cache when there is one, else by evaluating ψ(x') in full (cache ``None``)."""
    if fast is not None and cache is not None:
        delta, cache_new = fast.update(values_at(x, sites), cache, sites, values_at(x_new, sites))
        return delta, log_amp + delta, cache_new
    log_new = log_amplitude(x_new)
    return log_new - log_amp, log_new, None


def _transition(state: ChainState, x_new, sites, log_u, log_amplitude, fast):
    """Accept or reject the proposals ``x_new`` (changed ``sites``) given ``log u`` per chain."""
    delta, log_new, cache_new = proposal_log_amp(state.x, state.log_amp, state.cache, x_new, sites,
                                                 log_amplitude, fast)
    log_ratio = 2.0 * jnp.real(delta)
    current = state if cache_new is not None else state._replace(cache=None)
    new, accepted = base.metropolis_accept(log_u, log_ratio, ChainState(x_new, log_new, cache_new), current)
    return new, StepInfo(accepted, log_ratio)


def _proposal_body(propose: Callable, log_amplitude, fast):
    """Scan body ``(carry, (draw, log u)) -> carry`` of one proposal per chain on any path:
    ``propose(draw, x) -> (x', sites)`` builds the proposal, :func:`_transition` decides it;
    the carry is ``(state, accepted count)``."""

    def body(carry, draw):
        st, acc = carry
        d, lu = draw
        x_new, sites = propose(d, st.x)
        st, info = _transition(st, x_new, sites, lu, log_amplitude, fast)
        return (st, acc + jnp.sum(info.accepted, dtype=jnp.int32)), None

    return body


def _fast_table_body(kind: str, fast: FastUpdates, sites_of: Callable):
    """Scan body of a table move (flip or exchange) on the fast path, fed ``(draw, log u)``.

    The same transition as :func:`_proposal_body`, without building ``x'``: ``sites_of(draw)``
    gives the K changed sites, shared by all chains ``(K,)`` (a systematic scan: the state's
    tables need no per-chain gather) or per chain ``(n, K)``; only the old and new values
    ``(n, K)`` at those sites are read, and the accepted values are written back there.
    """

    def body(carry, draw):
        st, acc = carry
        d, lu = draw
        sites = sites_of(d)
        rows = jnp.arange(st.x.shape[0])[:, None]
        old = st.x[rows, sites]  # (n, K)
        new = -old if kind == FLIP else old[:, ::-1]
        delta, cache_new = fast.update(old, st.cache, sites, new)
        (values, log_amp, cache), accepted = base.metropolis_accept(
            lu, 2.0 * jnp.real(delta), (new, st.log_amp + delta, cache_new), (old, st.log_amp, st.cache))
        st = ChainState(st.x.at[rows, sites].set(values), log_amp, cache)
        return (st, acc + jnp.sum(accepted, dtype=jnp.int32)), None

    return body


def _uniform_dtype(state: ChainState):
    return jnp.real(state.log_amp).dtype


def metropolis_step(move: Move) -> Callable:
    """Build the pure kernel ``step(key, state, log_amplitude, fast=None) -> (state, StepInfo)``.

    With ``fast`` (the :class:`~psiloom.states.FastUpdates` of ``log_amplitude``) and a state
    carrying a cache, Δ log ψ comes from the cached per-chain quantities and the sites the
    move changed; otherwise ψ(x') is re-evaluated in full (and any cache is dropped). The
    proposal and acceptance draws are identical on both paths.
    """

    def step(key: jax.Array, state: ChainState, log_amplitude: LogAmplitudeFn, fast: FastUpdates | None = None):
        k_prop, k_acc = jax.random.split(key)
        x_new, sites = move(k_prop, state.x)
        u = jax.random.uniform(k_acc, state.log_amp.shape, dtype=_uniform_dtype(state))
        return _transition(state, x_new, sites, jnp.log(u), log_amplitude, fast)

    return step


class MetropolisChains:
    """Metropolis sampler over ``n_chains`` independent chains.

    Args:
        space: the configuration space (its magnetisation constraint picks the default move).
        n_chains: number of independent chains (the batch of one proposal).
        move: a :class:`~psiloom.sampling.Move` (e.g. ``single_flip``, ``BondExchange(bonds)``,
            ``Mixture((single_flip, global_flip), (0.9, 0.1))``); default single flips for an
            unconstrained space, nearest-neighbour exchange over ``bonds`` (or any-pair exchange
            without bonds) for a fixed-magnetisation space.
        bonds: pairs for the exchange move (e.g. ``lattice.bonds``), checked against the space
            (``ValueError`` naming bonds with negative or out-of-range sites).
        sweep: proposals between stored samples (default ``n_sites``).
        burn_in: sweeps discarded at the start of every :meth:`sample` call.
        order: ``"random"`` (independent proposals per chain) or ``"sequential"`` (a systematic
            scan over the sites or bonds, the same in every chain; needs single flips or a bond
            exchange, or an :class:`~psiloom.sampling.OrderedMove`). See the module docstring.
        compiled_sweeps: ``True``: run the sweeps of :meth:`sample` through the compiled
            kernel of :mod:`psiloom.sampling.compiled` where the state hands out its RBM arrays
            (the RBM with real parameters, on the CPU) and the move is single flips or a bond
            exchange (in either order); ``False`` keeps every proposal in JAX; ``"auto"``
            (default): the kernel where a sweep's work ``n_chains · sweep · M`` (M hidden units)
            is at least :attr:`COMPILED_SWEEP_WORK`, the JAX loop below. Both give the same
            chains. The kernel is compiled by Numba once per machine (~10 s on two cores, then
            loaded from the on-disk cache); below the threshold a JAX step is at most ~2× slower
            (L = 16-40 rings, 32-64 chains), so a short run on a small system is done before the
            kernel would have paid for its compilation. ``True`` uses it regardless.
    """

    #: ``compiled_sweeps="auto"`` runs the compiled kernel from this many hidden-unit updates per
    #: sweep (``n_chains · sweep · M``): e.g. 16 chains on a 100-site ring with α = 2 (320 000),
    #: not 64 chains on a 20-site ring (51 200).
    COMPILED_SWEEP_WORK = 1 << 17

    def __init__(self, space: SpinSpace, n_chains: int = 16, move: Move | None = None, bonds=None,
                 sweep: int | None = None, burn_in: int = 0, order: str = "random",
                 compiled_sweeps: bool | str = "auto"):
        self.space = space
        self.n_chains = positive_int("n_chains", n_chains)
        self.sweep = space.n_sites if sweep is None else positive_int("sweep", sweep)
        self.burn_in = nonnegative_int("burn_in", burn_in)
        self.order = one_of("order", order, ("random", "sequential"))
        if isinstance(compiled_sweeps, str) and compiled_sweeps == "auto":
            self.compiled_sweeps: bool | str = "auto"
        else:
            self.compiled_sweeps = boolean("compiled_sweeps", compiled_sweeps, also="'auto'")
        move = choose_move(space, move, bonds)
        self.ordered = move.ordered(space.n_sites) if order == "sequential" else None
        self.move = move.randomised() if isinstance(move, OrderedMove) else move
        # proposals a compiled sweep kernel can draw itself: a fixed table of flips or exchanges
        self._entry_table = (self.ordered or self.move).entry_table(space.n_sites)
        self._step = metropolis_step(self.move)

    def init(self, key: jax.Array, log_amplitude: LogAmplitudeFn) -> ChainState:
        """Random valid starting configurations, their log-amplitudes (and fast-update cache).

        A bound trial state (a pytree) is handled by one compiled program (op by op, the state's
        evaluation and cache cost ~0.5-2 s of a short run's start); a plain function runs eagerly."""
        from psiloom.states.bound import BoundState

        if isinstance(log_amplitude, BoundState):
            return jax.jit(self._init)(key, log_amplitude)
        return self._init(key, log_amplitude)

    def _init(self, key: jax.Array, log_amplitude: LogAmplitudeFn) -> ChainState:
        x = self.space.random(key, self.n_chains)
        return ChainState(x, base.evaluate_log_amplitudes(log_amplitude, x),
                          attach_cache(x, None, fast_updates_of(log_amplitude)))

    def refresh(self, state: ChainState, log_amplitude: LogAmplitudeFn) -> ChainState:
        """Recompute the cached log-amplitudes and fast-update cache (after the parameters changed)."""
        return ChainState(state.x, base.evaluate_log_amplitudes(log_amplitude, state.x),
                          attach_cache(state.x, None, fast_updates_of(log_amplitude)))

    def step(self, key, state: ChainState, log_amplitude: LogAmplitudeFn):
        """One proposal per chain: ``(state, StepInfo)`` (fast path when available)."""
        fast = fast_updates_of(log_amplitude)
        state = state._replace(cache=attach_cache(state.x, state.cache, fast, recompute=False))
        return self._step(key, state, log_amplitude, fast)

    def _sweep(self, key, state, log_amplitude, fast=None):
        """``self.sweep`` proposals per chain of a move without an entry table (random order):
        ``(state, number of accepted proposals)``. The move keys and acceptance uniforms of the
        whole sweep are drawn before the loop (two random-number calls instead of two per
        proposal, which matters on CPU once proposals are cheap)."""
        k_moves, k_acc = jax.random.split(key)
        log_u = jnp.log(jax.random.uniform(k_acc, (self.sweep, *state.log_amp.shape), dtype=_uniform_dtype(state)))

        body = _proposal_body(self.move, log_amplitude, fast)
        draws = (jax.random.split(k_moves, self.sweep), log_u)
        (state, acc), _ = jax.lax.scan(body, (state, jnp.zeros((), jnp.int32)), draws)
        return state, acc

    def _table_draws(self, key, n_sweeps: int, n_chains: int, dtype):
        """The random numbers of ``n_sweeps`` sweeps of a table move (single flips or a bond
        exchange), drawn in one call: ``entries`` int32 ``(n_sweeps, sweep, n_chains)``, the
        table row each chain proposes (``None`` in sequential order, whose positions are fixed),
        and ``log u`` of the same shape. Both paths (JAX and compiled) use them, so both give
        the same chains.

        The entry is ``⌊u′ P⌋`` of a second uniform ``u′`` (P table rows): uniform to the
        resolution of ``u′``, and whatever small unevenness rounding leaves, the proposal stays
        symmetric (row ``e`` is an involution, ``x → x' → x``, chosen with the same probability
        both ways), so detailed balance is exact. One flat draw costs a fraction of the
        compile time of several shaped ones (threefry over an n-d shape compiles to far more
        code), and the compile time of a short run is most of its wall time."""
        shape = (n_sweeps, self.sweep, n_chains)
        size = n_sweeps * self.sweep * n_chains
        if self.ordered is not None:
            return None, jnp.log(jax.random.uniform(key, (size,), dtype=dtype)).reshape(shape)
        assert self._entry_table is not None
        n_entries = len(self._entry_table[0])
        u = jax.random.uniform(key, (2 * size,), dtype=dtype)
        entries = jnp.minimum(jnp.floor(u[size:] * n_entries).astype(jnp.int32), n_entries - 1)
        return entries.reshape(shape), jnp.log(u[:size]).reshape(shape)

    def _table_sample(self, key, state: ChainState, log_amplitude, fast, n_per_chain: int):
        """:meth:`sample` of a table move: all random numbers drawn first
        (:meth:`_table_draws`), then the sweeps in JAX or in the compiled kernel."""
        n_sweeps, n_chains = self.burn_in + n_per_chain, state.x.shape[0]
        entries, log_u = self._table_draws(key, n_sweeps, n_chains, _uniform_dtype(state))
        if fast is not None and self._uses_compiled_sweeps(fast, state):
            return self._compiled_sample(state, fast, entries, log_u)
        assert self._entry_table is not None
        table, kind = self._entry_table
        fast_path = fast is not None and state.cache is not None
        if self.ordered is None:
            sites_of = jnp.asarray(np.asarray(table), jnp.int32)
            if fast_path:
                body = _fast_table_body(kind, fast, lambda e: sites_of[e])
            else:
                body = _proposal_body(lambda e, x: apply_entries(table, kind, e, x), log_amplitude, fast)

            def sweep(draw, st, i):
                (st, acc), _ = jax.lax.scan(body, (st, jnp.zeros((), jnp.int32)), draw)
                return st, acc

            draws = (entries, log_u)
        else:
            move = self.ordered
            steps = jnp.arange(self.sweep, dtype=jnp.int32)
            body = (_fast_table_body(move.kind, fast, move.sites_at) if fast_path
                    else _proposal_body(move, log_amplitude, fast))

            def sweep(lu, st, i):  # a sequential sweep continues the cycle: proposals i·S, i·S + 1, …
                (st, acc), _ = jax.lax.scan(body, (st, jnp.zeros((), jnp.int32)), (i * self.sweep + steps, lu))
                return st, acc

            draws = log_u
        state, (xs, logs, acc) = base.scan_sweeps(sweep, state, draws,
                                                  record=lambda st, acc: (st.x, st.log_amp, acc))
        b = self.burn_in
        return xs[b:], logs[b:], state, self._acceptance(acc[b:], n_chains)

    def _compiled_sample(self, state: ChainState, fast: FastUpdates, entries, log_u):
        """:meth:`_table_sample` through the compiled sweeps (one call for all sweeps), fed the
        same random numbers as the JAX path."""
        assert self._entry_table is not None  # compiled sweeps run only for table moves
        table, kind = self._entry_table
        n_sweeps, n_chains = log_u.shape[0], state.x.shape[0]
        if self.ordered is not None:
            positions = (jnp.arange(n_sweeps, dtype=jnp.int32)[:, None] * self.sweep
                         + jnp.arange(self.sweep, dtype=jnp.int32))[:, :, None]
        else:
            positions = entries
        from psiloom.sampling import compiled

        xs, logs, cache, counts = compiled.run_sweeps(fast.dense_rbm, state.x, state.cache, state.log_amp, table,
                                                      positions, log_u, kind)
        state = ChainState(xs[-1], logs[-1], cache)
        return xs[self.burn_in:], logs[self.burn_in:], state, self._acceptance(counts[self.burn_in:], n_chains)

    def _acceptance(self, counts, n_chains: int):
        """Fraction of accepted proposals (float32) from the accepted counts of the stored sweeps."""
        return jnp.sum(counts).astype(jnp.float32) / jnp.float32(counts.shape[0] * self.sweep * n_chains)

    def _uses_compiled_sweeps(self, fast: FastUpdates | None, state: ChainState) -> bool:
        if not (self.compiled_sweeps and self._entry_table is not None and fast is not None
                and fast.dense_rbm is not None and state.cache is not None):
            return False
        if self.compiled_sweeps == "auto":
            work = state.x.shape[0] * self.sweep * fast.dense_rbm.kernel.shape[-1]
            if work < self.COMPILED_SWEEP_WORK:
                return False
        from psiloom.sampling import compiled  # Numba is imported where the kernel may run (~0.5 s)

        return compiled.available()

    def sample(self, key: jax.Array, state: ChainState, log_amplitude: LogAmplitudeFn, n_per_chain: int):
        """Burn in, then store ``n_per_chain`` samples per chain, one sweep apart.

        Returns ``(samples, log_amps, state, acceptance)`` with samples of shape
        ``(n_per_chain, n_chains, n_sites)``, their log-amplitudes ``(n_per_chain, n_chains)``
        and the mean acceptance rate over the stored part. Uses fast updates when
        ``log_amplitude`` offers them (see the module docstring).
        """
        n_per_chain = positive_int("n_per_chain", n_per_chain)
        fast = fast_updates_of(log_amplitude)  # asked once per call
        state = state._replace(cache=attach_cache(state.x, state.cache, fast, recompute=False))
        if self._entry_table is not None:
            return self._table_sample(key, state, log_amplitude, fast, n_per_chain)

        def sweep(k, st, i):
            return self._sweep(k, st, log_amplitude, fast)

        state, (xs, logs, acc) = burn_in_and_collect(key, state, sweep, self.burn_in, n_per_chain,
                                                     lambda st, acc: (st.x, st.log_amp, acc))
        return xs, logs, state, self._acceptance(acc, state.x.shape[0])
