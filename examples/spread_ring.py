"""Heisenberg ring with the chains spread over every device of every process.

One machine, one process (all local GPUs, or simulated CPU devices):

    XLA_FLAGS=--xla_force_host_platform_device_count=4 python examples/spread_ring.py

One machine, N processes (one device each; here 2 on the CPU, gloo collectives):

    for i in 0 1; do python examples/spread_ring.py --coordinator localhost:12355 \\
        --processes 2 --process-id $i & done; wait

A cluster: ``examples/spread_ring.slurm`` (``srun`` starts one process per task; the process
reads its rank and the coordinator from SLURM's environment).
"""

import argparse
import os

from psiloom import parallel  # imports JAX but makes no JAX call: initialise first

parser = argparse.ArgumentParser()
parser.add_argument("--coordinator", default=None, help="host:port of process 0 (omit under SLURM)")
parser.add_argument("--processes", type=int, default=None)
parser.add_argument("--process-id", type=int, default=None)
parser.add_argument("--steps", type=int, default=100)
args = parser.parse_args()
if args.coordinator is not None:
    parallel.initialize(args.coordinator, args.processes, args.process_id)
elif os.environ.get("SLURM_NTASKS", "1") != "1":
    parallel.initialize()  # SLURM environment

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)
import optax  # noqa: E402

import psiloom as pl  # noqa: E402

mesh = parallel.sample_mesh(processes=jax.process_count())
n_devices = parallel.n_devices(mesh)
lattice = pl.lattices.chain(16, periodic=True)
space = pl.spaces.SpinSpace(16, magnetisation=0)
sampler = pl.sampling.MetropolisChains(space, n_chains=16 * n_devices, bonds=lattice.bonds)
optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-3), optax.sgd(0.05))
search = pl.train.GroundStateSearch(pl.states.RBM(alpha=2), pl.operators.heisenberg(lattice, marshall_basis=True),
                                    sampler, optimizer, n_samples=64 * sampler.n_chains, mesh=mesh)
# every process runs the same program; process 0 prints and writes the checkpoint
state, history = search.run(args.steps, key=jax.random.PRNGKey(0), checkpoint="spread_ring.ckpt", print_every=20)
energy, _ = search.evaluate(state, n_samples=16384)
if parallel.is_main_process():
    print(f"{n_devices} device(s) in {jax.process_count()} process(es): E = {energy}",
          "exact:", pl.reference.heisenberg_ring_energy(16))
