"""Benchmark: periodic spin-1/2 Heisenberg ring, RBM + stochastic reconfiguration vs Bethe ansatz.

H = J Σ S_i·S_{i+1} (S = σ/2, J = 1), total Sᶻ = 0, Marshall sign rule.
Full mode: L = 100, α = 4. ``--quick``: L = 16, α = 2 (< 60 s on two cores).
Prints one JSON line for the system and a summary line last (benchmarks/README.md).
"""

from __future__ import annotations

import jax

jax.config.update("jax_enable_x64", True)

import optax  # noqa: E402

import psiloom as pl  # noqa: E402
from _common import Timer, emit, lattice_system, parse_args, progress, relative_error, summary  # noqa: E402


def run(n_sites: int, alpha: float, n_steps: int, n_samples: int, n_chains: int, eval_samples: int,
        solver: str, seed: int = 0) -> dict:
    with Timer() as timer:
        lattice = pl.lattices.chain(n_sites)
        space = pl.spaces.SpinSpace(n_sites, magnetisation=0)
        hamiltonian = pl.operators.heisenberg(lattice, marshall_basis=True)
        sampler = pl.sampling.MetropolisChains(space, n_chains=n_chains, bonds=lattice.bonds, burn_in=4)
        optimizer = optax.chain(
            pl.optimize.stochastic_reconfiguration(
            shift=optax.exponential_decay(0.1, 1, 0.9, end_value=1e-3), solver=solver),
            optax.sgd(optax.linear_schedule(0.02, 0.06, 60)),
        )
        search = pl.train.GroundStateSearch(pl.states.RBM(alpha=alpha), hamiltonian, sampler, optimizer,
                                            n_samples=n_samples)
        state, _ = search.run(n_steps, key=jax.random.PRNGKey(seed), progress=progress, print_every=50)
        estimate, acceptance = search.evaluate(state, eval_samples, burn_in_sweeps=8)
    reference = pl.reference.heisenberg_ring_energy(n_sites)
    return {
        "benchmark": "heisenberg_ring",
        "system": lattice_system("heisenberg", "chain", [n_sites], True, "spin", J=1.0),
        "method": {"trial_state": f"RBM alpha={alpha}", "sampler": f"Metropolis nn-exchange, {n_chains} chains",
                   "optimizer": f"SR ({solver}) + sgd 0.02->0.06", "tau": float(estimate.tau),
                   "rhat": float(estimate.rhat), "acceptance": acceptance},
        "energy": float(estimate.mean),
        "error_bar": float(estimate.error),
        "reference": reference,
        "reference_source": "Bethe ansatz (Bethe 1931), solved numerically",
        "rel_error": relative_error(estimate.mean, reference),
        "seconds": timer.seconds,
        "steps": n_steps,
        "samples_per_step": n_samples,
        "n_params": search.n_parameters(state),
    }


def main() -> None:
    args = parse_args("heisenberg_ring", "Heisenberg ring: RBM + SR against the Bethe ansatz")
    if args.quick:
        record = run(16, 2, 250, 1024, 16, 16384, "dense")
    else:
        record = run(100, 4, 1500, 2048, 32, 65536, "sample_space")
    summary([emit(record)], benchmark="heisenberg_ring", quick=args.quick)


if __name__ == "__main__":
    main()
