"""Worker for tests/test_parallel.py: short runs on a sample mesh, printed as one JSON line.

Run in a fresh interpreter, because the number of simulated host devices must be fixed before
JAX is imported:

    python tests/parallel_worker.py --devices 4 [--checkpoint PATH] [--resume PATH] [--no-mesh]
    python tests/parallel_worker.py --process-id 0 --num-processes 2 --port 12345

The first form sets ``XLA_FLAGS=--xla_force_host_platform_device_count=4``; the second joins a
multi-process run over localhost (one CPU device per process, gloo collectives). Each check
records energies and final parameters (as lists of floats) so that the test can compare device
counts; process 0 prints the JSON line.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time


def parse():
    p = argparse.ArgumentParser()
    p.add_argument("--devices", type=int, default=1)
    p.add_argument("--checkpoint", default=None)
    p.add_argument("--process-id", type=int, default=None)
    p.add_argument("--num-processes", type=int, default=None)
    p.add_argument("--port", type=int, default=None)
    p.add_argument("--resume", default=None)
    p.add_argument("--no-mesh", action="store_true", help="plain run without a sample mesh (one device)")
    p.add_argument("--checks", default="train,cg,compiled,electron,errors")
    return p.parse_args()


ARGS = parse()
# compilation dominates these tiny runs: XLA's backend optimisation off (every worker alike) makes it
# ~2x cheaper; the device-count flag only applies to single-process runs
flags = os.environ.get("XLA_FLAGS", "") + " --xla_backend_optimization_level=0"
if ARGS.process_id is None:
    flags += f" --xla_force_host_platform_device_count={ARGS.devices}"
os.environ["XLA_FLAGS"] = flags.strip()

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)
from psiloom import parallel  # noqa: E402

if ARGS.process_id is not None:
    parallel.initialize(f"localhost:{ARGS.port}", ARGS.num_processes, ARGS.process_id, timeout=60)

import numpy as np  # noqa: E402
import optax  # noqa: E402
from jax.sharding import PartitionSpec  # noqa: E402

import psiloom as pl  # noqa: E402
from psiloom import electrons as el  # noqa: E402
from psiloom.optimize.flatten import ravel_real  # noqa: E402
from psiloom.sampling import compiled as rbm_sweep  # noqa: E402
from psiloom.train import GroundStateSearch  # noqa: E402

L = 6
N_CHAINS = 8
MESH = None if ARGS.no_mesh else parallel.sample_mesh(processes=ARGS.num_processes)
D = parallel.n_devices(MESH)


def flat(params):
    return [float(v) for v in parallel.to_host(ravel_real(params)[0])]


def placement_ok(state, search):
    """Chains sharded along the leading axis, parameters and key replicated (True without sharding)."""
    if D == 1:
        return True
    chain_leaves = [leaf for leaf in jax.tree_util.tree_leaves(state.chains) if leaf.ndim >= 1]
    sharded = all(leaf.sharding.spec[:1] == PartitionSpec(parallel.SAMPLE_AXIS)[:1] for leaf in chain_leaves)
    replicated = all(leaf.sharding.is_fully_replicated for leaf in jax.tree_util.tree_leaves(
        (state.params, state.opt_state, state.key)))
    return bool(sharded and replicated)


def lattice_search(optimizer, model, compiled=False, mesh=MESH, n_chains=N_CHAINS):
    lat = pl.lattices.chain(L)
    space = pl.spaces.SpinSpace(L, magnetisation=0)
    sampler = pl.sampling.MetropolisChains(space, n_chains=n_chains, bonds=lat.bonds, burn_in=1,
                                            compiled_sweeps=compiled)
    return GroundStateSearch(model, pl.operators.heisenberg(lat), sampler, optimizer, n_samples=4 * n_chains,
                             mesh=mesh)


def sr(solver, lr=0.05, **options):
    return optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2, solver=solver, **options), optax.sgd(lr))


def check_train():
    """Complex RBM (JAX sampling path), dense SR: two steps, a checkpoint, two more steps and an
    evaluation; with ``--resume`` also the last two steps again from a checkpoint (written with
    another device count)."""
    search = lattice_search(sr("dense"), pl.states.RBM(alpha=1.0, complex_params=True, init_scale=0.05))
    state, history = search.run(2, key=jax.random.PRNGKey(0), progress=False, checkpoint=ARGS.checkpoint)
    placed = placement_ok(state, search)
    state, history = search.run(4, state=state, history=history, progress=False)
    est, acc = search.evaluate(state, n_samples=4 * N_CHAINS)
    out = {"energies": [float(v) for v in history["energy"]], "params": flat(state.params),
           "eval": float(np.real(est.mean)), "acceptance": acc, "placed": placed and placement_ok(state, search),
           "compilations": compilations(search)}
    if ARGS.resume:
        resumed, history = search.resume(ARGS.resume)
        resumed, history = search.run(4, state=resumed, history=history, progress=False)
        out["resumed"] = {"energies": [float(v) for v in history["energy"]], "params": flat(resumed.params)}
    return out


def compilations(search):
    """How often the training loop's step program was compiled (1 when the state keeps its
    placement from step to step)."""
    return sum(program._cache_size() for program in search._multi.values())


def record(search, n_steps):
    state, history = search.run(n_steps, key=jax.random.PRNGKey(0), progress=False)
    return {"energies": [float(v) for v in history["energy"]], "params": flat(state.params),
            "placed": placement_ok(state, search), "compilations": compilations(search)}


def check_cg():
    """Real RBM on the JAX sampling path, matrix-free CG solver with a carried-over direction
    (``momentum``, the previous δ kept in the replicated optimiser state) and a warm start."""
    return record(lattice_search(sr("cg", momentum=0.5, warm_start=True),
                                 pl.states.RBM(alpha=1.0, init_scale=0.1)), 3)


def check_compiled():
    """Real RBM with the compiled (Numba) sweeps, sample-space SR with the Gram matrix in float32
    (refined three times: float64 agreement across device counts); records how many chains each
    call of the kernel receives (seen when the call is traced: one trace per device block shape)."""
    calls = []
    host = rbm_sweep._foreign_sweeps

    def spy(name, dtype, kind, table, messages, n_sweeps, x, *rest):
        calls.append(int(np.shape(x)[0]))
        return host(name, dtype, kind, table, messages, n_sweeps, x, *rest)

    rbm_sweep._foreign_sweeps = spy
    try:
        search = lattice_search(sr("sample_space", gram_dtype="float32", refinement_steps=3),
                                pl.states.RBM(alpha=1.0, init_scale=0.1), compiled=True)
        out = record(search, 2)
    finally:
        rbm_sweep._foreign_sweeps = host
    out["chains_per_host_call"] = sorted(set(calls))
    return out


def check_electron():
    """Hydrogen atom, Slater-Jastrow state, walkers sharded, dense SR."""
    system = el.atom("H")
    model = el.slater_jastrow(system, neural_jastrow=False)
    sampler = el.ElectronSampler(system, n_chains=N_CHAINS, sweep=2, burn_in=1, equilibrate=5)
    search = GroundStateSearch(model, el.CoulombHamiltonian(system), sampler, sr("dense", 0.1),
                               n_samples=4 * N_CHAINS, mesh=MESH)
    return record(search, 2)


def check_global():
    """Chains made by each process for itself, joined into global arrays and gathered back."""
    pid = jax.process_index()
    local = {"x": np.arange(12.0).reshape(4, 3) + 100 * pid, "step_size": np.float64(0.5)}
    joined = parallel.global_chains(local, MESH)
    host = parallel.to_host(joined)
    return {"x": host["x"].tolist(), "step_size": float(host["step_size"]),
            "sharded": joined["x"].sharding.spec[:1] == PartitionSpec(parallel.SAMPLE_AXIS)[:1]}


def check_errors():
    out = {}
    try:
        lattice_search(sr("dense"), pl.states.RBM(alpha=1.0), n_chains=D + 2 if D > 2 else 3)
    except ValueError as err:
        out["indivisible"] = str(err)
    try:
        parallel.sample_mesh(processes=2)
    except RuntimeError as err:
        out["not_initialised"] = str(err)
    return out


CHECKS = {"train": check_train, "cg": check_cg, "compiled": check_compiled, "electron": check_electron,
          "errors": check_errors, "global": check_global}

result = {"devices": D, "processes": jax.process_count()}
for name in ARGS.checks.split(","):
    start = time.perf_counter()
    result[name] = CHECKS[name]()
    result.setdefault("seconds", {})[name] = round(time.perf_counter() - start, 2)
if parallel.is_main_process():
    print(json.dumps(result), flush=True)
sys.stdout.flush()
