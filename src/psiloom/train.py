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
"""

from __future__ import annotations

import json
import os
import pickle
import sys
import tempfile
import time
from dataclasses import dataclass, field
from typing import Any, Callable, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import optax

from psiloom import stats
from psiloom.optimize.clipping import clip_local_energies
from psiloom.optimize.flatten import tree_norm
from psiloom.optimize.gradient import SampleGeometry, energy_gradient
from psiloom.sampling.metropolis import ChainState
from psiloom.states.base import check_input_size, count_real_parameters
from psiloom.states.bound import BoundState


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

    def append(self, step: int, out: StepOutput, seconds: float) -> None:
        e = out.energy
        row = {
            "step": step, "energy": float(np.real(e.mean)), "error": float(e.error),
            "variance": float(e.variance), "tau": float(e.tau), "rhat": float(e.rhat),
            "acceptance": float(out.acceptance), "grad_norm": float(out.grad_norm), "seconds": seconds,
        }
        for k, v in row.items():
            self.columns[k].append(v)

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
    """Write ``state`` (and history) atomically: a crash mid-write leaves the old file intact."""
    host = jax.tree_util.tree_map(np.asarray, state)
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
    """

    def __init__(self, model, hamiltonian, sampler, optimizer: optax.GradientTransformation,
                 n_samples: int = 1024, chunk: int | None = None, energy_clip: float | None = None):
        if isinstance(n_samples, bool) or not isinstance(n_samples, (int, np.integer)) or n_samples < 1:
            raise ValueError(f"n_samples must be a positive integer, got {n_samples!r}")
        if n_samples % sampler.n_chains:
            raise ValueError(f"n_samples={n_samples} is not a multiple of the sampler's n_chains={sampler.n_chains}")
        h_sites, s_sites = getattr(hamiltonian, "n_sites", None), getattr(sampler.space, "n_sites", None)
        if h_sites is not None and s_sites is not None and h_sites != s_sites:
            raise ValueError(f"Hamiltonian acts on {h_sites} sites, the space has {s_sites}")
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
        self._step = jax.jit(self._step_impl)
        self._eval = jax.jit(self._evaluate_impl, static_argnums=(2,))

    # ---------------------------------------------------------------- pure pieces
    def init(self, key: jax.Array, params=None) -> TrainState:
        """Fresh state: parameters (initialised unless given), optimiser state and chains."""
        k_param, k_chain, k_run = jax.random.split(key, 3)
        space = self.sampler.space
        if params is None:
            params = self.model.init(k_param, space.random(k_param, 1))
        check_input_size(self.model, params, space)
        log_amp = BoundState(self.model, params)  # callable as log_amp(x); samplers may read the model
        chains = self.sampler.init(k_chain, log_amp)
        return TrainState(jnp.zeros((), jnp.int32), params, self.optimizer.init(params), chains, k_run)

    def n_parameters(self, state: TrainState) -> int:
        return count_real_parameters(state.params)

    def _sample(self, key, params, chains, n_per_chain):
        log_amp = BoundState(self.model, params)  # callable as log_amp(x); samplers may read the model
        chains = self.sampler.refresh(chains, log_amp)
        xs, logs, chains, acc = self.sampler.sample(key, chains, log_amp, n_per_chain)
        x = xs.reshape(-1, *xs.shape[2:])  # time-major leading sample axis
        e_loc = self.hamiltonian.local_energy(log_amp, x, logs.reshape(-1), chunk=self.chunk)
        return x, e_loc, chains, acc

    def _step_impl(self, state: TrainState):
        key, k_sample = jax.random.split(state.key)
        x, e_loc, chains, acc = self._sample(k_sample, state.params, state.chains, self.n_per_chain)
        estimate = stats.estimate(e_loc.reshape(self.n_per_chain, -1))
        if self.energy_clip is not None:
            e_loc = clip_local_energies(e_loc, self.energy_clip)
        _, grad = energy_gradient(self.model.apply, state.params, x, e_loc)
        geometry = SampleGeometry(self.model.apply, state.params, x, e_loc, chunk=self.chunk)
        updates, opt_state = self.optimizer.update(grad, state.opt_state, state.params, geometry=geometry)
        params = optax.apply_updates(state.params, updates)
        new = TrainState(state.step + 1, params, opt_state, chains, key)
        return new, StepOutput(estimate, acc, tree_norm(grad))

    def step(self, state: TrainState) -> tuple[TrainState, StepOutput]:
        """One compiled optimisation step."""
        return self._step(state)

    def _evaluate_impl(self, params, chains_key, n_per_chain):
        chains, key = chains_key
        _, e_loc, chains, acc = self._sample(key, params, chains, n_per_chain)
        return stats.estimate(e_loc.reshape(n_per_chain, -1)), acc, chains

    def evaluate(self, state: TrainState, n_samples: int, key: jax.Array | None = None, burn_in_sweeps: int = 0):
        """A separate, longer evaluation pass at fixed parameters.

        Returns ``(Estimate, acceptance)``: the energy with its autocorrelation-corrected error
        (τ from the chains, Sokal windowing) and R̂ across chains.
        """
        if isinstance(n_samples, bool) or not isinstance(n_samples, (int, np.integer)) or n_samples < 1:
            raise ValueError(f"n_samples must be a positive integer, got {n_samples!r}")
        n_chains = self.sampler.n_chains
        n_per_chain = max(1, -(-int(n_samples) // n_chains))
        key = jax.random.fold_in(state.key, 7) if key is None else key
        chains = state.chains
        if burn_in_sweeps:
            k_burn, key = jax.random.split(key)
            _, _, chains = self._eval(state.params, (chains, k_burn), int(burn_in_sweeps))
        est, acc, _ = self._eval(state.params, (chains, key), n_per_chain)
        return est, float(acc)

    # ---------------------------------------------------------------- outer loop
    def run(self, n_steps: int, state: TrainState | None = None, key: jax.Array | None = None,
            history: History | None = None, checkpoint: str | None = None, checkpoint_every: int = 50,
            progress: bool | Callable[[str], None] = True, print_every: int = 10,
            callback: Callable[[TrainState, StepOutput], None] | None = None):
        """Run until ``state.step == n_steps`` (so a resumed run continues to the same total).

        Args:
            n_steps: total number of steps (counting those already in ``state``).
            state: state to continue from; default ``self.init(key)``.
            checkpoint: path to write the state and history every ``checkpoint_every`` steps
                and at the end (atomic writes; never after a non-finite step).
            progress: True prints to stdout, a callable receives each progress line.
        Returns:
            ``(state, history)``.
        """
        if isinstance(n_steps, bool) or not isinstance(n_steps, (int, np.integer)) or n_steps < 0:
            raise ValueError(f"n_steps must be a non-negative integer, got {n_steps!r}")
        if state is None:
            state = self.init(jax.random.PRNGKey(0) if key is None else key)
        history = History() if history is None else history
        history.truncate(int(state.step))
        emit = (lambda s: print(s, flush=True)) if progress is True else (progress or None)
        step = int(state.step)
        last = time.perf_counter()
        while step < n_steps:
            new_state, out = self._step(state)
            energy = float(np.real(out.energy.mean))
            if not np.isfinite(energy) or not np.isfinite(float(out.energy.error)):
                raise NonFiniteError(step, "energy")
            if not np.isfinite(float(out.grad_norm)):
                raise NonFiniteError(step, "gradient")
            now = time.perf_counter()
            history.append(step, out, now - last)
            last = now
            state, step = new_state, step + 1
            if callback is not None:
                callback(state, out)
            if emit and (step % print_every == 0 or step == n_steps or step == 1):
                emit(_format_progress(step, n_steps, out, history["seconds"][-1]))
            if checkpoint and (step % checkpoint_every == 0 or step == n_steps):
                save_checkpoint(checkpoint, state, history)
        return state, history
