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
   Target ≥ 10×, judged on the default (float64) cache, as the median of 3 runs in one call (the
   paths timed in turn in each run, each time the best of several calls; ``ratio_min``/``ratio_max``
   the spread). ``roofline``: bytes and flops per proposal and chain of both paths and the
   ratio that this machine's measured bandwidth and matmul rate allow (:func:`roofline`).
   Also reported: the same fast update as a
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
``--quick`` uses 16 and 64 chains, fewer repetitions and smaller SR/batch sizes (about a minute
on two idle cores);
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


def machine_rates(repeat: int = 5) -> dict:
    """This CPU's float64 matmul rate (XLA, flops/s), for the roofline of :func:`roofline`."""
    x = jnp.ones((512, 512))
    mm = jax.jit(jnp.matmul)
    jax.block_until_ready(mm(x, x))
    t_mm = min(_timed(lambda: jax.block_until_ready(mm(x, x))) for _ in range(repeat))
    return {"matmul_flops_per_s": 2 * 512 ** 3 / t_mm}


def copy_bandwidth(n_bytes: int, repeat: int = 5) -> float:
    """Bytes/s (read + write) of copying an array of ``n_bytes`` (NumPy, one thread): the rate of
    the cache level (or memory) that a working set of that size lives in. Small arrays include
    NumPy's per-call cost (~1 µs), so the rate is a lower estimate there."""
    a = np.ones(max(1, int(n_bytes) // 8))
    b = np.empty_like(a)
    number = max(1, (1 << 26) // a.nbytes)  # ~64 MiB copied per timing
    best = min(_timed(lambda: [np.copyto(b, a) for _ in range(number)]) for _ in range(repeat))
    return 2 * a.nbytes * number / best


def _timed(fn) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def roofline(n_chains: int, rates: dict, measured: dict | None = None) -> dict:
    """Bytes and flops per proposal and chain (float64; N sites, M = αN hidden units) and the
    sweep ratio that they allow here.

    Full re-evaluation: θ = W·x' + b for the proposed x' (2NM flops; W's 8NM bytes are shared by
    all chains of a batch and stay in cache) and M log 2cosh (counted as 20 flops each).
    Fast update (compiled sweeps): per hidden unit P = p e^{d}, Q = q e^{−d}, P + Q and the running
    product (4 flops), reading the chain's cached pair (p, q) (16M bytes) and the proposal's two
    factor rows (16M bytes, shared by a block of 8 chains: 2M per chain), writing the pair back on
    acceptance (≤ 16M bytes). The fast path streams its working set — every chain's pair plus the
    factor rows of all P = N table entries, 16M (n_chains + N) bytes — through the cache level it
    fits in, the full path is arithmetic. ``ratio_bound`` = t_full / t_fast with
    t_full = flops_full / (matmul rate) and t_fast = max(bytes_fast / (copy bandwidth at the
    working set's size), flops_fast / (matmul rate)): the ratio if both ran at this machine's
    rates. ``measured`` (sweep seconds of the two paths) adds each path's seconds per proposal and
    chain against its roofline time.
    """
    n, m = L, ALPHA * L
    working_set = 16 * m * (n_chains + n)
    rate = copy_bandwidth(working_set)
    full_flops, full_bytes = 2 * n * m + 20 * m, 8 * n * m / n_chains
    fast_flops, fast_bytes = 4 * m, 16 * m + 2 * m + 16 * m
    t_full = full_flops / rates["matmul_flops_per_s"]
    t_fast = max(fast_bytes / rate, fast_flops / rates["matmul_flops_per_s"])
    out = {"full": {"flops": full_flops, "bytes": full_bytes, "roofline_seconds": t_full},
           "fast": {"flops": fast_flops, "bytes": fast_bytes, "roofline_seconds": t_fast},
           "working_set_bytes": working_set, "copy_bandwidth_bytes_per_s": rate,
           "matmul_flops_per_s": rates["matmul_flops_per_s"], "ratio_bound": t_full / t_fast,
           "fast_bound_by": "memory" if fast_bytes / rate > fast_flops / rates["matmul_flops_per_s"] else "arithmetic"}
    if measured is not None:
        for path in ("full", "fast"):
            per = measured[path] / (n * n_chains)
            out[path].update(measured_seconds=per, roofline_fraction=out[path]["roofline_seconds"] / per)
    return out


def metropolis(n_chains: int, repeat: int, order: str, runs: int = 3, rates: dict | None = None) -> dict:
    """Sweep times of every path, measured ``runs`` times in turn (each the best of ``repeat``);
    ``ratio`` is the median over the runs of full/fast, with ``ratio_min``/``ratio_max``."""
    with Timer() as timer:
        lattice = pl.lattices.chain(L)
        model, variables, space = _rbm(L)
        model32 = model.clone(cache_dtype=jnp.float32)  # same parameters, float32 cache
        samples = {}  # path -> sweep seconds of every run
        # path: (model, fast updates, compiled sweeps, sweeps per sample call)
        paths = {True: (model, True, True, SWEEPS_PER_CALL), False: (model, False, False, SWEEPS_PER_CALL),
                 "jax": (model, True, False, SWEEPS_PER_CALL), "float32": (model32, True, True, SWEEPS_PER_CALL),
                 "one_per_call": (model, True, True, 1)}
        calls = {}
        for path, (m, fast, compiled, n_sweeps) in paths.items():
            sampler = pl.sampling.MetropolisChains(space, n_chains=n_chains, bonds=lattice.bonds, order=order,
                                                    compiled_sweeps=compiled)
            amp = BoundState(m, variables, fast=fast)
            chains = sampler.init(jax.random.PRNGKey(1), amp)

            def sweeps(v, chains, key, m=m, fast=fast, sampler=sampler, n_sweeps=n_sweeps):
                return sampler.sample(key, chains, BoundState(m, v, fast=fast), n_sweeps)[2]

            calls[path] = (jax.jit(sweeps), chains, n_sweeps)
        cpu = {}
        for run in range(runs):  # the paths in turn, so a change of load hits all of them
            for path, (fn, chains, n_sweeps) in calls.items():
                t = best_time(fn, variables, chains, jax.random.PRNGKey(2), repeat=repeat, number=3,
                              label=f"sweep{path}") / n_sweeps
                samples.setdefault(path, []).append(t)
                cpu.setdefault(path, []).append(CPU_TIMES[f"sweep{path}"] / n_sweeps)
                progress(f"metropolis n_chains={n_chains} order={order} path={path} run {run + 1}/{runs}: "
                         f"{t * 1e3:.3f} ms/sweep")
        times = {path: float(np.median(ts)) for path, ts in samples.items()}
        for path, ts in cpu.items():
            CPU_TIMES[f"sweep{path}"] = float(np.median(ts))  # per sweep, as the wall times
        ratios = [full / fast for full, fast in zip(samples[False], samples[True])]
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
        "ratio": float(np.median(ratios)),
        "ratio_min": min(ratios),
        "ratio_max": max(ratios),
        "ratio_runs": ratios,
        "runs": runs,
        **_cpu_fields("sweepTrue", "sweepFalse"),
        "roofline": None if rates is None else roofline(n_chains, rates, {"full": times[False], "fast": times[True]}),
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
    repeat = 2 if args.quick else 5
    records = []
    rates = machine_rates()
    progress(f"machine: {rates['matmul_flops_per_s'] / 1e9:.1f} GFLOP/s matmul")
    for order in ("random", "sequential"):
        for n_chains in ((16, 64) if args.quick else (16, 64, 256)):  # medians of 3 runs each
            records.append(emit(metropolis(n_chains, 1 if args.quick else repeat, order, runs=3, rates=rates)))
    records.append(emit(local_energy(256 if args.quick else 1024, repeat)))
    # P = N + αN + αN² ≥ 8 n
    records.append(emit(sr_solve(32, 256, repeat) if args.quick else sr_solve(64, 1024, repeat)))
    records.append(emit(amplitude_gflops(2048 if args.quick else 4096, repeat)))
    targets = {r["metric"] + (f"[n_chains={r['method']['n_chains']},order={r['method']['order']}]"
                              if "n_chains" in r["method"] else ""):
               {"ratio": r["ratio"], "ratio_min": r.get("ratio_min"), "ratio_max": r.get("ratio_max"),
                "ratio_bound": (r.get("roofline") or {}).get("ratio_bound"),
                "cpu_ratio": r["cpu_ratio"], "target": r.get("target_ratio"),
                "met": None if r.get("target_ratio") is None else bool(r["ratio"] >= r["target_ratio"])}
               for r in records}
    summary(records, benchmark="throughput", quick=bool(args.quick), single_thread=bool(args.single_thread),
            ratios=targets)


if __name__ == "__main__":
    main()
