"""Benchmark: Heisenberg square lattices with a symmetric trial state.

H = J Σ_⟨ij⟩ S_i·S_j (S = σ/2, J = 1), periodic L × L, total Sᶻ = 0, Marshall sign rule.
Trial state: a translation-invariant RBM (α filters shared over the L² translations) projected
onto the A1 sector of the point group C4v — and, in full mode, onto spin-flip-even
states — with psiloom.states.Symmetrized, so the state lies in the sector k = 0, A1 (p = +1) of the
ground state. Optimised by stochastic reconfiguration.

References: 4×4 — exact diagonalisation in the same symmetry sector (psiloom.symmetry), which
also equals −11.2284832 (REFERENCES.md, from memory); 6×6 — −0.678872 J per site (Schulz, Ziman
& Poilblanc 1996, from memory).

Targets: rel. error ≤ 5e-5 (4×4) and ≤ 5e-4 (6×6) in ≤ 30 min on two CPU cores.
``--quick`` (< 2 min on two cores) runs short optimisations of both sizes; its errors are far
above the targets. Prints one JSON line per system and a summary line last (benchmarks/README.md).
"""

from __future__ import annotations

import jax

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402
import optax  # noqa: E402

import psiloom as pl  # noqa: E402
from psiloom import symmetry as sym  # noqa: E402
from _common import Timer, emit, lattice_system, parse_args, progress, relative_error, summary  # noqa: E402

#: Schulz, Ziman & Poilblanc 1996 (from memory), energy per site of the 6×6 Heisenberg model.
E_6X6_PER_SITE = -0.678872


def reference_energy(size: int) -> tuple[float, str]:
    if size == 4:
        lat = pl.lattices.square(4)
        space = pl.spaces.SpinSpace(16, magnetisation=0)
        ham = pl.operators.heisenberg(lat, marshall_basis=True)
        sector = sym.sector(sym.product(sym.space_group(lat), sym.spin_flip(lat)), (0, 0), "A1", 1)
        vals, _ = pl.reference.sector_eigenpairs(ham, space, sector)
        return float(vals[0]), "ED in the sector k=0, A1, p=+1 (psiloom.reference); -11.2284832 from memory"
    if size == 6:
        return E_6X6_PER_SITE * 36, "Schulz, Ziman & Poilblanc 1996 (from memory)"
    raise ValueError(f"no reference for {size}x{size}")


def run(size: int, alpha: int, n_steps: int, n_samples: int, eval_samples: int, spin_flip: bool,
        learning_rate: float, seed: int = 0, cache_float32: bool = False) -> dict:
    with Timer() as timer:
        lat = pl.lattices.square(size)
        space = pl.spaces.SpinSpace(size * size, magnetisation=0)
        ham = pl.operators.heisenberg(lat, marshall_basis=True)
        point = sym.point_group(lat)
        if spin_flip:
            point = sym.product(point, sym.spin_flip(lat))
        sector = sym.sector(point, None, "A1", 1)
        # cache_float32: fast-update caches in float32, parameters and estimators in float64
        base = pl.states.TranslationInvariantRBM(lat, alpha=alpha, cache_dtype=jnp.float32 if cache_float32 else None)
        model = pl.states.Symmetrized(base, sector)
        # sequential bond order: the same bond in every chain, so the projected state's fast updates
        # move each image through shared table rows (psiloom.states.symmetric)
        sampler = pl.sampling.MetropolisChains(space, n_chains=16, bonds=lat.bonds, burn_in=2, order="sequential")
        # gentle start (common practice): the learning rate rises over 50 steps while the SR shift
        # decays from 1e-2 to 1e-3; from a near-uniform state a full step at once can lock the
        # chains into a few configurations. Then a cosine decay to 0.2 × learning_rate.
        warmup = min(50, max(1, n_steps // 4))
        schedule = optax.join_schedules(
            [optax.linear_schedule(0.1 * learning_rate, learning_rate, warmup),
             optax.cosine_decay_schedule(learning_rate, max(1, n_steps - warmup), alpha=0.2)], [warmup])
        shift = optax.exponential_decay(1e-2, 100, 0.1, end_value=1e-3)
        optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=shift), optax.sgd(schedule))
        # per-sample log-derivatives in blocks of 64 samples (|G| images each); local energies
        # block themselves (psiloom.operators.local)
        search = pl.train.GroundStateSearch(model, ham, sampler, optimizer, n_samples=n_samples, chunk=64)
        progress(f"{size}x{size}: {len(point)} projected elements, alpha={alpha}, {n_steps} steps")
        state, _ = search.run(n_steps, key=jax.random.PRNGKey(seed), progress=progress, print_every=25)
        estimate, acceptance = search.evaluate(state, eval_samples, burn_in_sweeps=4)
        reference, source = reference_energy(size)
    energy = float(np.real(estimate.mean))
    return {
        "benchmark": "symmetric",
        "system": lattice_system("heisenberg", "square", [size, size], True, "spin", J=1.0),
        "method": {
            "trial_state": f"Symmetrized(TranslationInvariantRBM alpha={alpha}) onto {point.name} A1"
                           + (" p=+1" if spin_flip else ""),
            "sampler": "Metropolis nn-exchange, sequential bond order, 16 chains",
            "optimizer": f"SR shift 1e-2->1e-3 + sgd warm-up {0.1 * learning_rate:g}->{learning_rate} then cosine "
                         f"->{0.2 * learning_rate:g}",
            "tau": float(estimate.tau), "rhat": float(estimate.rhat), "acceptance": acceptance,
            "cache_dtype": "float32" if cache_float32 else "float64",
        },
        "energy": energy,
        "error_bar": float(estimate.error),
        "reference": reference,
        "reference_source": source,
        "rel_error": relative_error(energy, reference),
        "seconds": timer.seconds,
        "steps": n_steps,
        "samples_per_step": n_samples,
        "n_params": search.n_parameters(state),
    }


def main() -> None:
    def extra(parser):
        parser.add_argument("--only", choices=("4x4", "6x6"), default=None, help="run one size only")
        parser.add_argument("--alpha", type=int, default=None, help="override the filters per translation")
        parser.add_argument("--steps", type=int, default=None, help="override the optimisation steps")
        parser.add_argument("--samples", type=int, default=None, help="override the samples per step")

    args = parse_args("symmetric", "Heisenberg square lattices with a symmetric trial state", extra=extra)
    if args.quick:
        plans = {"4x4": dict(size=4, alpha=2, n_steps=120, n_samples=512, eval_samples=8192, spin_flip=False,
                             learning_rate=0.05),
                 "6x6": dict(size=6, alpha=2, n_steps=30, n_samples=512, eval_samples=4096, spin_flip=False,
                             learning_rate=0.05)}
    else:
        plans = {"4x4": dict(size=4, alpha=4, n_steps=600, n_samples=1024, eval_samples=65536, spin_flip=True,
                             learning_rate=0.05),
                 # 6x6 measured alone: float32 caches 4.0e-4 +- 0.6e-4 in 288 s; float64 caches (same
                 # code, another run sharing the machine) 3.1e-4 +- 0.6e-4 in 682 s
                 "6x6": dict(size=6, alpha=8, n_steps=600, n_samples=1024, eval_samples=32768, spin_flip=True,
                             learning_rate=0.05, cache_float32=True)}
    for plan in plans.values():
        for key, value in (("alpha", args.alpha), ("n_steps", args.steps), ("n_samples", args.samples)):
            if value is not None:
                plan[key] = value
    records = []
    for name, plan in plans.items():
        if args.only in (None, name):
            records.append(emit(run(**plan)))
    summary(records, benchmark="symmetric", quick=args.quick)


if __name__ == "__main__":
    main()
