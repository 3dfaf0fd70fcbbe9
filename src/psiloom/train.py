"""The training loop: a jit-compiled VMC step and an outer loop with history and checkpoints.

One step follows the data flow of the library:

    chains ──sample──▶ x ──log ψ──▶ E_loc(x) ──stats──▶ E ± σ
                                        └──▶ ∇E (covariance form) ──preconditioner──▶ update

All of it is a single pure function ``step(state) -> (state, StepOutput)`` compiled once;
the Python loop in :meth:`GroundStateSearch.run` only calls it, prints progress, records
history and writes checkpoints. A :class:`TrainState` holds everything needed to continue a
run bit-identically: step count, parameters, optimiser state, chain state and PRNG key.

Non-finite energies or gradients stop the run with :class:`NonFiniteError` naming the step;
the state that produced them is discarded and the last checkpoint is left untouched.

The step is composed of four phases — sampling, local energy, gradient, solve — written as
separate methods. :meth:`GroundStateSearch.profile_step` compiles each phase on its own and
times it with ``block_until_ready`` (the fused step is one XLA program and cannot be split
from inside); ``run(..., profile_every=k)`` records that breakdown in the history.
Trial states with fast updates (:mod:`psiloom.states.fast`, e.g. the RBM) use them in the
sampler and the local energy unless ``fast=False``.
"""

from __future__ import annotations

import json
import os
import pickle
import tempfile
import time
from dataclasses import dataclass, field
from typing import Any, Callable, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import optax

from psiloom import parallel, stats
from psiloom.optimize.clipping import clip_local_energies
from psiloom.optimize.flatten import tree_norm
from psiloom.optimize.gradient import SampleGeometry, energy_gradient
from psiloom.sampling.metropolis import ChainState
from psiloom.states.base import check_input_size, count_real_parameters
from psiloom.states.bound import BoundState
from psiloom.states.fast import BoundAmplitude


class NonFiniteError(FloatingPointError):
    """Raised when the energy or gradient of a step is NaN or infinite."""

    def __init__(self, step: int, what: str):
        super().__init__(f"non-finite {what} at step {step}; run stopped, last checkpoint kept")
        self.step = step
        self.what = what


class TrainState(NamedTuple):
    step: jax.Array
    params: Any
    opt_state: Any
    chains: ChainState
    key: jax.Array


class StepOutput(NamedTuple):
    energy: stats.Estimate
    acceptance: jax.Array
    grad_norm: jax.Array


@dataclass
class History:
    """Per-step record of a run; ``save`` writes JSON (one object of equal-length lists)."""

    columns: dict[str, list] = field(default_factory=lambda: {
        k: [] for k in ("step", "energy", "error", "variance", "tau", "rhat", "acceptance", "grad_norm", "seconds")
    })

    def append(self, step: int, out: StepOutput, seconds: float, extra: dict[str, float] | None = None) -> None:
        """Add one row; ``extra`` columns (e.g. the ``t_*`` phase timings) are created on first
        use and hold NaN in rows that lack them."""
        e = out.energy
        row = {
            "step": step, "energy": float(np.real(e.mean)), "error": float(e.error),
            "variance": float(e.variance), "tau": float(e.tau), "rhat": float(e.rhat),
            "acceptance": float(out.acceptance), "grad_norm": float(out.grad_norm), "seconds": seconds,
        }
        row.update(extra or {})
        n = len(self)
        for k in row:
            if k not in self.columns:
                self.columns[k] = [float("nan")] * n
        for k, column in self.columns.items():
            column.append(row.get(k, float("nan")))

    def __len__(self) -> int:
        return len(self.columns["step"])

    def __getitem__(self, name: str) -> np.ndarray:
        return np.asarray(self.columns[name])

    def truncate(self, n_steps: int) -> None:
        keep = [i for i, s in enumerate(self.columns["step"]) if s < n_steps]
        self.columns = {k: [v[i] for i in keep] for k, v in self.columns.items()}

    def save(self, path: str) -> None:
        _atomic_write(path, json.dumps(self.columns).encode())

    @classmethod
    def load(cls, path: str) -> "History":
        with open(path) as f:
            return cls(json.load(f))


def _atomic_write(path: str, payload: bytes) -> None:
    directory = os.path.dirname(os.path.abspath(path))
    os.makedirs(directory, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=directory, prefix=".tmp-")
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(payload)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


CHECKPOINT_VERSION = 1


def save_checkpoint(path: str, state: TrainState, history: History | None = None) -> None:
    """Write ``state`` (and history) atomically: a crash mid-write leaves the old file intact.

    With several processes call it in all of them: the state is gathered to host arrays
    (:func:`psiloom.parallel.to_host`, a collective) and process 0 alone writes, so the file holds
    whole arrays and can be resumed with any number of processes or devices."""
    host = parallel.to_host(state)  # parallel: gather sharded / multi-process arrays
    if not parallel.is_main_process():  # parallel: process 0 writes
        return
    payload = {"version": CHECKPOINT_VERSION, "state": host, "history": None if history is None else history.columns}
    _atomic_write(path, pickle.dumps(payload))


def load_checkpoint(path: str) -> tuple[TrainState, History]:
    """Read a checkpoint written by :func:`save_checkpoint`."""
    with open(path, "rb") as f:
        payload = pickle.load(f)
    if payload.get("version") != CHECKPOINT_VERSION:
        raise ValueError(f"checkpoint {path!r} has version {payload.get('version')!r}, expected {CHECKPOINT_VERSION}")
    state = jax.tree_util.tree_map(jnp.asarray, payload["state"])
    history = History(payload["history"]) if payload["history"] is not None else History()
    return state, history


def _format_progress(step: int, total: int, out: StepOutput, sec: float) -> str:
    e = out.energy
    return (f"step {step:>5d}/{total}  E = {float(np.real(e.mean)):+.6f} ± {float(e.error):.6f}"
            f"  var {float(e.variance):.4g}  acc {float(out.acceptance):.3f}  {sec * 1e3:.1f} ms/step")


class GroundStateSearch:
    """Variational ground-state search: sampler + trial state + Hamiltonian + optimiser.

    Args:
        model: a trial state (Flax module; ``model.apply(variables, x) -> log ψ``).
        hamiltonian: anything with ``local_energy(log_amplitude, x, log_amp_x, chunk)``
            (a :class:`~psiloom.operators.PauliSum` for lattices).
        sampler: e.g. :class:`psiloom.sampling.MetropolisSampler`; its ``n_chains`` must
            divide ``n_samples``.
        optimizer: an optax transformation; transformations that accept the extra keyword
            ``geometry`` (stochastic reconfiguration) receive the sample geometry.
        n_samples: samples per step (``n_samples / n_chains`` stored per chain).
        chunk: evaluate local energies and log-derivatives in chunks of this many samples.
        energy_clip: if set, the width k of local-energy clipping around the median
            (:func:`psiloom.optimize.clip_local_energies`) applied to the values feeding the
            gradient and the SR geometry; the reported energy estimate stays unclipped.
        fast: use the trial state's fast amplitude updates (if it has them) in sampling and
            local energies; ``False`` forces full re-evaluation (same results, slower).
        mesh: optional :func:`psiloom.parallel.sample_mesh`: spread the chains over its devices
            (and processes). ``n_chains`` must be divisible by the device count; the chain state is
            sharded along its leading axis, parameters, optimiser state and key replicated, and the
            same seed gives the same run on any number of devices (:mod:`psiloom.parallel`).
            Progress is printed and checkpoints are written by process 0 only.
    """

    def __init__(self, model, hamiltonian, sampler, optimizer: optax.GradientTransformation,
                 n_samples: int = 1024, chunk: int | None = None, energy_clip: float | None = None,
                 fast: bool = True, mesh=None):
        if isinstance(n_samples, bool) or not isinstance(n_samples, (int, np.integer)) or n_samples < 1:
            raise ValueError(f"n_samples must be a positive integer, got {n_samples!r}")
        if n_samples % sampler.n_chains:
            raise ValueError(f"n_samples={n_samples} is not a multiple of the sampler's n_chains={sampler.n_chains}")
        h_sites, s_sites = getattr(hamiltonian, "n_sites", None), getattr(sampler.space, "n_sites", None)
        if h_sites is not None and s_sites is not None and h_sites != s_sites:
            raise ValueError(f"Hamiltonian acts on {h_sites} sites, the space has {s_sites}")
        if mesh is not None:  # parallel: chains split evenly over the devices
            parallel.check_divisible("n_chains", sampler.n_chains, mesh)
        self.mesh = mesh
        self.model = model
        self.hamiltonian = hamiltonian
        self.sampler = sampler
        self.optimizer = optax.with_extra_args_support(optimizer)
        self.n_samples = int(n_samples)
        self.n_per_chain = self.n_samples // sampler.n_chains
        self.chunk = chunk
        if energy_clip is not None:
            clip_local_energies(jnp.zeros(1), energy_clip)  # validates the width (ValueError)
        self.energy_clip = energy_clip
        self.fast = bool(fast)
        self._phases = None  # separately compiled phases, built by profile_step on first use
        self._step = jax.jit(self._step_impl)
        self._eval = jax.jit(self._evaluate_impl, static_argnums=(2,))

    # ---------------------------------------------------------------- pure pieces
    def init(self, key: jax.Array, params=None) -> TrainState:
        """Fresh state: parameters (initialised unless given), optimiser state and chains."""
        k_param, k_chain, k_run = jax.random.split(key, 3)
        space = self.sampler.space
        if params is None:
            # compiled: op-by-op initialisation of deep modules is many times slower
            params = jax.jit(self.model.init)(k_param, space.random(k_param, 1))
        check_input_size(self.model, params, space)
        chains = self.sampler.init(k_chain, self._bind(params))
        return self.place(TrainState(jnp.zeros((), jnp.int32), params, self.optimizer.init(params), chains, k_run))

    def place(self, state: TrainState) -> TrainState:
        """``state`` placed on the mesh (parallel): chains sharded, everything else replicated; no-op
        without a mesh. Applied by :meth:`init` and by :meth:`run` to a state it is given."""
        if self.mesh is None:
            return state
        step, params, opt_state, key = parallel.replicate((state.step, state.params, state.opt_state, state.key),
                                                          self.mesh)
        return TrainState(step, params, opt_state, parallel.place_chains(state.chains, self.mesh,
                                                                         self.sampler.n_chains), key)

    def _constrain(self, state: TrainState, *outputs):
        """Inside jit (parallel): keep the state's placement; other outputs replicated."""
        if self.mesh is None:
            return (state, *outputs)
        rest = parallel.constrain_replicated((state.step, state.params, state.opt_state, state.key, outputs),
                                             self.mesh)
        chains = parallel.constrain_chains(state.chains, self.mesh, self.sampler.n_chains)
        return (TrainState(*rest[:3], chains, rest[3]), *rest[4])

    def n_parameters(self, state: TrainState) -> int:
        return count_real_parameters(state.params)

    def _bind(self, params) -> BoundState:
        """``log ψ`` at ``params`` as a callable that still knows its model (samplers may read
        it; fast-update paths use it unless ``fast=False``)."""
        return BoundAmplitude(self.model, params, fast=self.fast)

    # The four phases of a step (composed by _step_impl, timed one by one by profile_step).
    def _sampling_phase(self, key, params, chains, n_per_chain):
        log_amp = self._bind(params)
        chains = self.sampler.refresh(chains, log_amp)
        xs, logs, chains, acc = self.sampler.sample(key, chains, log_amp, n_per_chain)
        x = xs.reshape(-1, *xs.shape[2:])  # time-major leading sample axis
        return x, logs.reshape(-1), chains, acc

    def _local_energy_phase(self, params, x, logs):
        return self.hamiltonian.local_energy(self._bind(params), x, logs, chunk=self.chunk)

    def _gradient_phase(self, params, x, e_loc):
        estimate = stats.estimate(e_loc.reshape(self.n_per_chain, -1))
        if self.energy_clip is not None:
            e_loc = clip_local_energies(e_loc, self.energy_clip)
        _, grad = energy_gradient(self.model.apply, params, x, e_loc)
        return estimate, grad, e_loc

    def _solve_phase(self, params, opt_state, grad, x, e_loc):
        geometry = SampleGeometry(self.model.apply, params, x, e_loc, chunk=self.chunk)
        updates, opt_state = self.optimizer.update(grad, opt_state, params, geometry=geometry)
        return optax.apply_updates(params, updates), opt_state

    def _sample(self, key, params, chains, n_per_chain):
        x, logs, chains, acc = self._sampling_phase(key, params, chains, n_per_chain)
        e_loc = self._local_energy_phase(params, x, logs)
        return x, e_loc, chains, acc

    def _step_impl(self, state: TrainState):
        key, k_sample = jax.random.split(state.key)
        x, e_loc, chains, acc = self._sample(k_sample, state.params, state.chains, self.n_per_chain)
        estimate, grad, e_loc = self._gradient_phase(state.params, x, e_loc)
        params, opt_state = self._solve_phase(state.params, state.opt_state, grad, x, e_loc)
        new = TrainState(state.step + 1, params, opt_state, chains, key)
        return self._constrain(new, StepOutput(estimate, acc, tree_norm(grad)))

    def step(self, state: TrainState) -> tuple[TrainState, StepOutput]:
        """One compiled optimisation step."""
        with parallel.mesh_context(self.mesh):  # parallel: traces see the mesh (per-device callbacks)
            return self._step(state)

    PHASES = ("sampling", "local_energy", "gradient", "solve")

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
        if isinstance(repeat, bool) or not isinstance(repeat, (int, np.integer)) or repeat < 1:
            raise ValueError(f"repeat must be a positive integer, got {repeat!r}")
        with parallel.mesh_context(self.mesh):  # parallel: traces see the mesh (per-device callbacks)
            return self._profile_phases(state, int(repeat))

    def _profile_phases(self, state: TrainState, repeat: int) -> dict[str, float]:
        if self._phases is None:
            self._phases = (
                jax.jit(self._sampling_phase, static_argnums=(3,)),
                jax.jit(self._local_energy_phase),
                jax.jit(self._gradient_phase),
                jax.jit(self._solve_phase),
            )
        sampling, local_energy, gradient, solve = self._phases
        _, k_sample = jax.random.split(state.key)
        calls = {
            "sampling": lambda: sampling(k_sample, state.params, state.chains, self.n_per_chain),
        }
        x, logs, _, _ = jax.block_until_ready(calls["sampling"]())
        calls["local_energy"] = lambda: local_energy(state.params, x, logs)
        e_loc = jax.block_until_ready(calls["local_energy"]())
        calls["gradient"] = lambda: gradient(state.params, x, e_loc)
        _, grad, e_used = jax.block_until_ready(calls["gradient"]())
        calls["solve"] = lambda: solve(state.params, state.opt_state, grad, x, e_used)
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

    def _evaluate_impl(self, params, chains_key, n_per_chain):
        chains, key = chains_key
        _, e_loc, chains, acc = self._sample(key, params, chains, n_per_chain)
        chains = parallel.constrain_chains(chains, self.mesh, self.sampler.n_chains)  # parallel
        est, acc = parallel.constrain_replicated((stats.estimate(e_loc.reshape(n_per_chain, -1)), acc), self.mesh)
        return est, acc, chains

    def evaluate(self, state: TrainState, n_samples: int, key: jax.Array | None = None, burn_in_sweeps: int = 0,
                 starts=None):
        """A separate, longer evaluation pass at fixed parameters.

        Returns ``(Estimate, acceptance)``: the energy with its autocorrelation-corrected error
        (τ from the chains, Sokal windowing) and R̂ across chains.

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
        if isinstance(n_samples, bool) or not isinstance(n_samples, (int, np.integer)) or n_samples < 1:
            raise ValueError(f"n_samples must be a positive integer, got {n_samples!r}")
        n_chains = self.sampler.n_chains
        n_per_chain = max(1, -(-int(n_samples) // n_chains))
        key = jax.random.fold_in(state.key, 7) if key is None else key
        chains = state.chains
        if starts is not None:
            chains = chains._replace(x=self._with_starts(chains.x, starts))
        with parallel.mesh_context(self.mesh):  # parallel: traces see the mesh (per-device callbacks)
            if burn_in_sweeps:
                k_burn, key = jax.random.split(key)
                _, _, chains = self._eval(state.params, (chains, k_burn), int(burn_in_sweeps))
            est, acc, _ = self._eval(state.params, (chains, key), n_per_chain)
        return est, float(acc)

    def _with_starts(self, x, starts):
        """``x`` with its first rows replaced by the validated ``starts`` (see :meth:`evaluate`)."""
        space = self.sampler.space
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

    # ---------------------------------------------------------------- outer loop
    def run(self, n_steps: int, state: TrainState | None = None, key: jax.Array | None = None,
            history: History | None = None, checkpoint: str | None = None, checkpoint_every: int = 50,
            progress: bool | Callable[[str], None] = True, print_every: int = 10,
            callback: Callable[[TrainState, StepOutput], None] | None = None, profile_every: int = 0):
        """Run until ``state.step == n_steps`` (so a resumed run continues to the same total).

        Args:
            n_steps: total number of steps (counting those already in ``state``).
            state: state to continue from; default ``self.init(key)``.
            checkpoint: path to write the state and history every ``checkpoint_every`` steps
                and at the end (atomic writes; never after a non-finite step).
            progress: True prints to stdout, a callable receives each progress line.
            profile_every: if > 0, every that many steps (and at the first) time the phases of
                the step with :meth:`profile_step` (``repeat=1``) before taking it, and record
                them as history columns ``t_sampling``, ``t_local_energy``, ``t_gradient``,
                ``t_solve`` (NaN in other rows). Costs one extra compilation per phase.
        Returns:
            ``(state, history)``.
        """
        if isinstance(n_steps, bool) or not isinstance(n_steps, (int, np.integer)) or n_steps < 0:
            raise ValueError(f"n_steps must be a non-negative integer, got {n_steps!r}")
        if isinstance(profile_every, bool) or not isinstance(profile_every, (int, np.integer)) or profile_every < 0:
            raise ValueError(f"profile_every must be a non-negative integer, got {profile_every!r}")
        if state is None:
            state = self.init(jax.random.PRNGKey(0) if key is None else key)
        else:
            state = self.place(state)  # parallel: e.g. a checkpoint written with another device count
        history = History() if history is None else history
        history.truncate(int(state.step))
        emit = (lambda s: print(s, flush=True)) if progress is True else (progress or None)
        emit = emit if parallel.is_main_process() else None  # parallel: process 0 prints
        step = first = int(state.step)
        last = time.perf_counter()
        while step < n_steps:
            timing = None
            if profile_every and (step % profile_every == 0 or step == first):
                phases = self.profile_step(state, repeat=1)
                timing = {f"t_{name}": phases[name] for name in self.PHASES}
                last = time.perf_counter()  # profiling time is not step time
            new_state, out = self.step(state)
            energy = float(np.real(out.energy.mean))
            if not np.isfinite(energy) or not np.isfinite(float(out.energy.error)):
                raise NonFiniteError(step, "energy")
            if not np.isfinite(float(out.grad_norm)):
                raise NonFiniteError(step, "gradient")
            now = time.perf_counter()
            history.append(step, out, now - last, timing)
            last = now
            state, step = new_state, step + 1
            if callback is not None:
                callback(state, out)
            if emit and (step % print_every == 0 or step == n_steps or step == 1):
                emit(_format_progress(step, n_steps, out, history["seconds"][-1]))
            if checkpoint and (step % checkpoint_every == 0 or step == n_steps):
                save_checkpoint(checkpoint, state, history)
        return state, history
