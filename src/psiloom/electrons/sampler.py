"""Metropolis sampling of |ψ(x)|² for electrons in R^{3N}.

Proposals are symmetric Gaussian displacements (bohr):

    all-electron move:   x' = x + σ ξ,          ξ ~ N(0, 1)^{N×3}
    one-electron move:   r_i' = r_i + σ ξ_i      (electron i; the others stay)

accepted with probability min(1, |ψ(x')/ψ(x)|²) = min(1, exp(2 [log|ψ(x')| − log|ψ(x)|])) by
the acceptance step every psiloom sampler shares (:func:`psiloom.sampling.base.metropolis_accept`);
burn-in and collection run through :func:`psiloom.sampling.base.burn_in_and_collect`.

The step size σ is part of the chain state. During burn-in sweeps it is adapted toward a
target acceptance rate (default 0.5, common practice) by σ ← σ · exp(a − a*), a the acceptance
of the last sweep; it is held fixed while samples are stored, so stored samples come from a
fixed Metropolis kernel.

:class:`ElectronSampler` offers the interface that :class:`psiloom.train.GroundStateSearch`
expects (``space``, ``n_chains``, ``init``, ``refresh``, ``sample``). Walkers start around the
nuclei, shared out by nuclear charge (:meth:`psiloom.electrons.Molecule.random`), and are
equilibrated with adaptation by ``init``. Samples come out as ``(n_per_chain, n_chains, N, 3)``.
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import nonnegative_int, positive_int, positive_real, probability
from psiloom.electrons.system import Molecule
from psiloom.reduce import sample_mean
from psiloom.sampling import base
from psiloom.sampling.base import burn_in_and_collect, scan_sweeps
from psiloom.states.bound import BoundState

LogAmplitudeFn = Callable[[jax.Array], jax.Array]
MOVES = ("all", "one")


class WalkerState(NamedTuple):
    """Walkers of :class:`ElectronSampler`: configurations (bohr), log|ψ| there, per-walker step sizes."""
    x: jax.Array  # (n_chains, N, 3) current configurations (bohr)
    log_amp: jax.Array  # (n_chains,) log|ψ| at x
    step_size: jax.Array  # () Gaussian proposal width σ (bohr)


class StepInfo(NamedTuple):
    """What one all-electron Metropolis step of the walkers did."""
    accepted: jax.Array  # (n_chains,) bool
    log_ratio: jax.Array  # (n_chains,) 2 [log|ψ(x')| − log|ψ(x)|]


def metropolis_update(key, state: WalkerState, log_amplitude: LogAmplitudeFn, electron=None):
    """One Gaussian proposal per chain (all electrons, or only ``electron`` if given)."""
    k_prop, k_acc = jax.random.split(key)
    noise = state.step_size * jax.random.normal(k_prop, state.x.shape, state.x.dtype)
    if electron is not None:
        mask = (jnp.arange(state.x.shape[1]) == electron).astype(state.x.dtype)
        noise = noise * mask[None, :, None]
    x_new = state.x + noise
    log_new = log_amplitude(x_new)
    log_ratio = 2.0 * jnp.real(log_new - state.log_amp)
    u = jax.random.uniform(k_acc, log_ratio.shape, dtype=log_ratio.dtype)
    (x, log_amp), accept = base.metropolis_accept(jnp.log(u), log_ratio, (x_new, log_new), (state.x, state.log_amp))
    return WalkerState(x, log_amp, state.step_size), StepInfo(accept, log_ratio)


class ElectronSampler:
    """Metropolis walkers for an electronic system (see module docstring).

    Args:
        system: the molecule (also the sampler's ``space``: it draws starting walkers).
        n_chains: number of walkers moved in parallel.
        move: ``"all"`` (all-electron Gaussian moves) or ``"one"`` (one electron at a time,
            cycling through the electrons).
        step_size: initial proposal width σ in bohr.
        sweep: proposals between stored samples (default 10 for ``"all"``, 2N for ``"one"``).
        burn_in: sweeps (with step-size adaptation) at the start of every :meth:`sample` call.
        equilibrate: sweeps (with adaptation) run by :meth:`init` from the initial placement.
        target_acceptance: acceptance rate the step size is adapted toward.
        init_width: spread (bohr) of the initial walkers around their nuclei.
    """

    def __init__(self, system: Molecule, n_chains: int = 64, move: str = "all", step_size: float = 0.3,
                 sweep: int | None = None, burn_in: int = 5, equilibrate: int = 100,
                 target_acceptance: float = 0.5, init_width: float = 1.0):
        if not isinstance(system, Molecule):
            raise ValueError(f"system must be a psiloom.electrons.Molecule, got {type(system).__name__}")
        if move not in MOVES:
            raise ValueError(f"unknown move {move!r}; available: {', '.join(MOVES)}")
        step_size = positive_real("step_size (bohr)", step_size)
        target_acceptance = probability("target_acceptance", target_acceptance)
        init_width = positive_real("init_width (bohr)", init_width)
        self.system = system
        self.space = system
        self.n_chains = positive_int("n_chains", n_chains)
        self.move = move
        self.step_size = float(step_size)
        n = system.n_electrons
        default_sweep = 10 if move == "all" else 2 * n
        self.sweep = default_sweep if sweep is None else positive_int("sweep", sweep)
        self.burn_in = nonnegative_int("burn_in", burn_in)
        self.equilibrate = nonnegative_int("equilibrate", equilibrate)
        self.target_acceptance = float(target_acceptance)
        self.init_width = float(init_width)

    # ------------------------------------------------------------------ kernels
    def step(self, key, state: WalkerState, log_amplitude: LogAmplitudeFn, electron=None):
        """One proposal per chain: ``(state, StepInfo)``."""
        return metropolis_update(key, state, log_amplitude, electron)

    def _sweep(self, key, state, log_amplitude):
        n = self.system.n_electrons

        def body(carry, inputs):
            st, acc = carry
            k, i = inputs
            electron = (i % n) if self.move == "one" else None
            st, info = metropolis_update(k, st, log_amplitude, electron)
            return (st, acc + sample_mean(info.accepted.astype(st.x.dtype))), None

        keys = jax.random.split(key, self.sweep)
        (state, acc), _ = jax.lax.scan(body, (state, jnp.zeros((), state.x.dtype)), (keys, jnp.arange(self.sweep)))
        return state, acc / self.sweep

    def _adaptive_sweep(self, log_amplitude):
        """``sweep(key, state, index)``: one sweep, then σ ← σ · exp(a − a*) from its acceptance a
        (clipped to [1e-3, 10] bohr)."""
        def sweep(key, state, index=None):
            st, acc = self._sweep(key, state, log_amplitude)
            sigma = jnp.clip(st.step_size * jnp.exp(acc - self.target_acceptance), 1e-3, 10.0)
            return WalkerState(st.x, st.log_amp, sigma), acc

        return sweep

    # ------------------------------------------------------------------ interface
    def init(self, key: jax.Array, log_amplitude: LogAmplitudeFn) -> WalkerState:
        """Walkers around the nuclei, equilibrated for ``equilibrate`` adaptive sweeps.

        A :class:`~psiloom.states.BoundState` ``log_amplitude`` enters one compiled program as an
        argument; a plain function runs eagerly (its sweeps still run as one compiled loop, into
        which the arrays it closes over pass as operands), as in
        :meth:`psiloom.sampling.MetropolisChains.init`. A plain function compiled whole would make
        its arrays captured constants of the program, which is how LiH's trained parameters gave
        all-NaN walkers in about half the compilations (DEVELOPERS.md, "Two draws of one LiH
        config, and captured constants").

        Raises:
            ValueError: (outside a trace) when a walker's log|ψ| is not finite after equilibration.
        """
        if isinstance(log_amplitude, BoundState):
            state = jax.jit(self._start)(key, log_amplitude)
        else:
            state = self._start(key, log_amplitude)
        if not isinstance(state.log_amp, jax.core.Tracer):  # inside a trace the loop's guard checks
            bad = np.flatnonzero(~np.isfinite(np.asarray(state.log_amp)))  # one transfer to the host
            if bad.size:
                raise ValueError(f"ElectronSampler.init: {bad.size} of {self.n_chains} walkers have a non-finite "
                                 f"log|psi| after equilibration (first: walker {bad[0]}); check the trial state "
                                 f"and its parameters")
        return state

    def _start(self, key: jax.Array, log_amplitude: LogAmplitudeFn) -> WalkerState:
        k_pos, k_eq = jax.random.split(key)
        x = self.system.random(k_pos, self.n_chains, self.init_width)
        state = WalkerState(x, log_amplitude(x), jnp.asarray(self.step_size, x.dtype))
        if self.equilibrate:
            state, _ = scan_sweeps(self._adaptive_sweep(log_amplitude), state,
                                   jax.random.split(k_eq, self.equilibrate))
        return state

    def refresh(self, state: WalkerState, log_amplitude: LogAmplitudeFn) -> WalkerState:
        """Recompute the cached log|ψ| after a parameter update."""
        return WalkerState(state.x, log_amplitude(state.x), state.step_size)

    def sample(self, key: jax.Array, state: WalkerState, log_amplitude: LogAmplitudeFn, n_per_chain: int):
        """Adaptive burn-in, then ``n_per_chain`` samples per chain one sweep apart.

        Returns ``(samples (T, C, N, 3), log_amps (T, C), state, acceptance)``, the
        acceptance averaged over the stored part.
        """
        n_per_chain = positive_int("n_per_chain", n_per_chain)
        state, (xs, logs, acc) = burn_in_and_collect(
            key, state, lambda k, st, i: self._sweep(k, st, log_amplitude), self.burn_in, n_per_chain,
            lambda st, acc: (st.x, st.log_amp, acc), burn_sweep=self._adaptive_sweep(log_amplitude))
        return xs, logs, state, sample_mean(acc)
