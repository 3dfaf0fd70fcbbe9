"""Throughput benchmark: fast amplitude updates, SR solvers and the RBM amplitude kernel.

Every comparison is measured in the same run (``ratio`` = baseline time / measured time, so a
ratio above 1 means faster than the baseline), on the CPU this runs on:

1. Metropolis sweep (N proposals per chain) for an RBM (α = 2) on the Heisenberg ring L = 100
   (Sᶻ = 0 sector, nearest-neighbour exchange moves): fast updates of the cached pair 1 ± tanh θ per
   chain vs full re-evaluation of log ψ(x') for every proposal, in both proposal orders
   (``random``: an independent bond per chain; ``sequential``: the bonds in turn, the same in
   every chain). Both paths run as the library runs them by default: the fast path through the
   compiled sweeps (:mod:`psiloom.sampling.compiled`), the full path as an XLA loop; each timed
   call of ``sample`` makes ``SWEEPS_PER_CALL`` sweeps (the compiled path's host call costs a
   fixed ~0.2-1 ms per call; ``ratio_one_sweep_per_call`` shows the cost of one sweep per call).
   Target ≥ 10×, judged on the default (float64) cache. Also reported: the same fast update as a
   JAX loop (``ratio_jax_fast_path``) and the opt-in float32 cache (``ratio_float32_cache``).
2. Local energies of the same system: fast per-connection updates vs full re-evaluation (and
   with the float32 cache, ``ratio_float32_cache``, with its largest relative deviation).
3. SR solve with parameters P ≥ 8 × samples n: sample-space solve (n×n system) vs dense
   parameter-space Cholesky (P×P), both through ``stochastic_reconfiguration`` on the same
   fixed Jacobian X (so only the linear algebra is timed). Target ≥ 5×.
4. Achieved GFLOP/s of the batched RBM amplitude (2·B·N·M flops of the θ = xW product counted)
   vs a plain ``x @ W`` of the same shape. Target ≥ 0.5 of it.

Times are wall-clock, best of several repetitions after compilation (OpenBLAS limited to one
thread unless OPENBLAS_NUM_THREADS is set: see the note at the import). Prints one JSON line per
measurement and a summary line last (benchmarks/README.md); progress goes to stderr.
``--quick`` uses fewer repetitions and smaller SR/batch sizes (< 60 s on two cores);
``--single-thread`` runs XLA on one thread (steadier numbers on a busy machine).
"""

from __future__ import annotations

import os
import sys

# LAPACK (Cholesky, triangular solves) runs in scipy's OpenBLAS; on a small shared machine its
# spinning worker threads slow each call 10× or more. One thread, set before anything loads it.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
if "--single-thread" in sys.argv:  # XLA reads its flags when the backend starts
    os.environ["XLA_FLAGS"] = (os.environ.get("XLA_FLAGS", "")
                               + " --xla_cpu_multi_thread_eigen=false intra_op_parallelism_threads=1")

import time  # noqa: E402

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402

import psiloom as pl  # noqa: E402
from psiloom.states import RBM, BoundState  # noqa: E402
from _common import Timer, emit, lattice_system, parse_args, progress, summary  # noqa: E402

L = 100
ALPHA = 2
SWEEPS_PER_CALL = 10  # sweeps per MetropolisChains.sample call (training stores 16+ per call)


CPU_TIMES: dict[str, float] = {}  # process CPU seconds of the last best_time call per label


def best_time(fn, *args, repeat: int = 5, number: int = 1, label: str | None = None) -> float:
    """Best wall-clock seconds of ``number`` calls of ``fn(*args)`` over ``repeat`` trials
    (after one untimed call that compiles). The best process CPU time per call is kept in
    ``CPU_TIMES[label]``: with ``--single-thread`` it measures the work itself and is far less
    sensitive than wall time to other processes on a shared machine."""
    jax.block_until_ready(fn(*args))
    best, best_cpu = float("inf"), float("inf")
    for _ in range(repeat):
        start, start_cpu = time.perf_counter(), time.process_time()
        for _ in range(number):
            out = fn(*args)
        jax.block_until_ready(out)
        best = min(best, (time.perf_counter() - start) / number)
        best_cpu = min(best_cpu, (time.process_time() - start_cpu) / number)
    if label is not None:
        CPU_TIMES[label] = best_cpu
    return best


def _cpu_fields(measured: str, baseline: str) -> dict:
    """CPU-time version of a time comparison: seconds of process time (all threads of this
    process), ``cpu_ratio`` = baseline / measured."""
    return {"cpu_value": CPU_TIMES[measured], "cpu_baseline": CPU_TIMES[baseline],
            "cpu_ratio": CPU_TIMES[baseline] / CPU_TIMES[measured]}


def _rbm(n_sites: int, key: int = 0, scale: float = 0.1):
    model = RBM(alpha=ALPHA, init_scale=scale)
    space = pl.spaces.SpinSpace(n_sites, magnetisation=0)
    variables = model.init(jax.random.PRNGKey(key), space.random(jax.random.PRNGKey(key), 1))
    return model, variables, space


def metropolis(n_chains: int, repeat: int, order: str) -> dict:
    with Timer() as timer:
        lattice = pl.lattices.chain(L)
        model, variables, space = _rbm(L)
        model32 = model.clone(cache_dtype=jnp.float32)  # same parameters, float32 cache
        times = {}
        # path: (model, fast updates, compiled sweeps, sweeps per sample call)
        paths = {True: (model, True, True, SWEEPS_PER_CALL), False: (model, False, False, SWEEPS_PER_CALL),
                 "jax": (model, True, False, SWEEPS_PER_CALL), "float32": (model32, True, True, SWEEPS_PER_CALL),
                 "one_per_call": (model, True, True, 1)}
        for path, (m, fast, compiled, n_sweeps) in paths.items():
            sampler = pl.sampling.MetropolisChains(space, n_chains=n_chains, bonds=lattice.bonds, order=order,
                                                    compiled_sweeps=compiled)
            amp = BoundState(m, variables, fast=fast)
            chains = sampler.init(jax.random.PRNGKey(1), amp)

            def sweeps(v, chains, key, m=m, fast=fast, sampler=sampler, n_sweeps=n_sweeps):
                return sampler.sample(key, chains, BoundState(m, v, fast=fast), n_sweeps)[2]

            times[path] = best_time(jax.jit(sweeps), variables, chains, jax.random.PRNGKey(2), repeat=repeat,
                                    number=3, label=f"sweep{path}") / n_sweeps
            CPU_TIMES[f"sweep{path}"] /= n_sweeps  # per sweep, as the wall times
            progress(f"metropolis n_chains={n_chains} order={order} path={path}: {times[path] * 1e3:.3f} ms/sweep")
    return {
        "benchmark": "throughput",
        "system": lattice_system("heisenberg", "chain", [L], True, "spin", J=1.0),
        "method": {"trial_state": f"RBM alpha={ALPHA} (real)", "sampler": "Metropolis nn-exchange, Sz=0",
                   "n_chains": n_chains, "order": order, "sweep": f"{L} proposals per chain",
                   "sweeps_per_sample_call": SWEEPS_PER_CALL,
                   "fast_path": "compiled sweeps (sampling.compiled), float64 cache",
                   "baseline": "full re-evaluation of log psi per proposal"},
        "metric": "metropolis_sweep_seconds",
        "value": times[True],
        "unit": "s/sweep",
        "baseline": times[False],
        "ratio": times[False] / times[True],
        **_cpu_fields("sweepTrue", "sweepFalse"),
        # cost per hidden unit per proposal and chain: the fast path's update of the cached pair
        # against the full path's N multiply-adds plus one log 2cosh per unit
        "ns_per_unit": {name: times[path] / (L * n_chains * ALPHA * L) * 1e9
                        for name, path in (("fast", True), ("full", False), ("fast_jax", "jax"),
                                           ("fast_float32_cache", "float32"))},
        "target_ratio": 10.0,
        # the same fast update as a JAX loop (compiled_sweeps=False): every proposal a few XLA kernels
        "ratio_jax_fast_path": times[False] / times["jax"],
        # the opt-in float32 cache through the compiled sweeps (not what "ratio" judges)
        "ratio_float32_cache": times[False] / times["float32"],
        # one sweep per sample call: the host call's fixed cost (~0.2-1 ms) is not amortised
        "ratio_one_sweep_per_call": times[False] / times["one_per_call"],
        "seconds": timer.seconds,
        "n_params": pl.states.count_real_parameters(variables),
    }


def local_energy(n_samples: int, repeat: int) -> dict:
    with Timer() as timer:
        lattice = pl.lattices.chain(L)
        model, variables, space = _rbm(L)
        hamiltonian = pl.operators.heisenberg(lattice, marshall_basis=True)
        x = space.random(jax.random.PRNGKey(3), n_samples)
        model32 = model.clone(cache_dtype=jnp.float32)  # same parameters, float32 cache
        times, values = {}, {}
        for path, m, fast in ((True, model, True), (False, model, False), ("float32", model32, True)):
            fn = jax.jit(lambda v, x, m=m, fast=fast: hamiltonian.local_energy(BoundState(m, v, fast=fast), x))
            times[path] = best_time(fn, variables, x, repeat=repeat, label=f"eloc{path}")
            values[path] = np.asarray(fn(variables, x))
            progress(f"local energy fast={path}: {times[path] * 1e3:.2f} ms for {n_samples} samples")
        scale = np.max(np.abs(values[False]))
        agreement = float(np.max(np.abs(values[True] - values[False])) / scale)
        agreement32 = float(np.max(np.abs(values["float32"] - values[False])) / scale)
    return {
        "benchmark": "throughput",
        "system": lattice_system("heisenberg", "chain", [L], True, "spin", J=1.0),
        "method": {"trial_state": f"RBM alpha={ALPHA} (real)", "n_samples": n_samples,
                   "n_connections": hamiltonian.n_connections,
                   "baseline": "full re-evaluation of log psi on every connected configuration",
                   "max_rel_difference": agreement, "max_rel_difference_float32_cache": agreement32},
        "metric": "local_energy_seconds",
        "value": times[True],
        "unit": "s/batch",
        "baseline": times[False],
        "ratio": times[False] / times[True],
        **_cpu_fields("elocTrue", "elocFalse"),
        "ratio_float32_cache": times[False] / times["float32"],  # opt-in float32 cache (see the sweep)
        "seconds": timer.seconds,
        "n_params": pl.states.count_real_parameters(variables),
    }


class _FixedGeometry:
    """The part of :class:`psiloom.optimize.SampleGeometry` the SR solvers read, with the
    Jacobian computed beforehand, so that only the linear algebra is timed."""

    def __init__(self, x, residual, n_samples):
        self._x, self._residual = x, residual
        self.n_samples = n_samples
        self.complex_output = False

    def jacobian(self):
        return self._x

    def residual(self):
        return self._residual


def sr_solve(n_sites: int, n_samples: int, repeat: int) -> dict:
    with Timer() as timer:
        lattice = pl.lattices.chain(n_sites)
        model, variables, space = _rbm(n_sites, scale=0.05)
        hamiltonian = pl.operators.heisenberg(lattice, marshall_basis=True)
        x = space.random(jax.random.PRNGKey(4), n_samples)
        e_loc = hamiltonian.local_energy(BoundState(model, variables), x)
        geometry = pl.optimize.SampleGeometry(model.apply, variables, x, e_loc)
        jac, res = jax.block_until_ready((geometry.jacobian(), geometry.residual()))
        _, grad = pl.optimize.energy_gradient(model.apply, variables, x, e_loc)
        n_params = jac.shape[1]
        times, deltas = {}, {}
        for solver in ("sample_space", "dense"):
            sr = pl.optimize.stochastic_reconfiguration(shift=1e-3, solver=solver)
            state = sr.init(variables)

            def solve(grad, state, jac, res, sr=sr):
                out, _ = sr.update(grad, state, geometry=_FixedGeometry(jac, res, n_samples))
                return pl.optimize.ravel_real(out)[0]

            fn = jax.jit(solve)
            times[solver] = best_time(fn, grad, state, jac, res, repeat=min(repeat, 3), label=solver)
            deltas[solver] = np.asarray(fn(grad, state, jac, res))
            progress(f"SR {solver}: P={n_params}, n={n_samples}: {times[solver] * 1e3:.1f} ms")
        agreement = float(np.linalg.norm(deltas["sample_space"] - deltas["dense"]) / np.linalg.norm(deltas["dense"]))
    return {
        "benchmark": "throughput",
        "system": lattice_system("heisenberg", "chain", [n_sites], True, "spin", J=1.0),
        "method": {"trial_state": f"RBM alpha={ALPHA} (real)", "n_params": n_params, "n_samples": n_samples,
                   "params_per_sample": n_params / n_samples, "shift": 1e-3,
                   "baseline": "dense P x P Cholesky solve", "relative_difference_of_updates": agreement},
        "metric": "sr_solve_seconds",
        "value": times["sample_space"],
        "unit": "s/solve",
        "baseline": times["dense"],
        "ratio": times["dense"] / times["sample_space"],
        **_cpu_fields("sample_space", "dense"),
        "target_ratio": 5.0,
        "samples_per_step": n_samples,
        "seconds": timer.seconds,
        "n_params": n_params,
    }


def amplitude_gflops(batch: int, repeat: int) -> dict:
    with Timer() as timer:
        model, variables, space = _rbm(L)
        x = space.random(jax.random.PRNGKey(5), batch)
        kernel = variables["params"]["kernel"]
        flops = 2.0 * batch * kernel.shape[0] * kernel.shape[1]
        t_rbm = best_time(jax.jit(model.apply), variables, x, repeat=repeat, number=5, label="rbm")
        t_matmul = best_time(jax.jit(jnp.matmul), x, kernel, repeat=repeat, number=5, label="matmul")
        progress(f"RBM amplitude B={batch}: {flops / t_rbm / 1e9:.2f} GFLOP/s; matmul {flops / t_matmul / 1e9:.2f}")
    return {
        "benchmark": "throughput",
        "system": lattice_system("heisenberg", "chain", [L], True, "spin", J=1.0),
        "method": {"trial_state": f"RBM alpha={ALPHA} (real), float64", "batch": batch,
                   "shape": [batch, int(kernel.shape[0]), int(kernel.shape[1])],
                   "flops_counted": "2*B*N*M (the x @ W product only)",
                   "baseline": "jnp.matmul(x, W) of the same shape"},
        "metric": "rbm_amplitude_gflops",
        "value": flops / t_rbm / 1e9,
        "unit": "GFLOP/s",
        "baseline": flops / t_matmul / 1e9,
        "ratio": t_matmul / t_rbm,
        "cpu_value": flops / CPU_TIMES["rbm"] / 1e9,
        "cpu_baseline": flops / CPU_TIMES["matmul"] / 1e9,
        "cpu_ratio": CPU_TIMES["matmul"] / CPU_TIMES["rbm"],
        "target_ratio": 0.5,
        "seconds": timer.seconds,
        "n_params": pl.states.count_real_parameters(variables),
    }


def main() -> None:
    args = parse_args("throughput", "fast updates, SR solvers and amplitude throughput",
                      extra=lambda p: p.add_argument("--single-thread", action="store_true",
                                                     help="run XLA on one thread"))
    repeat = 3 if args.quick else 7
    records = []
    for order in ("random", "sequential"):
        for n_chains in ((16, 64) if args.quick else (16, 64, 256)):
            records.append(emit(metropolis(n_chains, repeat, order)))
    records.append(emit(local_energy(256 if args.quick else 1024, repeat)))
    # P = N + αN + αN² ≥ 8 n
    records.append(emit(sr_solve(32, 256, repeat) if args.quick else sr_solve(64, 1024, repeat)))
    records.append(emit(amplitude_gflops(2048 if args.quick else 4096, repeat)))
    targets = {r["metric"] + (f"[n_chains={r['method']['n_chains']},order={r['method']['order']}]"
                              if "n_chains" in r["method"] else ""):
               {"ratio": r["ratio"], "cpu_ratio": r["cpu_ratio"], "target": r.get("target_ratio"),
                "met": None if r.get("target_ratio") is None else bool(r["ratio"] >= r["target_ratio"])}
               for r in records}
    summary(records, benchmark="throughput", quick=bool(args.quick), single_thread=bool(args.single_thread),
            ratios=targets)


if __name__ == "__main__":
    main()
