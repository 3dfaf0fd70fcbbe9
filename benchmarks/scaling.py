"""Scaling over devices: the chain axis spread with ``GroundStateSearch(mesh=...)``.

What a "device" is here. On a GPU machine a device is a GPU. On a CPU there are two kinds:

* **simulated host devices** (``XLA_FLAGS=--xla_force_host_platform_device_count=D``): D XLA
  devices in one process that share the same cores and thread pool. They exercise exactly the
  code paths of D GPUs (sharding, all-reduces, per-device host callbacks) but make nothing
  faster; this script runs 1, 2, 4 and 8 of them for *agreement*: the same seed must give the
  same energies on every count (``max_rel_energy_difference``). Their step times are reported
  but are not a speed measurement.
* **one process per core** (``jax.distributed`` over localhost, gloo collectives, each process
  pinned to its own core with ``os.sched_setaffinity``): the honest CPU analogue of several
  devices. 1 process on 1 core against 2 processes on 2 cores gives strong scaling (same total
  number of chains) and weak scaling (same chains per process). With fewer than 2 cores, or on
  a machine shared with other jobs, these numbers mean little; the line says how many cores
  the machine had.

Each run trains a real RBM (α = 1; compiled Metropolis sweeps in the process runs, JAX sweeps on
simulated devices, where host callbacks can deadlock XLA's CPU collectives) on a Heisenberg ring with dense
SR, times its steps after one untimed (compiling) step and reports

    samples per second = n_samples · steps / seconds,      step time = seconds / steps,
    strong efficiency  = t(1) / (D · t(D))   (fixed total samples),
    weak efficiency    = t(1) / t(D)          (fixed samples per device).

Output: one JSON line per run, then a summary line (``"summary": true``) with ``device_counts``,
``max_rel_energy_difference`` (simulated devices against one device) and the efficiencies;
progress on stderr (contract in DEVELOPERS.md, "Benchmarks"). ``--quick`` finishes in under
three minutes on two cores.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))


def worker(args) -> None:
    """One run (a subprocess): prints one JSON object."""
    if args.process_id is not None:
        os.sched_setaffinity(0, {args.process_id % os.cpu_count()})
    else:
        flags = os.environ.get("XLA_FLAGS", "")
        # agreement runs only: XLA's backend optimisation off (compilation dominates these short runs)
        os.environ["XLA_FLAGS"] = (f"{flags} --xla_force_host_platform_device_count={args.devices}"
                                   " --xla_backend_optimization_level=0").strip()
    import jax

    from psiloom import parallel

    if args.process_id is not None:
        parallel.initialize(f"localhost:{args.port}", args.processes, args.process_id, timeout=120)
    jax.config.update("jax_enable_x64", True)
    import numpy as np
    import optax

    import psiloom as pl

    mesh = parallel.sample_mesh(processes=args.processes)
    lat = pl.lattices.chain(args.sites)
    space = pl.spaces.SpinSpace(args.sites, magnetisation=0)
    # simulated devices: sweeps in JAX (host callbacks there can deadlock XLA's in-process
    # collectives, see psiloom.parallel); one process per core: compiled sweeps
    sampler = pl.sampling.MetropolisChains(space, n_chains=args.chains, bonds=lat.bonds, burn_in=1,
                                            compiled_sweeps=args.process_id is not None)
    opt = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05))
    search = pl.train.GroundStateSearch(pl.states.RBM(alpha=1.0, init_scale=0.05), pl.operators.heisenberg(lat),
                                        sampler, opt, n_samples=args.chains * args.per_chain, mesh=mesh)
    state = search.init(jax.random.PRNGKey(0))
    start = time.perf_counter()
    state, out = search.step(state)  # compiles
    jax.block_until_ready(state)
    compile_seconds = time.perf_counter() - start
    energies = [float(np.real(out.energy.mean))]
    start = time.perf_counter()
    for _ in range(args.steps):
        state, out = search.step(state)
        energies.append(float(np.real(out.energy.mean)))
    jax.block_until_ready(state)
    seconds = time.perf_counter() - start
    if parallel.is_main_process():
        print(json.dumps({"devices": parallel.n_devices(mesh), "processes": jax.process_count(),
                          "energies": energies, "seconds": seconds, "compile_seconds": compile_seconds}), flush=True)


def _launch(common, devices=1, processes=None, timeout=600):
    from psiloom import parallel

    env = dict(os.environ)
    env["PYTHONPATH"] = os.path.join(os.path.dirname(HERE), "src") + os.pathsep + env.get("PYTHONPATH", "")
    base = [sys.executable, os.path.abspath(__file__), "--worker", *common]
    if processes is None:
        runs = parallel.run_local_processes(lambda i: base + ["--devices", str(devices)], 1, timeout, env)
    else:
        port = str(parallel.free_local_port())
        runs = parallel.run_local_processes(
            lambda i: base + ["--processes", str(processes), "--process-id", str(i), "--port", port],
            processes, timeout, env)
    outs = [(out, err) for out, err, _ in runs]
    if any(rc for _, _, rc in runs):
        raise RuntimeError("run failed:\n" + "\n".join(o[1][-2000:] for o in outs))
    return json.loads([line for line in outs[0][0].splitlines() if line.startswith("{")][-1])


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(prog="scaling", description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="reduced run (< 3 min on two cores)")
    parser.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--devices", type=int, default=1, help=argparse.SUPPRESS)
    parser.add_argument("--processes", type=int, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--process-id", type=int, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--port", type=int, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--sites", type=int, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--chains", type=int, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--per-chain", type=int, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--steps", type=int, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        return worker(args)

    sys.path.insert(0, HERE)
    from _common import emit, progress, summary

    # agreement runs take few steps (simulated devices are slow, and only agreement counts there);
    # timed runs take more, since one step of the quick system lasts milliseconds
    sites, per_chain, chains, agree_steps, steps = (12, 4, 16, 3, 30) if args.quick else (40, 16, 64, 10, 50)
    common = lambda n_chains, n_steps=steps: ["--sites", str(sites), "--chains", str(n_chains), "--per-chain",
                                              str(per_chain), "--steps", str(n_steps)]
    system = {"model": "heisenberg", "lattice": "chain", "extent": [sites], "pbc": True, "J": 1.0, "units": "spin"}
    method = {"trial_state": "RBM alpha=1 real", "sampler": f"Metropolis exchange, {per_chain} samples per chain "
              "(JAX sweeps on simulated devices, compiled sweeps in the process runs)",
              "optimizer": "SR (dense), sgd 0.05"}
    records = []

    def record(kind, result, n_chains, **extra):
        n_samples, steps = n_chains * per_chain, len(result["energies"]) - 1
        rec = {"benchmark": "scaling", "kind": kind, "system": system, "method": method,
               "devices": result["devices"], "processes": result["processes"], "n_chains": n_chains,
               "samples_per_step": n_samples, "steps": steps, "step_seconds": result["seconds"] / steps,
               "samples_per_second": n_samples * steps / result["seconds"],
               "compile_seconds": result["compile_seconds"], "energy": result["energies"][-1],
               "seconds": result["seconds"] + result["compile_seconds"], **extra}
        records.append(emit(rec))
        return rec

    # agreement: simulated host devices, same total chains
    counts, reference, max_diff = [1, 2, 4, 8], None, 0.0
    for d in counts:
        progress(f"simulated host devices: {d}")
        res = _launch(common(chains, agree_steps), devices=d)
        if reference is None:
            reference = res["energies"]
        diff = max(abs(a - b) / abs(b) for a, b in zip(res["energies"], reference))
        max_diff = max(max_diff, diff)
        record("simulated_devices", res, chains, rel_energy_difference=diff,
               note="simulated devices share the same cores: agreement, not speed")

    # speed: one process per core
    cores = os.cpu_count()
    efficiencies = {}
    if cores >= 2:
        progress("1 process on 1 core")
        one = record("processes_strong", _launch(common(chains), processes=1), chains, cores=cores)
        progress("2 processes on 2 cores, same total chains (strong scaling)")
        two = record("processes_strong", _launch(common(chains), processes=2), chains, cores=cores)
        progress("2 processes on 2 cores, twice the chains (weak scaling)")
        weak = record("processes_weak", _launch(common(2 * chains), processes=2), 2 * chains, cores=cores)
        efficiencies = {"strong_efficiency_2": one["step_seconds"] / (2 * two["step_seconds"]),
                        "weak_efficiency_2": one["step_seconds"] / weak["step_seconds"]}
        progress(f"efficiencies: {efficiencies}")
    else:
        progress("fewer than 2 cores: no process scaling measured")
    summary(records, benchmark="scaling", device_counts=counts, max_rel_energy_difference=max_diff,
            cores=cores, **efficiencies)


if __name__ == "__main__":
    main()
