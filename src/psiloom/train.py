"""The convenient facade of a variational ground-state search: :class:`GroundStateSearch`.

It joins the pure functions of :mod:`psiloom.vmc` (the step, its four phases, evaluation),
the outer loop with hooks of :mod:`psiloom.loop` (progress lines, checkpoints, profiling,
callbacks; several steps per host visit) and the checked checkpoints of
:mod:`psiloom.checkpoint`. A :class:`TrainState` (= :class:`psiloom.vmc.VMCState`) holds
everything needed to continue a run bit-identically: step count, parameters, optimiser
state, chain state and PRNG key.

Non-finite energies, gradients, parameters or optimiser states stop the run with
:class:`NonFiniteError` naming the (1-based) step; the state that produced them is discarded
and the last checkpoint is left untouched.

Step numbers are 1-based everywhere: step n takes ``state.step`` from n − 1 to n; its history
row has ``step = n`` and its progress line prints ``step n/total``.

:meth:`GroundStateSearch.profile_step` compiles each phase on its own and times it with
``block_until_ready`` (the fused step is one XLA program and cannot be split from inside);
``run(..., profile_every=k)`` records that breakdown in the history. Trial states with fast
updates (:mod:`psiloom.states.fast`, e.g. the RBM) use them in the sampler and the local
energy unless ``fast=False``.
"""

from __future__ import annotations

import collections
import os
import time
import warnings
from typing import Any, Callable

import jax
import jax.numpy as jnp
import numpy as np
import optax

from psiloom.sampling.base import place_starts
from psiloom import parallel
from psiloom import stats
from psiloom._validation import boolean, nonnegative_int, positive_int, positive_real
from psiloom.checkpoint import (CheckpointError, CheckpointLock, compare_descriptions, describe_state,
                                load_checkpoint as _load_checkpoint, run_meta, save_checkpoint)
from psiloom.history import History
from psiloom.loop import Callback, Checkpointer, Hook, as_hook, NonFiniteError, ProgressBar, ProgressPrinter, Profiler, format_progress, run_loop
from psiloom.optimize.outliers import winsorize_local_energies
from psiloom.states.base import count_real_parameters
from psiloom.vmc import StepOutput, VMCState, vmc

TrainState = VMCState

__all__ = ["GroundStateSearch", "TrainState", "StepOutput", "History", "NonFiniteError", "CheckpointError",
           "CheckpointLock", "save_checkpoint", "load_checkpoint", "format_progress"]


def load_checkpoint(path: str, template, meta: dict | None = None):
    """Read a checkpoint into the structure of ``template`` (see :func:`psiloom.checkpoint.load_checkpoint`;
    :meth:`GroundStateSearch.resume` builds the template and checks the run description)."""
    return _load_checkpoint(path, template, meta)


def _system_key(obj):
    """``(n_up, n_down, charges, positions)`` of a molecule-like object (duck-typed), else None."""
    if all(hasattr(obj, a) for a in ("n_up", "n_down", "charges", "positions")):
        return (int(obj.n_up), int(obj.n_down), tuple(float(v) for v in np.round(np.ravel(obj.charges), 12)),
                tuple(float(v) for v in np.round(np.ravel(obj.positions), 12)))
    return None


def _systems_in(obj, depth: int = 3) -> set:
    """The molecules a trial state (or a Hamiltonian, a sampler) was built for: its own
    ``system`` attribute and those of its sub-modules' fields, ``depth`` levels down."""
    found = set()
    key = _system_key(getattr(obj, "system", None))
    if key is not None:
        found.add(key)
    if depth and hasattr(obj, "__dataclass_fields__"):
        for name in obj.__dataclass_fields__:
            if name in ("parent", "name", "system"):
                continue
            value = getattr(obj, name, None)
            for item in value if isinstance(value, (tuple, list)) else (value,):
                if hasattr(item, "__dataclass_fields__") and not isinstance(item, type):
                    found |= _systems_in(item, depth - 1)
    return found


def _check_same_system(model, hamiltonian, sampler) -> None:
    """Refuse a trial state, Hamiltonian and sampler built for different molecules (electrons)."""
    parts = {name: _systems_in(obj) for name, obj in (("trial state", model), ("Hamiltonian", hamiltonian),
                                                        ("sampler", sampler))}
    present = {name: keys for name, keys in parts.items() if keys}
    if len(set().union(*present.values())) > 1 if present else False:
        described = "; ".join(f"{name}: " + ", ".join(f"n_up={k[0]}, n_down={k[1]}, charges={list(k[2])}"
                                                      for k in sorted(keys)) for name, keys in present.items())
        raise ValueError(f"the trial state, Hamiltonian and sampler are built for different molecules ({described})")


def _check_checkpoint_path(checkpoint) -> None:
    if checkpoint is None:
        return
    if not isinstance(checkpoint, (str, os.PathLike)) or not os.fspath(checkpoint):
        raise ValueError(f"checkpoint must be a non-empty file path or None, got {checkpoint!r}")
    if os.path.isdir(checkpoint):
        raise ValueError(f"checkpoint {os.fspath(checkpoint)!r} is a directory, not a file path")


class GroundStateSearch:
    """Variational ground-state search: sampler + trial state + Hamiltonian + optimiser.

    Args:
        model: a trial state (Flax module; ``model.apply(variables, x) -> log ψ``).
        hamiltonian: anything with ``local_energy(log_amplitude, x, log_amp_x, chunk)``
            (a :class:`~psiloom.operators.PauliSum` for lattices).
        sampler: e.g. :class:`psiloom.sampling.MetropolisChains`; its ``n_chains`` must
            divide ``n_samples``.
        optimizer: an optax transformation; transformations that accept the extra keyword
            ``geometry`` (stochastic reconfiguration) receive the sample geometry.
        n_samples: samples per step (``n_samples / n_chains`` stored per chain).
        chunk: evaluate local energies and log-derivatives in chunks of this many samples.
        winsorize: if set, the width k of local-energy clipping around the median
            (:func:`psiloom.optimize.winsorize_local_energies`) applied to the values feeding the
            gradient and the SR geometry; the reported energy estimate stays unclipped.
        fast: use the trial state's fast amplitude updates (if it has them) in sampling and
            local energies; ``False`` forces full re-evaluation (same results, slower).
        mesh: optional :func:`psiloom.parallel.sample_mesh`: spread the chains over its devices
            (and processes). ``n_chains`` must be divisible by the device count; the chain state
            is sharded along its leading axis, parameters, optimiser state and key replicated, and
            the same seed gives the same run on any number of devices. Progress is printed and
            checkpoints are written by process 0 only.
        step_rhat: also compute split-R̂ of every training step's energy (the history's ``rhat``
            column; nan otherwise). Off by default: over one step's short chains it is biased
            upwards by ≈ τ/n_time (see :func:`psiloom.stats.combine_batches`), and its rank
            normalizations make the step's first compilation ~1.5 s longer on a 2-core CPU
            (trace and compile; a first run of the 16-site ring demo takes ~8.5 s in all). For a
            trustworthy R̂ run a fixed evaluation pass, ``evaluate(state, n_samples=...)``,
            with dispersed ``starts``.

    The pure functions behind it are in ``self.vmc`` (:func:`psiloom.vmc.vmc`).
    """

    PHASES = ("sampling", "local_energy", "gradient", "solve")

    def __init__(self, model, hamiltonian, sampler, optimizer: optax.GradientTransformation,
                 n_samples: int = 1024, chunk: int | None = None, winsorize: float | None = None,
                 fast: bool = True, mesh=None, step_rhat: bool = False):
        positive_int("n_samples", n_samples)
        step_rhat = boolean("step_rhat", step_rhat)
        if n_samples % sampler.n_chains:
            raise ValueError(f"n_samples={n_samples} is not a multiple of the sampler's n_chains={sampler.n_chains}")
        if chunk is not None:
            positive_int("chunk", chunk)
        h_sites, s_sites = getattr(hamiltonian, "n_sites", None), getattr(sampler.space, "n_sites", None)
        if h_sites is not None and s_sites is not None and h_sites != s_sites:
            raise ValueError(f"Hamiltonian acts on {h_sites} sites, the space has {s_sites}")
        if winsorize is not None:
            winsorize_local_energies(jnp.zeros(1), winsorize)  # validates the width (ValueError)
        _check_same_system(model, hamiltonian, sampler)
        if mesh is not None:  # chains split evenly over the devices
            parallel.check_divisible("n_chains", sampler.n_chains, parallel.check_mesh(mesh))
        self.mesh = mesh
        self.model = model
        self.hamiltonian = hamiltonian
        self.sampler = sampler
        self.optimizer = optax.with_extra_args_support(optimizer)
        self.n_samples = int(n_samples)
        self.n_per_chain = self.n_samples // sampler.n_chains
        self.chunk = None if chunk is None else int(chunk)
        self.winsorize = winsorize
        self.fast = bool(fast)
        self.vmc = vmc(model, hamiltonian, sampler, optimizer, self.n_samples, chunk=self.chunk,
                       winsorize=winsorize, fast=self.fast, step_rhat=step_rhat)
        self.step_rhat = step_rhat
        self._phases: tuple | None = None  # separately compiled phases, built by profile_step on first use
        self._step = jax.jit(lambda s: self._constrain(*self.vmc.step(s)))
        self._multi: dict[int, Any] = {}  # steps_per_visit -> compiled multi_step (training and frozen evaluation)
        self._visit_length: int | None = None  # steps_per_visit of the last run: evaluation passes reuse its program
        # compiled evaluation passes, one per (kind, n_per_chain, burn-in); the least recently used
        # beyond EVALUATION_PROGRAMS are dropped, so many distinct sample counts cannot pile up memory
        self._programs: collections.OrderedDict[tuple, Any] = collections.OrderedDict()
        self._template = None

    # ---------------------------------------------------------------- state
    def init(self, key: jax.Array, params=None) -> TrainState:
        """Fresh state: parameters (initialised unless given), optimiser state and chains."""
        return self.place(self.vmc.init(key, params))

    def place(self, state: TrainState) -> TrainState:
        """``state`` placed on the mesh: chains sharded along their leading axis, everything else
        replicated; a no-op without a mesh. Applied by :meth:`init` and by :meth:`run` to a state it
        is given (e.g. a checkpoint written with another device count)."""
        if self.mesh is None:
            return state
        step, params, opt_state, key = parallel.replicate((state.step, state.params, state.opt_state, state.key),
                                                          self.mesh)
        chains = parallel.place_chains(state.chains, self.mesh, self.sampler.n_chains)
        return TrainState(step, params, opt_state, chains, key)

    def _constrain(self, state: TrainState, *outputs):
        """Inside jit: keep the state's placement (chains sharded), other outputs replicated."""
        if self.mesh is None:
            return (state, *outputs)
        step, params, opt_state, key, outputs = parallel.constrain_replicated(
            (state.step, state.params, state.opt_state, state.key, outputs), self.mesh)
        chains = parallel.constrain_chains(state.chains, self.mesh, self.sampler.n_chains)
        return (TrainState(step, params, opt_state, chains, key), *outputs)

    #: Compiled evaluation passes kept (the least recently used is dropped).
    EVALUATION_PROGRAMS = 4

    def _program(self, kind: str, n_per_chain: int, burn_in: int):
        """The compiled evaluation pass ``(params, chains, key) -> ...`` of one sample count and
        burn-in: ``"evaluate"`` (energy estimate) or ``"draw"`` (samples and log ψ). Compiled on
        first use and kept, at most :attr:`EVALUATION_PROGRAMS` of them (dropping a program frees
        its executable)."""
        tag = (kind, n_per_chain, burn_in)
        if tag not in self._programs:
            if kind == "evaluate":
                program = jax.jit(lambda p, c, k: self._evaluate_placed(p, c, k, n_per_chain, burn_in))
            else:
                program = jax.jit(lambda p, c, k: self.vmc.draw(p, c, k, n_per_chain, burn_in)[:2])
            self._programs[tag] = program
            while len(self._programs) > self.EVALUATION_PROGRAMS:
                self._programs.popitem(last=False)
        self._programs.move_to_end(tag)
        return self._programs[tag]

    def _evaluate_placed(self, params, chains, key, n_per_chain, burn_in):
        est, acc, chains = self.vmc.evaluate(params, chains, key, n_per_chain, burn_in)
        if self.mesh is None:
            return est, acc, chains
        est, acc = parallel.constrain_replicated((est, acc), self.mesh)
        return est, acc, parallel.constrain_chains(chains, self.mesh, self.sampler.n_chains)

    def n_parameters(self, state: TrainState) -> int:
        """Number of real parameters of ``state`` (a complex one counts twice)."""
        return count_real_parameters(state.params)

    def template(self):
        """Shapes and dtypes of a fresh state (``jax.ShapeDtypeStruct`` leaves, nothing computed)."""
        if self._template is None:
            self._template = jax.eval_shape(self.vmc.init, jax.random.PRNGKey(0))
        return self._template

    def meta(self) -> dict:
        """The run description checked on resume: chain count, space, x64 setting."""
        return run_meta(self.sampler)

    def _bind(self, params):
        return self.vmc.bind(params)

    # ---------------------------------------------------------------- one step
    def step(self, state: TrainState) -> tuple[TrainState, StepOutput]:
        """One compiled optimisation step (unguarded: non-finite values are returned as they are)."""
        with parallel.mesh_context(self.mesh):  # traces see the mesh (per-device host callbacks)
            return self._step(state)

    def _multi_program(self, steps_per_visit: int):
        """The jitted visit program ``multi(state, n, learn)`` of one visit length."""
        if steps_per_visit not in self._multi:
            def multi(s, n, learn):
                state, *rest = self.vmc.multi_step(s, n, steps_per_visit, learn)
                return self._constrain(state, *rest)

            self._multi[steps_per_visit] = jax.jit(multi)
        return self._multi[steps_per_visit]

    def _advance(self, steps_per_visit: int, learn: bool = True):
        """``advance(state, n)``: up to ``steps_per_visit`` steps in the one compiled program of
        that visit length; ``learn=False`` runs the same program's frozen steps (evaluation)."""
        multi = self._multi_program(steps_per_visit)
        flag = np.bool_(learn)

        def advance(state, n):
            with parallel.mesh_context(self.mesh):
                return multi(state, np.int32(n), flag)

        return advance

    def profile_step(self, state: TrainState, repeat: int = 3) -> dict[str, float]:
        """Wall-clock seconds of the phases of one step from ``state`` (the state is not advanced).

        Each phase is compiled on its own (once, not timed) and timed with
        ``block_until_ready``, best of ``repeat``:

        * ``sampling``: refresh of the chains and the Metropolis sweeps;
        * ``local_energy``: E_loc of all samples;
        * ``gradient``: energy estimate (with τ, R̂) and ∇E;
        * ``solve``: the optimizer update — for SR this includes the per-sample
          log-derivatives and the linear solve.

        Also returns ``total`` (their sum) and ``step``: the normal fused step, timed the same
        way (usually a little below ``total``: one program, no intermediate transfers).
        """
        repeat = positive_int("repeat", repeat)
        with parallel.mesh_context(self.mesh):  # traces see the mesh (per-device host callbacks)
            return self._profile_phases(state, int(repeat))

    def _profile_phases(self, state: TrainState, repeat: int) -> dict[str, float]:
        if self._phases is None:
            p = self.vmc.phases
            self._phases = (jax.jit(p.sampling, static_argnums=(3,)), jax.jit(p.local_energy),
                            jax.jit(p.gradient), jax.jit(p.solve))
        sampling, local_energy, gradient, solve = self._phases
        _, k_sample = jax.random.split(state.key)
        calls = {"sampling": lambda: sampling(k_sample, state.params, state.chains, self.n_per_chain)}
        x, logs, _, _ = jax.block_until_ready(calls["sampling"]())
        calls["local_energy"] = lambda: local_energy(state.params, x, logs)
        e_loc = jax.block_until_ready(calls["local_energy"]())
        calls["gradient"] = lambda: gradient(state.params, x, e_loc, logs)
        _, grad, e_used = jax.block_until_ready(calls["gradient"]())
        calls["solve"] = lambda: solve(state.params, state.opt_state, grad, x, e_used, logs)
        jax.block_until_ready(calls["solve"]())
        calls["step"] = lambda: self.step(state)
        jax.block_until_ready(calls["step"]())
        best = {}
        for name, call in calls.items():
            times = []
            for _ in range(int(repeat)):
                start = time.perf_counter()
                jax.block_until_ready(call())
                times.append(time.perf_counter() - start)
            best[name] = min(times)
        out = {name: best[name] for name in self.PHASES}
        out["total"] = sum(out.values())
        out["step"] = best["step"]
        return out

    # ---------------------------------------------------------------- evaluation
    #: Default cap on the samples of an evaluation pass to a requested error bar.
    DEFAULT_MAX_SAMPLES = 1 << 17

    def evaluate(self, state: TrainState, n_samples: int | None = None, key: jax.Array | None = None,
                 burn_in_sweeps: int = 0, starts=None, *, target_error: float | None = None,
                 max_samples: int | None = None):
        """A separate evaluation pass at fixed parameters, of a fixed size or to a requested error bar.

        Returns ``(Estimate, acceptance)``: the energy with its autocorrelation-corrected error
        (τ from the chains, Sokal windowing) and R̂ across chains.

        Give exactly one of:

        * ``n_samples``: one pass of that many samples, rounded up to a multiple of the chain
          count (with a warning). Each distinct ``(n_samples, burn_in_sweeps)`` compiles its own
          evaluation program once; the :attr:`EVALUATION_PROGRAMS` most recently used are kept.
        * ``target_error``: draw batches of the training step's size (``self.n_samples``) until
          the error bar of the energy is at most ``target_error`` (absolute, in the energy's
          units) or ``max_samples`` (default :attr:`DEFAULT_MAX_SAMPLES`) were drawn; a pass
          stopped by the cap warns with the error reached. The batches are frozen training
          steps — the same compiled program as :meth:`run`, run with the update switched off —
          so this costs no compilation after a run; their estimates are pooled with
          :func:`psiloom.stats.combine_batches` (no R̂: compare chains, e.g. with ``starts``, in a
          fixed pass, which refuses ``starts`` here). After a first batch
          of :attr:`FIRST_BATCHES` steps the pass asks for the steps that the error so far
          predicts (error ∝ 1/√N), so it stops within a batch or two of the target.
          ``burn_in_sweeps`` is rounded up to whole discarded steps.

        ``starts`` (optional, shape ``(k, n_sites)`` with ``1 ≤ k ≤ n_chains``): valid
        configurations that replace the first ``k`` chains before the burn-in, the dispersed
        starting points of Gelman & Rubin (Stat. Sci. 7, 457 (1992)). Chains that continue from
        training have only seen where training went; a trial state can carry large weight
        elsewhere (for a real RBM, ``log ψ`` is a convex function of ``x`` — a sum of
        ``log 2cosh`` of linear forms — so it keeps rising towards extreme configurations such
        as the Néel states of an antiferromagnet). Chains started there stay when that weight is
        real, and R̂ rises above 1 (``Estimate.warnings`` then says the chains have not mixed);
        in a healthy state they relax to the same distribution as the others during the burn-in.
        """
        if target_error is not None:
            if n_samples is not None:
                raise ValueError(f"give n_samples or target_error, not both (got n_samples={n_samples!r}, "
                                 f"target_error={target_error!r})")
            return self._evaluate_to_error(state, target_error, max_samples, key, burn_in_sweeps, starts)
        if n_samples is None:
            raise ValueError("evaluate needs n_samples (a fixed pass) or target_error (a pass to that error bar)")
        if max_samples is not None:
            raise ValueError(f"max_samples={max_samples!r} caps a pass to a target_error; a fixed pass of "
                             f"n_samples={n_samples!r} takes no cap")
        chains, key, n_per_chain, burn_in = self.evaluation_inputs(state, n_samples, key, burn_in_sweeps, starts,
                                                                    fold=7)
        with parallel.mesh_context(self.mesh):
            est, acc, _ = self._program("evaluate", n_per_chain, burn_in)(state.params, chains, key)
        return est, float(acc)

    #: Steps of the first batch of an evaluation pass to a requested error bar.
    FIRST_BATCHES = 4

    def _evaluate_to_error(self, state, target_error, max_samples, key, burn_in_sweeps, starts):
        """:meth:`evaluate` with ``target_error``: frozen steps of the training program until the
        pooled error bar reaches the target or the cap (see there)."""
        target = positive_real("target_error", target_error)
        cap = self.DEFAULT_MAX_SAMPLES if max_samples is None else positive_int("max_samples", max_samples)
        if starts is not None:
            raise ValueError("starts= needs a fixed pass (n_samples=...): its R̂ across chains is what dispersed "
                             "starts are for, and a pass to a target_error has no R̂")
        max_steps = max(1, int(cap) // self.n_samples)  # at least one step, never more than the cap
        chains, key, _, _ = self.evaluation_inputs(state, self.n_samples, key, burn_in_sweeps, starts, fold=7)
        k = self._visit_length or 10  # the visit length run compiled last: no new program
        advance = self._advance(k, learn=False)
        current = TrainState(state.step, state.params, state.opt_state, chains, key)
        burn_steps = -(-nonnegative_int("burn_in_sweeps", burn_in_sweeps) // self.n_per_chain)

        def frozen_steps(current, n, what):
            current, outs, taken, bad, _ = advance(current, n)
            outs, taken, bad = jax.device_get((outs, taken, bad))
            if int(bad) or int(np.sum(taken)) != n:
                raise FloatingPointError(f"non-finite energy in the evaluation pass ({what}): the trial state "
                                         "is not finite on the configurations it visits")
            return current, outs

        while burn_steps > 0:  # discarded steps
            n = min(k, burn_steps)
            current, _ = frozen_steps(current, n, "burn-in")
            burn_steps -= n
        batches, acceptances, done, wanted = [], [], 0, min(self.FIRST_BATCHES, max_steps)
        while True:
            while done < wanted:
                n = min(k, wanted - done)
                current, outs = frozen_steps(current, n, f"after {done} steps")
                batches.append(jax.tree_util.tree_map(lambda a, n=n: np.asarray(a)[:n], outs.energy))
                acceptances.append(np.asarray(outs.acceptance)[:n])
                done += n
            pooled = self._pooled(batches)
            if pooled.error <= target or done >= max_steps:
                break
            # the error falls as 1/sqrt(steps): ask for the steps the error so far predicts (+10%)
            wanted = min(max_steps, max(done + 1, int(np.ceil(1.1 * done * (pooled.error / target) ** 2))))
        pooled = self._pooled(batches)
        if pooled.error > target:
            warnings.warn(f"evaluation stopped at max_samples={cap} ({done * self.n_samples} "
                          f"samples) with error {pooled.error:.3g} > target_error={target:.3g}", stacklevel=3)
        return pooled, float(np.mean(np.concatenate(acceptances)))

    @staticmethod
    def _pooled(batches):
        stacked = jax.tree_util.tree_map(lambda *a: np.concatenate([np.atleast_1d(x) for x in a]), *batches)
        return stats.combine_batches(stacked)

    def measure(self, state: TrainState, observables, n_samples: int, key: jax.Array | None = None,
                burn_in_sweeps: int = 0, starts=None, chunk: int | None = None) -> dict:
        """Expectation values with error bars of named observables in the trained state.

        One evaluation pass at fixed parameters (the chains continue from ``state``, as in
        :meth:`evaluate`), then every operator of ``observables`` (a mapping name -> operator
        with local values, e.g. a :class:`~psiloom.operators.PauliSum`) is estimated on the same
        samples: ⟨O⟩ = mean over x ~ |ψ|² of O_loc(x) = Σ_x' O_{x x'} ψ(x')/ψ(x), with the error
        bar, τ and R̂ of :func:`psiloom.stats.estimate` (see
        :func:`psiloom.operators.observables.measure`). Returns ``{name: Estimate}``.

        Operators follow the Hamiltonian's basis: for a state trained with a Marshall-rotated
        Hamiltonian (``marshall_basis=True``) pass operators rotated the same way (e.g. the
        correlation operators of :func:`psiloom.operators.observables.correlation_operators`
        with ``marshall_basis=True``); diagonal operators need no rotation.
        """
        from psiloom.operators.observables import measure as measure_local

        if not hasattr(observables, "items") or not len(observables):
            raise ValueError(f"observables must be a non-empty mapping name -> operator, got {observables!r}")
        chains, key, n_per_chain, burn_in = self.evaluation_inputs(state, n_samples, key, burn_in_sweeps, starts,
                                                                    fold=13)
        with parallel.mesh_context(self.mesh):
            xs, logs = self._program("draw", n_per_chain, burn_in)(state.params, chains, key)
        xs, logs = parallel.to_host((xs, logs))
        return measure_local(self.vmc.bind(state.params), dict(observables), xs, logs, chunk=chunk)

    def evaluation_inputs(self, state: TrainState, n_samples: int, key=None, burn_in_sweeps: int = 0, starts=None,
                          fold: int = 7):
        """Validated inputs of an evaluation pass: ``(chains, key, n_per_chain, burn_in)``; the
        default key is ``fold_in(state.key, fold)``. The one entry point of evaluation passes
        (:meth:`evaluate`, :func:`psiloom.electrons.evaluate_components`)."""
        positive_int("n_samples", n_samples)
        burn_in = nonnegative_int("burn_in_sweeps", burn_in_sweeps)
        n_per_chain = max(1, -(-int(n_samples) // self.sampler.n_chains))
        if n_per_chain * self.sampler.n_chains != n_samples:
            warnings.warn(f"n_samples={n_samples} is not a multiple of n_chains={self.sampler.n_chains}: "
                          f"{n_per_chain * self.sampler.n_chains} samples are drawn ({n_per_chain} per chain)",
                          stacklevel=3)
        key = jax.random.fold_in(state.key, fold) if key is None else key
        chains = state.chains
        if starts is not None:
            chains = chains._replace(x=place_starts(self.sampler.space, chains.x, starts))
        return chains, key, n_per_chain, burn_in


    # ---------------------------------------------------------------- resume
    def compatibility_problems(self, state: TrainState, history: History | None = None) -> list[str]:
        """Every reason why ``state`` (and ``history``) cannot continue in this search, in plain
        words: parameter structure, shapes, real/complex and dtypes (x64), optimiser state
        structure, chain count, n_sites, magnetisation sector, history steps."""
        problems = compare_descriptions(describe_state(state), describe_state(self.template()),
                                        "the given state", "this search")
        space = self.sampler.space
        x = getattr(state.chains, "x", None)
        if not problems and x is not None and hasattr(space, "contains") and getattr(space, "magnetisation", None) is not None:
            x = parallel.to_host(x)  # whole chains on every process (a collective when spread)
            inside = np.asarray(space.contains(x))
            if not inside.all():
                sz = 0.5 * np.sum(x[~inside][0])
                problems.append(f"magnetisation sector: chains have magnetisation={sz:g}, this space has "
                                f"magnetisation={space.magnetisation:g}")
        if history is not None and len(history):
            step = int(state.step)
            steps = [int(s) for s in history.columns["step"] if s <= step]
            if steps != list(range(1, step + 1)):
                problems.append(f"history steps are not contiguous 1..{step} (state at step {step}): "
                                f"got {len(steps)} rows from {steps[:1]} to {steps[-1:]}")
        return problems

    def check_resumable(self, state: TrainState, history: History | None = None) -> None:
        """Raise ValueError naming every problem of :meth:`compatibility_problems`."""
        problems = self.compatibility_problems(state, history)
        if problems:
            raise ValueError("cannot continue this state in this search: " + "; ".join(problems))

    def save(self, path: str, state: TrainState, history: History | None = None) -> None:
        """Write a checkpoint of ``state`` and ``history`` (with this search's run description)."""
        _check_checkpoint_path(path)
        save_checkpoint(path, state, history, self.meta())

    def resume(self, path: str) -> tuple[TrainState, History]:
        """Load a checkpoint of this search: checks the file, the run description (chain count,
        space, x64) and the state's structure, shapes and dtypes, naming every difference
        (:class:`~psiloom.checkpoint.CheckpointError`). Returns ``(state, history)`` for
        ``run(n, state=state, history=history)``."""
        state, history = _load_checkpoint(path, self.template(), self.meta())
        problems = self.compatibility_problems(state, history)
        if problems:
            raise CheckpointError(f"checkpoint {path!r} does not fit this search: " + "; ".join(problems))
        return state, history

    # ---------------------------------------------------------------- outer loop
    def run(self, n_steps: int, state: TrainState | None = None, key: jax.Array | None = None,
            history: History | None = None, checkpoint: str | None = None, checkpoint_every: int = 50,
            progress: bool | Callable[[str], None] = True, print_every: int = 10,
            callback: Callable[[TrainState, StepOutput], None] | None = None, profile_every: int = 0,
            steps_per_visit: int | None = None, hooks=(), progress_bar: bool = False):
        """Run until ``state.step == n_steps`` (so a resumed run continues to the same total).

        Args:
            n_steps: total number of steps (counting those already in ``state``).
            state: state to continue from (checked by :meth:`check_resumable`); default
                ``self.init(key)``.
            history: history of ``state`` (rows of steps 1..state.step; later rows are dropped).
            checkpoint: path to write the state and history every ``checkpoint_every`` steps
                and at the end (atomic writes; never after a non-finite step; the path is locked
                against a second run while this one writes it).
            progress: True prints to stdout, a callable receives each progress line (after step
                1, every ``print_every`` steps and after the last).
            callback: ``f(state, output)`` after every step.
            profile_every: if > 0, every that many steps (and at the first) time the phases of
                the step with :meth:`profile_step` (``repeat=1``) before taking it, and record
                them as history columns ``t_sampling``, ``t_local_energy``, ``t_gradient``,
                ``t_solve`` (NaN in other rows). Costs one extra compilation per phase.
            steps_per_visit: at most this many steps run on the device between host visits
                (one compiled ``lax.scan``); visits also end where printing, checkpoints,
                profiling or a callback need the host. Default ``print_every``.
            hooks: extra :class:`psiloom.loop.Hook` objects or functions ``f(visit)`` called after
                every host visit (:class:`psiloom.loop.Visit`: state, step, outputs, history).
            progress_bar: show a :class:`psiloom.loop.ProgressBar` (needs tqdm) instead of the
                printed lines where the output is a terminal or a notebook; elsewhere (a log
                file, CI) the bar is off and ``progress`` prints lines as usual.
        Returns:
            ``(state, history)``; history rows are 1-based (``step`` = the state's step after
            the update, as in the progress lines).
        """
        n_steps = nonnegative_int("n_steps", n_steps)
        checkpoint_every = positive_int("checkpoint_every", checkpoint_every)
        print_every = positive_int("print_every", print_every)
        profile_every = nonnegative_int("profile_every", profile_every)
        progress_bar = boolean("progress_bar", progress_bar)
        steps_per_visit = print_every if steps_per_visit is None else positive_int("steps_per_visit", steps_per_visit)
        _check_checkpoint_path(checkpoint)
        if callback is not None and not callable(callback):
            raise ValueError(f"callback must be callable, got {callback!r}")
        user_hooks = [as_hook(h) for h in hooks]
        writer = None
        if checkpoint:
            writer = Checkpointer(os.fspath(checkpoint), checkpoint_every, self.meta())
            writer.lock.acquire()  # a second writer of the path is refused before any compute
        try:
            if state is None:
                state = self.init(jax.random.PRNGKey(0) if key is None else key)
            else:
                if history is not None:
                    history.truncate(int(state.step))
                self.check_resumable(state, history)
                state = self.place(state)  # e.g. a checkpoint written with another device count
        except BaseException:
            if writer is not None:
                writer.lock.release()
            raise
        history = History() if history is None else history
        history.truncate(int(state.step))
        all_hooks: list[Hook] = []
        if profile_every:
            all_hooks.append(Profiler(lambda s: {k: v for k, v in self.profile_step(s, repeat=1).items()
                                                 if k in self.PHASES}, profile_every))
        bar = ProgressBar() if progress_bar and parallel.is_main_process() else None
        if bar is not None and bar.enabled:
            all_hooks.append(bar)
        elif progress and parallel.is_main_process():  # one process prints
            all_hooks.append(ProgressPrinter(None if progress is True else progress, print_every))
        if callback is not None:
            all_hooks.append(Callback(callback))
        all_hooks.extend(user_hooks)
        if writer is not None:
            all_hooks.append(writer)  # last: it saves what the other hooks saw
        self._visit_length = steps_per_visit
        return run_loop(self._advance(steps_per_visit), state, n_steps, history, all_hooks, steps_per_visit)
