"""Demo: ground state of the periodic spin-1/2 Heisenberg ring with an RBM and SR.

H = J Σ_i S_i · S_{i+1} (spin-1/2 operators, J = 1), L = 20 sites, total Sᶻ = 0.
The Marshall sign rule makes the ground state positive, so a real RBM suffices.
The exact energy comes from the Bethe ansatz (Bethe 1931), solved by psiloom.reference.

Run:  python examples/ring_demo.py   (about 35 s on an idle 2-core CPU, compilation included;
      two to four times longer when the machine is busy)
"""

import sys
import time

import jax

jax.config.update("jax_enable_x64", True)  # float64: SR solves and 1e-5 energies need it

import optax  # noqa: E402

import psiloom as pl  # noqa: E402


def main(n_sites: int = 20, n_steps: int = 300, seed: int = 0) -> float:
    start = time.perf_counter()
    lattice = pl.lattices.chain(n_sites, periodic=True)
    space = pl.spaces.SpinSpace(n_sites, magnetisation=0)
    hamiltonian = pl.operators.heisenberg(lattice, J=1.0, marshall_basis=True)
    model = pl.states.RBM(alpha=2)
    sampler = pl.sampling.MetropolisChains(space, n_chains=16, bonds=lattice.bonds, burn_in=4)
    optimizer = optax.chain(
        pl.optimize.stochastic_reconfiguration(
            shift=optax.exponential_decay(0.1, 1, 0.9, end_value=1e-3)),
        optax.sgd(optax.linear_schedule(0.02, 0.06, 60)),
    )
    search = pl.train.GroundStateSearch(model, hamiltonian, sampler, optimizer, n_samples=1024)

    print(f"Heisenberg ring, L = {n_sites}, periodic, RBM alpha = 2, stochastic reconfiguration")
    state, history = search.run(n_steps, key=jax.random.PRNGKey(seed), print_every=25)
    print(f"trial state: {search.n_parameters(state)} real parameters")

    estimate, acceptance = search.evaluate(state, n_samples=32768, burn_in_sweeps=8)
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
    sys.exit(0 if main() < 1e-3 else 1)
