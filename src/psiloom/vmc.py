"""The variational Monte Carlo step as pure functions over a pytree state.

:func:`vmc` builds, from a trial state, a Hamiltonian, a sampler and an optax optimiser, a
:class:`VMC` bundle of pure functions (the pattern of an optax transformation):

* ``init(key, params=None) -> VMCState``: parameters (initialised unless given), optimiser
  state, chains and the key of the run;
* ``step(state) -> (state, StepOutput)``: one optimisation step,

      chains ──sample──▶ x ──log ψ──▶ E_loc(x) ──stats──▶ E ± σ
                                          └──▶ ∇E (covariance form) ──preconditioner──▶ update

* ``guarded_step(state) -> (state, StepOutput, bad)``: the step that keeps the old state when
  the energy, the gradient, the new parameters or the new optimiser state are not finite
  (``bad`` is a bit mask of :data:`NON_FINITE`);
* ``multi_step(state, n_active, k) -> (state, outputs, taken, bad, bad_step)``: up to ``k``
  guarded steps in one ``lax.scan`` (``k`` static, ``n_active ≤ k`` traced: one compiled
  program serves every visit length); once a step is non-finite the remaining ones leave the
  state untouched;
* ``evaluate(params, chains, key, n_per_chain, burn_in) -> (Estimate, acceptance, chains)``
  and ``draw(...)``, the shared sampling of evaluation passes (also used by
  :func:`psiloom.electrons.evaluate_components`).

The four phases of a step — ``sampling``, ``local_energy``, ``gradient``, ``solve`` — are
separate pure functions in ``VMC.phases`` so that profiling can compile and time them one
by one. Nothing here is compiled; callers ``jax.jit`` what they use
(:class:`psiloom.train.GroundStateSearch` does).

A sampler with ``exact = True`` (:class:`psiloom.sampling.ExactEnumeration`) returns every
configuration of a small space: the step then weights each average by the Born weights
``sampler.weights(log ψ)`` (:func:`psiloom.stats.weighted_estimate`, the ``weights`` of
:func:`psiloom.optimize.gradient.energy_gradient` and of ``SampleGeometry``) and takes the local
energies from ``sampler.local_energies(hamiltonian, log ψ)`` (the sparse matrix), so energy,
gradient and S are exact.

Every leaf of the state returned by ``init`` is strongly typed, like the state a step returns,
so the compiled step is traced and compiled once per run (a weakly typed leaf in the initial
state used to cost a second compilation at step 2).
"""

from __future__ import annotations

import functools
from typing import Any, Callable, NamedTuple

import jax
import jax.extend
import jax.numpy as jnp
import optax

from psiloom import stats
from psiloom.optimize.outliers import winsorize_local_energies
from psiloom.optimize.flatten import tree_norm
from psiloom.optimize.gradient import SampleGeometry, energy_gradient
from psiloom.states.base import check_input_size
from psiloom.states.bound import BoundState


class VMCState(NamedTuple):
    """Everything needed to continue a run bit-identically.

    ``step`` counts the updates applied so far (0 after ``init``)."""

    step: jax.Array
    params: Any
    opt_state: Any
    chains: Any
    key: jax.Array


class StepOutput(NamedTuple):
    """What one VMC step reports: the energy estimate, the acceptance and the SR diagnostics."""
    energy: stats.Estimate
    acceptance: jax.Array
    grad_norm: jax.Array


class Phases(NamedTuple):
    """The four phases of a step as pure functions (see :func:`vmc`)."""

    sampling: Callable  # (key, params, chains, n_per_chain) -> (x, log ψ(x), chains, acceptance)
    local_energy: Callable  # (params, x, logs) -> E_loc
    gradient: Callable  # (params, x, e_loc, logs=None) -> (Estimate, ∇E, e_loc used for the update)
    solve: Callable  # (params, opt_state, grad, x, e_loc, logs=None) -> (params, opt_state)


class VMC(NamedTuple):
    """Pure functions of a variational Monte Carlo search (see the module docstring)."""

    init: Callable
    step: Callable
    guarded_step: Callable
    multi_step: Callable
    evaluate: Callable
    draw: Callable
    phases: Phases
    bind: Callable  # params -> log ψ as a bound callable (fast path unless fast=False)
    n_per_chain: int


#: XLA options of the programs that run once per search, such as the fresh state. The lowest
#: backend optimisation level compiles them in about half the time.
RUN_ONCE = {"xla_backend_optimization_level": 0}

#: Bits of the non-finite mask returned by guarded steps, in the order they are reported.
NON_FINITE = {"energy": 1, "gradient": 2, "parameters": 4, "optimiser state": 8}


def non_finite_names(mask: int) -> list[str]:
    """The parts named by a non-finite bit mask, e.g. ``["energy", "gradient"]``."""
    return [name for name, bit in NON_FINITE.items() if int(mask) & bit]


def _all_finite(tree) -> jax.Array:
    leaves = [jnp.all(jnp.isfinite(l)) for l in jax.tree_util.tree_leaves(tree)
              if jnp.issubdtype(jnp.result_type(l), jnp.inexact)]
    return jnp.all(jnp.stack(leaves)) if leaves else jnp.asarray(True)


def strong(tree):
    """``tree`` with every array leaf strongly typed (same dtype, ``weak_type=False``)."""
    return jax.tree_util.tree_map(lambda a: jax.lax.convert_element_type(a, jnp.result_type(a))
                                  if hasattr(a, "dtype") else a, tree)


def vmc(model, hamiltonian, sampler, optimizer: optax.GradientTransformation, n_samples: int,
        chunk: int | None = None, winsorize: float | None = None, fast: bool = True,
        step_rhat: bool = False) -> VMC:
    """The pure functions of a VMC search (arguments as for :class:`psiloom.train.GroundStateSearch`,
    which validates them). ``step_rhat``: each step's energy estimate also carries split-R̂ of its
    chains (otherwise nan; evaluation passes of fixed size always do). ``optimizer`` receives
    the keyword ``geometry`` (the sample geometry, for stochastic reconfiguration) through
    :func:`optax.with_extra_args_support`."""
    optimizer = optax.with_extra_args_support(optimizer)
    n_per_chain = int(n_samples) // sampler.n_chains
    fast = bool(fast)
    exact = bool(getattr(sampler, "exact", False))

    def weights_of(logs):
        """Born weights of an exact sampler's rows, else None (sample means)."""
        return sampler.weights(logs) if exact and logs is not None else None

    def estimate_of(e_loc, logs, shape, rhat=True):
        """Exact weighted average (exact sampler) or the Monte Carlo estimate of ``(n_time, n_chains)``."""
        if exact:
            return stats.weighted_estimate(e_loc, sampler.weights(logs))
        return stats.estimate(e_loc.reshape(shape), rhat=rhat)

    def bind(params):
        return BoundState(model, params, fast=fast)

    @functools.partial(jax.jit, compiler_options=RUN_ONCE)  # one program (op by op, its many small operations compile one by one)
    def init(key, params=None) -> VMCState:
        k_param, k_chain, k_run = jax.random.split(key, 3)
        space = sampler.space
        if params is None:
            # compiled: op-by-op initialisation of deep modules is many times slower
            params = jax.jit(model.init)(k_param, space.random(k_param, 1))
        check_input_size(model, params, space)
        chains = sampler.init(k_chain, bind(params))
        # strongly typed leaves, like those the step returns: one compilation, not two
        return strong(VMCState(jnp.zeros((), jnp.int32), params, optimizer.init(params), chains, k_run))

    # ------------------------------------------------------------------ the four phases
    def sampling(key, params, chains, n_per_chain):
        log_amp = bind(params)
        chains = sampler.refresh(chains, log_amp)
        xs, logs, chains, acc = sampler.sample(key, chains, log_amp, n_per_chain)
        x = xs.reshape(-1, *xs.shape[2:])  # time-major leading sample axis
        return x, logs.reshape(-1), chains, acc

    def local_energy(params, x, logs):
        if exact:
            return sampler.local_energies(hamiltonian, logs)
        return hamiltonian.local_energy(bind(params), x, logs, chunk=chunk)

    def gradient(params, x, e_loc, logs=None):
        if exact and logs is None:
            logs = model.apply(params, x)
        estimate = estimate_of(e_loc, logs, (-1, sampler.n_chains), step_rhat)
        if winsorize is not None:
            e_loc = winsorize_local_energies(e_loc, winsorize)
        _, grad = energy_gradient(model.apply, params, x, e_loc, weights_of(logs))
        return estimate, grad, e_loc

    def solve(params, opt_state, grad, x, e_loc, logs=None):
        if exact and logs is None:
            logs = model.apply(params, x)
        geometry = SampleGeometry(model.apply, params, x, e_loc, chunk=chunk, weights=weights_of(logs),
                                  sign_only_phase=bool(getattr(model, "sign_only_phase", False)))
        updates, opt_state = optimizer.update(grad, opt_state, params, geometry=geometry)
        return optax.apply_updates(params, updates), opt_state

    # ------------------------------------------------------------------ steps
    def step(state: VMCState, learn=True):
        """One step. ``learn`` (a Python or traced bool): ``False`` skips the gradient and the
        update at run time (a ``lax.cond``), so the same compiled program also serves evaluation
        passes: the chains move, the step's energy is estimated, parameters, optimiser state and
        step count stay (``grad_norm`` is then 0)."""
        key, k_sample = jax.random.split(state.key)
        x, logs, chains, acc = sampling(k_sample, state.params, state.chains, n_per_chain)
        e_loc = local_energy(state.params, x, logs)

        def update(_):
            estimate, grad, e_used = gradient(state.params, x, e_loc, logs)
            params, opt_state = solve(state.params, state.opt_state, grad, x, e_used, logs)
            return estimate, params, opt_state, tree_norm(grad), state.step + 1

        if learn is True:  # the plain training step
            estimate, params, opt_state, grad_norm, count = update(None)
        else:  # the estimate outside the branches: compiled once (XLA drops the branch's copy)
            estimate = estimate_of(e_loc, logs, (-1, sampler.n_chains), step_rhat)

            def learning(_):
                _, params, opt_state, grad_norm, count = update(None)
                return params, opt_state, grad_norm.astype(jnp.result_type(float)), count

            def frozen(_):
                return state.params, state.opt_state, jnp.zeros((), jnp.result_type(float)), state.step

            params, opt_state, grad_norm, count = jax.lax.cond(learn, learning, frozen, None)
        new = VMCState(count, params, opt_state, chains, key)
        return new, StepOutput(estimate, acc, grad_norm)

    def guarded_step(state: VMCState, learn=True):
        new, out = step(state, learn)
        e = out.energy
        bad = (jnp.where(jnp.isfinite(e.mean) & jnp.isfinite(e.error), 0, NON_FINITE["energy"])
               | jnp.where(jnp.isfinite(out.grad_norm), 0, NON_FINITE["gradient"])
               | jnp.where(_all_finite(new.params), 0, NON_FINITE["parameters"])
               | jnp.where(_all_finite(new.opt_state), 0, NON_FINITE["optimiser state"])).astype(jnp.int32)
        kept = jax.tree_util.tree_map(lambda a, b: jnp.where(bad == 0, a, b), new, state)
        return kept, out, bad

    def multi_step(state: VMCState, n_active, k: int, learn=True):
        """Up to ``k`` guarded steps (the first ``n_active``) in one scan. Returns the state,
        the stacked outputs of all ``k`` slots, ``taken`` (bool, the steps that replaced the
        state), the non-finite mask of the first bad step (0 if none) and its step number
        (1-based, the value ``state.step`` would have had after it; 0 if none). ``learn``
        (traced bool) ``False``: steps that only sample and estimate (see ``step``); passing it
        as an argument lets training and evaluation share one compiled program."""
        def take(st):
            new, out, bad = guarded_step(st, learn)
            return new, strong(out), bad

        # the step traced once: its jaxpr gives the output shapes of the skip branch and is
        # replayed as the taken branch (tracing the step a second time took half the trace time)
        traced, (_, out_shape, _) = jax.make_jaxpr(take, return_shape=True)(state)
        replay = jax.extend.core.jaxpr_as_fun(traced)
        out_tree = jax.tree_util.tree_structure((state, out_shape, jnp.int32(0)))

        def replayed(st):
            return jax.tree_util.tree_unflatten(out_tree, replay(*jax.tree_util.tree_leaves(st)))

        def skip(st):
            return st, strong(jax.tree_util.tree_map(lambda s: jnp.zeros(s.shape, s.dtype), out_shape)), jnp.int32(0)

        def body(carry, i):
            st, bad, bad_step = carry
            active = (i < n_active) & (bad == 0)
            new, out, b = jax.lax.cond(active, replayed, skip, st)
            taken = active & (b == 0)
            bad_step = jnp.where(active & (b != 0), st.step + 1, bad_step)
            return (new, jnp.where(active, b, bad), bad_step), (out, taken)

        (state, bad, bad_step), (outs, taken) = jax.lax.scan(
            body, (state, jnp.int32(0), jnp.zeros((), state.step.dtype)), jnp.arange(k))
        return state, outs, taken, bad, bad_step

    # ------------------------------------------------------------------ evaluation
    def draw(params, chains, key, n_per_chain, burn_in=0):
        """Samples of an evaluation pass at fixed ``params``: refresh the chains, discard
        ``burn_in`` sweeps, store ``n_per_chain`` per chain (``(n_per_chain, n_chains, ...)``).
        Returns ``(xs, log ψ(xs), chains, acceptance, log ψ bound)``."""
        log_amp = bind(params)
        if burn_in:
            k_burn, key = jax.random.split(key)
            _, _, chains, _ = sampler.sample(k_burn, sampler.refresh(chains, log_amp), log_amp, burn_in)
        xs, logs, chains, acc = sampler.sample(key, sampler.refresh(chains, log_amp), log_amp, n_per_chain)
        return xs, logs, chains, acc, log_amp

    def evaluate(params, chains, key, n_per_chain, burn_in=0):
        """Energy estimate of an evaluation pass: ``(Estimate, acceptance, chains)``. Without a
        ``chunk``, local energies are computed a training step's ``n_samples`` at a time: a pass is
        usually many times larger than a step, and a step's size is known to fit in memory."""
        xs, logs, chains, acc, log_amp = draw(params, chains, key, n_per_chain, burn_in)
        x = xs.reshape(-1, *xs.shape[2:])
        if exact:
            e_loc = sampler.local_energies(hamiltonian, logs.reshape(-1))
        else:
            e_loc = hamiltonian.local_energy(log_amp, x, logs.reshape(-1),
                                             chunk=int(n_samples) if chunk is None else chunk)
        return estimate_of(e_loc, logs.reshape(-1), (n_per_chain, -1)), acc, chains

    return VMC(init, step, guarded_step, multi_step, evaluate, draw,
               Phases(sampling, local_energy, gradient, solve), bind, n_per_chain)
