"""Demo: ground state of the periodic spin-1/2 Heisenberg ring with an RBM and SR.

H = J Σ_i S_i · S_{i+1} (spin-1/2 operators, J = 1), L = 20 sites, total Sᶻ = 0.
The Marshall sign rule makes the ground state positive, so a real RBM suffices. The rotated
ground state is also invariant under translations for every even L (a translation swaps the
sublattices, so the rotation's sign changes by (−1)^{L/2}, which the ground state's momentum,
0 for L = 4n and π for L = 4n + 2 (from memory), cancels), so the RBM's weights are shared over
the L translations: α = 2 filters, 2L + 3 parameters instead of 2L² + 3L for the dense RBM with
the same 2L hidden units (``--state dense`` runs that one).
The exact energy comes from the Bethe ansatz (Bethe 1931), solved by psiloom.reference.

Run:  python examples/ring_demo.py [--sites 20] [--state symmetric|dense] [--steps N] [--seed 0]
      (compilation included; the README's speed table says how long it takes, and
      benchmarks/time_to_accuracy.py measures it against a plain JAX script.) Compiled programs
      are kept in ~/.cache/psiloom, so a second run skips most of the compilation.
"""

import argparse
import sys
import time

import jax

jax.config.update("jax_enable_x64", True)  # float64: SR solves and 1e-5 energies need it

import optax  # noqa: E402

import psiloom as pl  # noqa: E402

# steps enough for a relative error below 2e-4 at L = 16 and 20 (benchmarks/time_to_accuracy.py):
# 75 steps gave 1.5e-5 (L = 16) and 2.7e-5 to 9.2e-5 (L = 20) over seeds 0-2; 60 steps up to 1.4e-4
STEPS = {"symmetric": 75, "dense": 200}


def main(n_sites: int = 20, n_steps: int | None = None, seed: int = 0, state_kind: str = "symmetric") -> float:
    start = time.perf_counter()
    pl.compilation.enable_compilation_cache()  # compiled programs kept on disk for the next run
    lattice = pl.lattices.chain(n_sites, periodic=True)
    space = pl.spaces.SpinSpace(n_sites, magnetisation=0)
    hamiltonian = pl.operators.heisenberg(lattice, J=1.0, marshall_basis=True)
    if state_kind == "symmetric":
        model = pl.states.TranslationInvariantRBM(lattice, alpha=2)
    elif state_kind == "dense":
        model = pl.states.RBM(alpha=2)
    else:
        raise ValueError(f"state_kind must be 'symmetric' or 'dense', got {state_kind!r}")
    n_steps = STEPS[state_kind] if n_steps is None else n_steps
    # 64 chains x 16 samples: fewer sequential sweeps per step than 32 x 32 (a step is ~25%
    # faster at L = 16-20); learning rate rising to 0.1 and the SR shift falling 0.8x per step
    # converged in fewer steps (benchmarks/time_to_accuracy.py notes what each choice was weighed
    # against). At this size the sweeps run in JAX (compiled_sweeps="auto", see MetropolisChains).
    sampler = pl.sampling.MetropolisChains(space, n_chains=64, bonds=lattice.bonds, burn_in=2)
    optimizer = optax.chain(
        pl.optimize.stochastic_reconfiguration(
            shift=optax.exponential_decay(0.1, 1, 0.8, end_value=1e-3)),
        optax.sgd(optax.linear_schedule(0.05, 0.1, 60)),
    )
    search = pl.train.GroundStateSearch(model, hamiltonian, sampler, optimizer, n_samples=1024)

    name = "translation-invariant RBM" if state_kind == "symmetric" else "RBM"
    print(f"Heisenberg ring, L = {n_sites}, periodic, {name} alpha = 2, stochastic reconfiguration")
    state, history = search.run(n_steps, key=jax.random.PRNGKey(seed), print_every=25)
    print(f"trial state: {search.n_parameters(state)} real parameters")

    # sample until the error bar is 5e-4 (a relative 6e-5 at L = 20), reusing the training program
    estimate, acceptance = search.evaluate(state, target_error=5e-4, max_samples=65536)
    exact = pl.reference.heisenberg_ring_energy(n_sites)
    rel = abs(float(estimate.mean) - exact) / abs(exact)
    print()
    print(f"VMC energy      {estimate}")
    print(f"exact (Bethe)   {exact:+.8f}")
    print(f"relative error  {rel:.2e}")
    print(f"per site        {float(estimate.mean) / n_sites:+.6f}  (infinite ring: {pl.reference.HULTHEN_ENERGY_PER_SITE:+.6f})")
    print(f"wall time       {time.perf_counter() - start:.1f} s")
    for warning in estimate.warnings():
        print(f"warning: {warning}")
    return rel


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description="RBM ground state of the Heisenberg ring")
    parser.add_argument("--sites", type=int, default=20, help="ring length L (even)")
    parser.add_argument("--state", choices=("symmetric", "dense"), default="symmetric",
                        help="translation-invariant RBM (default) or dense RBM, both alpha = 2")
    parser.add_argument("--steps", type=int, default=None, help="optimisation steps (default 75 symmetric, 200 dense)")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    sys.exit(0 if main(args.sites, args.steps, args.seed, args.state) < 1e-3 else 1)
