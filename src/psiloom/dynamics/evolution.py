"""The evolution driver: a trial state carried along real or imaginary time by the TDVP.

:class:`TimeEvolution` ties together a trial state, a Hamiltonian (any PauliSum or anything
with ``local_energy``), an estimator of the TDVP system and an integrator:

    params(t) ──samples x ~ |ψ|² (or all configurations)──▶ O(x), E_loc(x) ──▶ S, G
        ──regularised solve──▶ θ̇ ──Runge-Kutta stage──▶ … ──▶ params(t + h)

* **Estimator.** ``sampler`` is a Markov-chain sampler (Monte Carlo: ``n_samples`` per stage,
  after ``burn_in_sweeps`` sweeps from the chains of the previous stage) or a
  :class:`~psiloom.spaces.SpinSpace`, whose configurations are then all enumerated and weighted
  by |ψ|² (exact S, G and observables: a reference for small systems, no sampling noise), or a
  :class:`~psiloom.symmetry.OrbitEnumeration`: the same exact sums with one term per orbit of a
  symmetry group, weighted by the orbit's size (for a state invariant under the group, a
  Hamiltonian and observables that commute with it; the L = 16-20 rings become exact).
* **Formulation** (:mod:`psiloom.dynamics.equation`): ``holomorphic=True`` for complex
  parameters of a holomorphic log ψ (complex RBM, complex Jastrow); otherwise real parameters
  (a complex leaf is two real ones), correct for any state.
* **Time.** ``imaginary=False``: i ∂_t ψ = H ψ (ħ = 1, t in inverse units of H's energy).
  ``imaginary=True``: ∂_τ ψ = −H ψ, which lowers ⟨H⟩ towards the ground state (a ground-state
  route beside SR + optax, from the same machinery).
* **Integrator** (:mod:`psiloom.dynamics.integrators`): ``"euler"``, ``"heun"``, ``"rk4"`` with
  the step ``dt``; ``"rk23"``, ``"rk45"`` adaptive with tolerance ``tol`` on the error measured
  in the metric S (``dt`` is then the first trial step).
* **Time grid.** :meth:`TimeEvolution.run` integrates to each time of a user grid, shortening the
  step that would pass it, so observables are measured exactly there, whatever the step size.
  Each measurement draws ``n_samples`` fresh samples (after ``burn_in_sweeps``): estimates with
  autocorrelation-aware error bars (:mod:`psiloom.stats`); exact expectation values (error 0)
  with a ``SpinSpace``.
* **History.** One row per accepted integrator step (1-based ``step``): ``time``, ``dt``,
  ``energy`` (real part of ⟨H⟩ at the step's start), ``error`` (its standard error from the
  spread of the per-chain means, which includes autocorrelation; 0 when exact), ``variance``, ``residual`` (the TDVP residual r² of the first stage),
  ``acceptance``, ``rejected`` (adaptive attempts rejected before it), ``seconds``. The row of
  the step landing on a grid time (or a row of its own at the first grid time) also holds each
  observable ``name``, ``name:error`` and, for complex values, ``name:imag``.
* **Checkpoints** at every grid time (``checkpoint=path``; the format of
  :mod:`psiloom.checkpoint`): :meth:`TimeEvolution.resume` continues bit-identically.
* **Non-finite steps** raise :class:`NonFiniteEvolution` naming the time; the state returned in
  it and the checkpoint on disk are the last good ones.

Everything hot is one ``jax.jit`` program per kind (a step attempt with traced step size, a
measurement); Python only loops over steps and grid times.
"""

from __future__ import annotations

import time as _time
from typing import Any, Mapping, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from psiloom.sampling.base import place_starts
from psiloom import stats
from psiloom._validation import boolean, finite_real, nonnegative_int, positive_int, positive_real
from psiloom.batching import map_in_chunks
from psiloom.checkpoint import CheckpointLock, load_checkpoint, run_meta, save_checkpoint
from psiloom.dynamics.equation import (all_complex, flatten_parameters, log_derivatives, residual,
                                       tdvp_system)
from psiloom.dynamics.integrators import next_step_size, runge_kutta_step, tableau
from psiloom.dynamics.regularisation import DiagonalShift, PseudoInverse
from psiloom.history import History
from psiloom.operators.observables import _Stacked, _estimates, operator_scale
from psiloom.reference.evolution import check_time_grid
from psiloom.spaces import SpinSpace
from psiloom.states.bound import BoundState
from psiloom.symmetry import OrbitEnumeration
from psiloom.vmc import strong

__all__ = ["EvolutionState", "Trajectory", "TimeEvolution", "NonFiniteEvolution", "StageInfo"]


class EvolutionState(NamedTuple):
    """Everything needed to continue a trajectory: ``time``, accepted ``step`` count, ``dt``
    (the next trial step of an adaptive integrator; the fixed step otherwise), ``params``,
    ``chains`` (a placeholder scalar for exact enumeration) and the run's ``key``."""

    time: jax.Array
    step: jax.Array
    dt: jax.Array
    params: Any
    chains: Any
    key: jax.Array


class StageInfo(NamedTuple):
    """What one evaluation of the right-hand side reports (first stage of a step)."""

    metric: jax.Array
    energy: jax.Array
    energy_error: jax.Array
    variance: jax.Array
    residual: jax.Array
    acceptance: jax.Array
    rates_finite: jax.Array


class Trajectory(NamedTuple):
    """Observables on the time grid: ``times`` (n,), ``values[name]`` and ``errors[name]`` (n,)
    arrays (complex values for non-Hermitian observables), the final ``state`` and the ``history``."""

    times: np.ndarray
    values: dict
    errors: dict
    state: EvolutionState
    history: History


class NonFiniteEvolution(FloatingPointError):
    """A step produced non-finite parameters or rates. ``time`` is where the failed step started;
    ``state`` and ``history`` are the last good ones; a checkpoint on disk is left as it was."""

    def __init__(self, time: float, step: int, dt: float, state=None, history=None, checkpoint=None):
        where = f"; the last checkpoint ({checkpoint!r}) is kept as it was" if checkpoint else ""
        super().__init__(f"non-finite parameters or rates in step {step} from t = {time:.10g} (dt = {dt:.3g}); "
                         f"evolution stopped at the last good state, t = {time:.10g}{where}")
        self.time, self.step, self.dt = time, step, dt
        self.state, self.history = state, history


def _all_finite(tree) -> jax.Array:
    leaves = [jnp.all(jnp.isfinite(l)) for l in jax.tree_util.tree_leaves(tree)
              if jnp.issubdtype(jnp.result_type(l), jnp.inexact)]
    return jnp.all(jnp.stack(leaves)) if leaves else jnp.asarray(True)


def _check_observables(observables, n_sites: int) -> dict:
    if observables is None:
        return {}
    if not isinstance(observables, Mapping):
        raise TypeError(f"observables must be a mapping name -> operator, got {type(observables).__name__}")
    out = {}
    for name, op in observables.items():
        if not isinstance(name, str) or not name or ":" in name:
            raise ValueError(f"observable names must be non-empty strings without ':', got {name!r}")
        if not hasattr(op, "connections"):
            raise TypeError(f"observable {name!r} must be an operator with connections (a PauliSum), "
                            f"got {type(op).__name__}")
        n_op = getattr(op, "n_sites", None)
        if n_op is not None and n_op != n_sites:
            raise ValueError(f"observable {name!r} acts on {n_op} sites, outside the lattice of {n_sites} "
                             f"sites of this evolution")
        out[name] = op
    return out


class TimeEvolution:
    """Real- or imaginary-time evolution of a trial state by the TDVP (see the module docstring).

    Args:
        model: a trial state (Flax module, ``model.apply(params, x) -> log ψ``).
        hamiltonian: the generator of the evolution (a PauliSum or anything with
            ``local_energy`` and ``n_sites``).
        sampler: a Markov-chain sampler, or a ``SpinSpace`` (or an ``OrbitEnumeration``) for
            exact enumeration.
        n_samples: samples per stage and per measurement (Monte Carlo only; a multiple of the
            chain count is used, ``n_samples // n_chains`` per chain).
        integrator: ``"euler"``, ``"heun"``, ``"rk4"``, ``"rk23"`` or ``"rk45"``.
        dt: fixed step, or the first trial step of an adaptive integrator (> 0, finite).
        tol: error tolerance per step in the metric S (adaptive integrators only; > 0).
        regularisation: :class:`~psiloom.dynamics.DiagonalShift`, :class:`~psiloom.dynamics.PseudoInverse`
            or :class:`~psiloom.dynamics.SignalToNoise` (default: a pseudo-inverse with
            ``rcond=1e-6`` for exact enumeration, a diagonal shift 1e-3 for samples: on an L = 6
            TFIM quench with 1024 samples these followed the exact curve best, 2e-3 and 2e-2;
            the signal-to-noise cut with threshold 2 damped too much there, 8e-2).
        imaginary: imaginary instead of real time.
        holomorphic: holomorphic formulation (all parameters complex, log ψ holomorphic).
        burn_in_sweeps: sweeps discarded before each stage's samples.
        chunk: evaluate at most this many configurations at a time.
        min_dt: an adaptive step below this raises (the tolerance cannot be met).
        measure_samples: samples per measurement at a grid time (default ``n_samples``); more
            than the stages need buys smaller error bars on the observables at little cost.
    """

    def __init__(self, model, hamiltonian, sampler, n_samples: int = 1024, *, integrator: str = "rk4",
                 dt: float = 0.01, tol: float | None = None, regularisation=None, imaginary: bool = False,
                 holomorphic: bool = False, burn_in_sweeps: int = 2, chunk: int | None = None,
                 min_dt: float = 1e-10, measure_samples: int | None = None):
        self.model = model
        self.hamiltonian = hamiltonian
        if not hasattr(hamiltonian, "local_energy"):
            raise TypeError(f"hamiltonian must have local_energy (e.g. a PauliSum), got {type(hamiltonian).__name__}")
        self.exact = isinstance(sampler, (SpinSpace, OrbitEnumeration))
        self.orbits = sampler if isinstance(sampler, OrbitEnumeration) else None
        self.sampler = sampler
        self.space = sampler if self.exact else getattr(sampler, "space", None)
        if self.space is None:
            raise TypeError(f"sampler must be a sampler with a space or a SpinSpace, got {type(sampler).__name__}")
        self.n_sites = int(self.space.n_sites)
        n_h = getattr(hamiltonian, "n_sites", None)
        if n_h is not None and n_h != self.n_sites:
            raise ValueError(f"hamiltonian acts on {n_h} sites, the space has {self.n_sites}")
        self.tableau = tableau(integrator)
        self.dt = positive_real("dt", finite_real("dt", dt))
        if tol is not None:
            tol = finite_real("tol", tol)
            if tol <= 0:
                raise ValueError(f"tol must be a positive tolerance, got {tol!r}")
        if self.tableau.adaptive and tol is None:
            raise ValueError(f"integrator {self.tableau.name!r} is adaptive and needs tol= (a positive tolerance)")
        if not self.tableau.adaptive and tol is not None:
            raise ValueError(f"tol={tol!r} given, but integrator {self.tableau.name!r} has a fixed step; "
                             "use 'rk23' or 'rk45' for step-size control")
        self.tol = tol
        self.imaginary = boolean("imaginary", imaginary)
        self.holomorphic = boolean("holomorphic", holomorphic)
        self.burn_in = nonnegative_int("burn_in_sweeps", burn_in_sweeps)
        self.chunk = None if chunk is None else positive_int("chunk", chunk)
        self.min_dt = positive_real("min_dt", min_dt)
        if regularisation is None:
            regularisation = PseudoInverse(rcond=1e-6) if self.exact else DiagonalShift(1e-3)
        if not hasattr(regularisation, "solve"):
            raise TypeError("regularisation must be DiagonalShift, PseudoInverse or SignalToNoise "
                            f"(anything with solve(system)), got {regularisation!r}")
        self.regularisation = regularisation
        if self.exact:
            self.n_per_chain = 0
            self._configs = jnp.asarray(self.space.configurations())
            self._log_mult = (None if self.orbits is None
                              else jnp.asarray(np.log(self.orbits.multiplicities().astype(np.float64))))
            self._orbit_checked: set = set()
        else:
            n_samples = positive_int("n_samples", n_samples)
            if n_samples < sampler.n_chains:
                raise ValueError(f"n_samples={n_samples} is below the chain count {sampler.n_chains}")
            self.n_per_chain = n_samples // sampler.n_chains
            m = n_samples if measure_samples is None else positive_int("measure_samples", measure_samples)
            if m < sampler.n_chains:
                raise ValueError(f"measure_samples={m} is below the chain count {sampler.n_chains}")
            self.n_measure_per_chain = m // sampler.n_chains
        self._programs: dict = {}

    # ------------------------------------------------------------------ state
    def bind(self, params) -> BoundState:
        """The trial state bound to ``params`` (a callable log ψ)."""
        return BoundState(self.model, params)

    def init(self, params, key: jax.Array, time: float = 0.0, starts=None) -> EvolutionState:
        """The state at ``time`` with parameters ``params`` (e.g. a trained ground state of another
        Hamiltonian, or :func:`psiloom.dynamics.product_state_rbm`).

        ``starts``: configurations ``(k, n_sites)`` (or one configuration) for the first k chains
        instead of random ones; needed where |ψ|² is concentrated on few configurations (a
        product state near the Néel state), which chains from random starts may never reach.
        """
        time = finite_real("time", time)
        if self.holomorphic and not all_complex(params):
            raise ValueError("holomorphic=True needs complex parameters (every leaf complex); "
                             "use holomorphic=False for real or mixed parameters")
        if not self.imaginary:
            out = jax.eval_shape(self.model.apply, params, jax.ShapeDtypeStruct((1, self.n_sites), jnp.result_type(float)))
            if not jnp.issubdtype(out.dtype, jnp.complexfloating):
                raise ValueError("real-time evolution needs a complex log ψ (complex parameters, e.g. "
                                 "RBM(complex_params=True)): a real state cannot carry the phases exp(−iHt) creates")
        k_chain, k_run = jax.random.split(key)
        if self.exact:
            if starts is not None:
                raise ValueError("starts= applies to Markov chains, not to exact enumeration")
            if self.orbits is not None:
                self._check_invariance(params, k_chain)
            chains = jnp.zeros((), jnp.int32)
        else:
            chains = self.sampler.init(k_chain, self.bind(params))
            if starts is not None:
                chains = self.sampler.refresh(chains._replace(x=place_starts(self.space, chains.x, starts)),
                                              self.bind(params))
        return strong(EvolutionState(jnp.asarray(time, jnp.result_type(float)),
                                     jnp.zeros((), jnp.int32), jnp.asarray(self.dt, jnp.result_type(float)),
                                     params, chains, k_run))


    # ------------------------------------------------------------------ right-hand side
    def _samples(self, params, chains, key, n_per_chain):
        log_amp = self.bind(params)
        chains = self.sampler.refresh(chains, log_amp)
        if self.burn_in:
            key, k_burn = jax.random.split(key)
            _, _, chains, _ = self.sampler.sample(k_burn, chains, log_amp, self.burn_in)
            chains = self.sampler.refresh(chains, log_amp)
        xs, logs, chains, acc = self.sampler.sample(key, chains, log_amp, n_per_chain)
        return xs, logs, chains, acc

    def _exact_weights(self, params):
        """``(log ψ, w)`` over the enumerated configurations, w ∝ m |ψ|² (orbit sizes m, or 1)."""
        logs = self.model.apply(params, self._configs)
        log_w = 2.0 * jnp.real(logs)
        if self._log_mult is not None:
            log_w = log_w + self._log_mult
        w = jnp.exp(log_w - jnp.max(log_w))
        return logs, w / jnp.sum(w)

    def _check_invariance(self, params, key, observables: Mapping[str, Any] | None = None, rtol: float = 1e-8):
        """Raise unless |ψ| and the local energy (or, given ``observables``, their local
        estimators) agree on every orbit representative x_r and its image g·x_r (one random
        element g each): sums over orbits are exact only then."""
        assert self.orbits is not None
        group = self.orbits.group
        g = jax.random.randint(key, (self._configs.shape[0],), 0, len(group))
        images = group.act(self._configs, g)
        log_amp = self.bind(params)
        logs_x, logs_g = self.model.apply(params, self._configs), self.model.apply(params, images)
        if observables is None:
            checks = [("log|ψ|", jnp.real(logs_x), jnp.real(logs_g),
                       "use a symmetric state (e.g. TranslationInvariantRBM over this group) or a SpinSpace"),
                      ("the local energy", self.hamiltonian.local_energy(log_amp, self._configs, logs_x, chunk=self.chunk),
                       self.hamiltonian.local_energy(log_amp, images, logs_g, chunk=self.chunk),
                       "the Hamiltonian must commute with every element of the group; use a SpinSpace otherwise")]
        else:
            checks = []
            for name, op in observables.items():
                stacked = _Stacked([op], self.n_sites)
                block = lambda xs, ls: stacked.local_block(log_amp, xs, ls)  # noqa: E731
                checks.append((f"the local estimator of observable {name!r}",
                               map_in_chunks(block, self.chunk, self._configs, logs_x)[:, 0],
                               map_in_chunks(block, self.chunk, images, logs_g)[:, 0],
                               "measure observables that commute with the group, or use a SpinSpace"))
        for what, a, b, advice in checks:
            a, b = np.asarray(a), np.asarray(b)
            finite = np.isfinite(a) & np.isfinite(b)
            gap = np.where(finite, np.abs(a - b), 0.0)
            bad = np.flatnonzero((gap > rtol * (1.0 + np.abs(np.where(finite, a, 0.0))))
                                 | (np.isfinite(a) != np.isfinite(b)))
            if bad.size:
                i = int(bad[0])
                raise ValueError(
                    f"{what} is not invariant under the group {group.name!r} of the OrbitEnumeration: it differs "
                    f"by {float(gap[i]):.3g} between the configuration {np.asarray(self._configs[i]).astype(int).tolist()} "
                    f"and its image under element {int(g[i])}; {advice}")

    def system(self, params, chains, key):
        """``(TDVPSystem, chains, acceptance, energy error)`` at ``params`` (sampled or exact)."""
        log_amp = self.bind(params)
        if self.exact:
            x = self._configs
            logs, w = self._exact_weights(params)
            acc = jnp.ones((), w.dtype)
        else:
            xs, logs, chains, acc = self._samples(params, chains, key, self.n_per_chain)
            x, logs, w = xs.reshape(-1, self.n_sites), logs.reshape(-1), None
        e_loc = self.hamiltonian.local_energy(log_amp, x, logs, chunk=self.chunk)
        o = log_derivatives(self.model.apply, params, x, self.holomorphic, self.chunk)
        if w is not None:  # configurations of zero amplitude carry no weight (and may give nan)
            e_loc = jnp.where(w > 0, e_loc, 0)
            o = jnp.where(w[:, None] > 0, o, 0)
        sys = tdvp_system(o, e_loc, w, self.holomorphic, self.imaginary)
        if self.exact:
            err = jnp.zeros((), jnp.real(sys.energy).dtype)
        else:  # standard error from the means of the independent chains (includes autocorrelation)
            means = jnp.mean(jnp.real(e_loc).reshape(self.n_per_chain, -1), axis=0)
            err = jnp.std(means, ddof=1) / jnp.sqrt(means.shape[0])
        return sys, chains, jnp.mean(acc), err

    def rates(self, t, params, chains, key):
        """The right-hand side ``(θ̇ as a pytree like params, chains, StageInfo)``."""
        sys, chains, acc, err = self.system(params, chains, key)
        theta_dot = self.regularisation.solve(sys)
        _, unravel = flatten_parameters(params, self.holomorphic)
        info = StageInfo(sys.matrix, sys.energy, err, sys.variance, residual(sys, theta_dot), acc,
                         jnp.all(jnp.isfinite(theta_dot)))
        return unravel(theta_dot), chains, info

    def metric_norm(self, error_tree, info: StageInfo):
        """‖e‖_S = (e† S e)^{1/2} of a parameter-shaped error."""
        vec, _ = flatten_parameters(error_tree, self.holomorphic)
        vec = vec.astype(info.metric.dtype) if jnp.iscomplexobj(info.metric) else jnp.real(vec)
        return jnp.sqrt(jnp.maximum(jnp.real(jnp.vdot(vec, info.metric @ vec)), 0.0))

    def _attempt_program(self):
        if "attempt" not in self._programs:
            def attempt(state: EvolutionState, h):
                key, k_step = jax.random.split(state.key)
                params, chains, error, info = runge_kutta_step(
                    self.rates, self.tableau, state.time, state.params, h, state.chains, k_step, self.metric_norm)
                finite = _all_finite(params) & info.rates_finite & jnp.isfinite(info.energy)
                if self.tableau.adaptive:
                    finite = finite & jnp.isfinite(error)
                return params, chains, key, error, info, finite
            self._programs["attempt"] = jax.jit(attempt)
        return self._programs["attempt"]

    # ------------------------------------------------------------------ measurements
    def _measure_program(self, names: tuple, ops: tuple):
        key_ = ("measure", names)
        if key_ not in self._programs:
            stacked = _Stacked(list(ops), self.n_sites)
            scales = [operator_scale(op) for op in ops]

            def measure(params, chains, key):
                log_amp = self.bind(params)
                if self.exact:
                    logs, w = self._exact_weights(params)
                    table = map_in_chunks(lambda xs, ls: stacked.local_block(log_amp, xs, ls),
                                          self.chunk, self._configs, logs)  # (n, K)
                    table = jnp.where(w[:, None] > 0, table, 0)
                    mean = w @ table
                    return mean, jnp.zeros(mean.shape, jnp.real(mean).dtype), chains
                xs, logs, chains, _ = self._samples(params, chains, key, self.n_measure_per_chain)
                t, c, n = xs.shape
                table = map_in_chunks(lambda x_, l_: stacked.local_block(log_amp, x_, l_), self.chunk,
                                      xs.reshape(t * c, n), logs.reshape(-1)).reshape(t, c, -1)
                est = _estimates(table, scales)
                return est.mean, est.error, chains
            self._programs[key_] = jax.jit(measure)
        return self._programs[key_]

    def measure(self, state: EvolutionState, observables: Mapping[str, Any]):
        """``({name: mean}, {name: error}, state)`` at the state's time (fresh samples; exact
        values with error 0 for a SpinSpace). The state's chains and key advance."""
        obs = _check_observables(observables, self.n_sites)
        if not obs:
            return {}, {}, state
        names = tuple(obs)
        if self.orbits is not None:  # each observable's invariance, once (no key of the run is used)
            unchecked = {name: op for name, op in obs.items() if name not in self._orbit_checked}
            if unchecked:
                self._check_invariance(state.params, jax.random.PRNGKey(len(self._orbit_checked)), unchecked)
                self._orbit_checked.update(unchecked)
        key, k = jax.random.split(state.key)
        mean, err, chains = self._measure_program(names, tuple(obs.values()))(state.params, state.chains, k)
        mean, err = np.asarray(mean), np.asarray(err)
        values, errors = {}, {}
        for i, name in enumerate(names):
            herm = getattr(obs[name], "is_hermitian", None)
            hermitian = herm() if callable(herm) else False
            values[name] = float(np.real(mean[i])) if hermitian else complex(mean[i])
            errors[name] = float(err[i])
        return values, errors, state._replace(chains=chains, key=key)

    # ------------------------------------------------------------------ checkpoints
    def meta(self) -> dict:
        """Run metadata stored in checkpoints (sampler settings; ``None`` sampler for exact sums)."""
        return run_meta(None if self.exact else self.sampler)

    def template(self, params) -> EvolutionState:
        """Shapes and dtypes of the state :meth:`init` returns (no computation), for loading checkpoints."""
        return jax.eval_shape(lambda p, k: self.init(p, k), params, jax.random.PRNGKey(0))

    def save(self, path: str, state: EvolutionState, history: History | None = None) -> None:
        """Write ``state`` and ``history`` to a checkpoint file at ``path`` (see :mod:`psiloom.checkpoint`)."""
        save_checkpoint(path, state, history, self.meta())

    def resume(self, path: str, params_like) -> tuple[EvolutionState, History]:
        """``(state, history)`` from a checkpoint of this evolution; ``params_like``: parameters of
        the same model (their shapes and dtypes form the template)."""
        return load_checkpoint(path, self.template(params_like), self.meta())

    # ------------------------------------------------------------------ the outer loop
    def run(self, state: EvolutionState, times, observables: Mapping[str, Any] | None = None,
            history: History | None = None, checkpoint: str | None = None, max_steps: int = 1_000_000,
            progress=None) -> Trajectory:
        """Integrate through the grid ``times`` (strictly increasing, the first ≥ the state's time),
        measuring ``observables`` at each grid time. Returns a :class:`Trajectory`.

        ``checkpoint``: path written at every grid time. ``progress``: a callable receiving one
        line per grid time (``print`` for the console), or None.
        """
        grid = check_time_grid(times)
        obs = _check_observables(observables, self.n_sites)
        max_steps = positive_int("max_steps", max_steps)
        if checkpoint is not None and not isinstance(checkpoint, str):
            raise TypeError(f"checkpoint must be a file path (str), got {checkpoint!r}")
        t_now = float(state.time)
        eps = 1e-12 * max(1.0, abs(grid[-1]))
        if grid[0] < t_now - eps:
            raise ValueError(f"times must start at or after the state's time {t_now!r}, got {grid[0]!r}")
        history = History() if history is None else history
        attempt = self._attempt_program()
        lock = CheckpointLock(checkpoint + ".lock").acquire() if checkpoint else None
        # a resumed run whose first grid time was measured before the checkpoint skips it
        measured = bool(obs) and len(history) > 0 and history.columns.get("time", [None])[-1] == t_now \
            and all(np.isfinite(history.columns.get(k, [np.nan])[-1]) for k in obs)
        try:
            n_taken = 0
            for i, target in enumerate(grid):
                rejected = 0
                while t_now < target - eps:
                    h_try = float(state.dt)
                    h = min(h_try, target - t_now)
                    t0 = _time.perf_counter()
                    params, chains, key, error, info, finite = attempt(state, jnp.asarray(h, state.dt.dtype))
                    if not bool(finite):
                        raise NonFiniteEvolution(t_now, int(state.step) + 1, h, state, history, checkpoint)
                    if self.tableau.adaptive:
                        assert self.tableau.low_order is not None  # adaptive tableaus carry an embedded order
                        ok, h_next = next_step_size(h, float(error), self.tol, self.tableau.low_order)
                        if not ok:
                            rejected += 1
                            if h_next < self.min_dt:
                                raise FloatingPointError(
                                    f"adaptive step fell below min_dt={self.min_dt:g} at t = {t_now:.10g} "
                                    f"(error {float(error):.3g} > tol {self.tol:g})")
                            state = state._replace(dt=jnp.asarray(h_next, state.dt.dtype), key=key, chains=chains)
                            continue
                        # a step clipped to the grid keeps the controller's previous proposal
                        new_dt = h_next if h == h_try else max(h_try, h_next)
                    else:
                        new_dt = h_try
                    # land exactly on the grid time (no sliver step from rounded sums of dt)
                    t_now = target if target - (t_now + h) <= eps else t_now + h
                    state = EvolutionState(jnp.asarray(t_now, state.time.dtype), state.step + 1,
                                           jnp.asarray(new_dt, state.dt.dtype), params, chains, key)
                    var = float(info.variance)
                    history.append_row({
                        "step": int(state.step), "time": t_now, "dt": h, "energy": float(np.real(info.energy)),
                        "error": float(info.energy_error), "variance": var,
                        "residual": float(info.residual), "acceptance": float(info.acceptance),
                        "rejected": rejected, "seconds": _time.perf_counter() - t0})
                    rejected = 0
                    n_taken += 1
                    if n_taken > max_steps:
                        raise RuntimeError(f"more than max_steps={max_steps} steps before t = {target!r}")
                if i == 0 and measured and abs(target - t_now) <= eps:
                    continue
                values, errors, state = self.measure(state, obs)
                if obs:
                    self._record(history, state, t_now, values, errors)
                if progress is not None:
                    shown = ", ".join(f"{k} = {stats.parenthesis_notation(float(np.real(v)), errors[k])}"
                                      if errors[k] > 0 else f"{k} = {np.real(v):.8g}" for k, v in values.items())
                    progress(f"t = {t_now:.6g}  step {int(state.step)}  {shown}")
                if checkpoint:
                    self.save(checkpoint, state, history)
        finally:
            if lock is not None:
                lock.release()
        return self.trajectory(history, list(obs), state)

    @staticmethod
    def _record(history: History, state, t_now, values, errors):
        cols = history.columns
        landed = len(history) and cols["step"][-1] == int(state.step) and cols.get("time", [None])[-1] == t_now \
            and all(not np.isfinite(cols.get(k, [np.nan])[-1]) for k in values)
        row = {}
        for k, v in values.items():
            row[k] = float(np.real(v))
            row[k + ":error"] = errors[k]
            if isinstance(v, complex):
                row[k + ":imag"] = float(np.imag(v))
        if landed:
            n = len(history)
            for k, v in row.items():
                if k not in cols:
                    cols[k] = [float("nan")] * n
                cols[k][-1] = v
        else:
            history.append_row({"step": int(state.step), "time": t_now, **row})

    @staticmethod
    def trajectory(history: History, names, state=None) -> Trajectory:
        """The observables' rows of a history as a :class:`Trajectory`."""
        cols = history.columns
        if not names:
            return Trajectory(np.asarray(cols.get("time", []), float), {}, {}, state, history)
        first = np.asarray(cols[names[0]], float)
        rows = np.flatnonzero(np.isfinite(first))
        times = np.asarray(cols["time"], float)[rows]
        values, errors = {}, {}
        for k in names:
            v = np.asarray(cols[k], float)[rows]
            if k + ":imag" in cols:
                v = v + 1j * np.asarray(cols[k + ":imag"], float)[rows]
            values[k] = v
            errors[k] = np.asarray(cols[k + ":error"], float)[rows]
        return Trajectory(times, values, errors, state, history)
