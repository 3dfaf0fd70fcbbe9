"""Benchmark: fermions in second quantisation — Hubbard models and molecules in a Gaussian basis.

Cases (one JSON line each, benchmarks/README.md; ``--case NAME`` runs some of the full ones; with
``--save PATH`` the lines are written after every case):

* Hubbard rings at half filling, U = 4t, neural backflow determinant vs exact diagonalisation
  (full: L = 8 and L = 12; ``--quick``: L = 6), Metropolis hops along bonds; the Lieb & Wu (1968)
  infinite-chain energy per site is reported beside the ring as ``lieb_wu_per_site``.
* Hubbard 4×4 square lattice, U = 4t, half filling (full only): energy per site against the
  exact-diagonalisation value E/site = −0.8514 (from memory; ED of the 4×4 periodic cluster).
* Molecules in STO-3G against PySCF's FCI in the same basis, with **exact sums** over the whole
  sector (:class:`psiloom.sampling.ExactEnumeration`: energy, gradient and S without noise; the
  line's ``method.estimator`` says so): H2O at its experimental geometry (441 configurations),
  N2 at 1.0977 Å and at 0.9, 1.3, 1.7, 2.2 Å with the two N 1s orbitals frozen (3136
  configurations; the reference is then PySCF's CASCI in the same frozen-core space; the largest
  error of the curve is in the summary). The backflow starts at the Hartree-Fock orbitals with
  heads of 1e-3 noise (energy ≈ E_HF, no longer a stationary point). ``--quick``: LiH with exact
  sums and LiH with Metropolis any-orbital hops (the sampled route).
* Throughput of Metropolis hop proposals for a Slater determinant with and without the
  Sherman-Morrison fast updates (ratio).

Targets (the issue's): ≤ 1e-3 relative on the rings, ≤ 1e-2 on 4×4, ≤ 1 mHa on molecules.

Hubbard cases: the determinant starts at the unrestricted Hartree-Fock solution
(:func:`psiloom.fermions.hubbard_mean_field`, Néel start): the U = 0 shell of these lattices is open.
SR with a fixed shift 1e-3 and no trust radius, sgd 0.15, 64 chains × 1024 samples per step.
Measured 2026-12-04 (load 2-4): ring L=8 7.0e-4 ± 1.9e-4 relative (800 steps, 8 min; met).
4×4: the backflow alone stalls at 1.8-2.2e-2 (1000 steps of hidden 16; hidden 32, an RBM
correlator multiplied in, a U = 2 mean-field start, a lower rate: none below 1.6e-2); 250 steps of
it and then 400 of its projection on the ground state's sector (:func:`square_projection`, 16
evaluations per configuration, 5.5 s per step) gave 6.5e-3 ± 0.3e-3 (45 min, load ≈ 2, 10 GB
resident; met). With a trust radius of 1 (lr 0.05) the 8-site ring stalled near 3e-2. Ring L=12:
without projection 1.56e-2 (1200 steps, 20 min, flat from step ~400); projected on its ground
state's sector (:func:`ring_projection`, 4 evaluations per configuration) and with the rate dropped
to 0.03 from step 700, 7.3e-4 ± 0.9e-4 (1000 steps, 131072 evaluation samples, 11 min; met;
2026-12-04, a CI run beside it).

Measured (2-core machine shared with other benchmarks, load 6–10), exact sums, N2 with frozen core:
H2O 0.004 mHa (150 steps, 242 s); N2 at 1.0977 Å 0.41 mHa (150 steps, 828 s); N2 curve after
100 steps: 0.9 Å 0.49, 1.3 Å 1.15, 1.7 Å 12.8, 2.2 Å 56.5 mHa (the stretched bonds need more
steps or a larger network; not met). Lines: ``benchmarks/results/fermions*.json``.
"""

from __future__ import annotations

import os
import time

import jax

jax.config.update("jax_enable_x64", True)

import numpy as np  # noqa: E402
import optax  # noqa: E402

import psiloom as pl  # noqa: E402
from psiloom import fermions as fm  # noqa: E402
from _common import Timer, emit, parse_args, progress, relative_error, save_results, summary  # noqa: E402

HUBBARD_U = 4.0  # every Hubbard case: U = 4t, half filling
SQUARE_4x4_U4_PER_SITE = -0.8514  # ED of the periodic 4×4 Hubbard cluster at U = 4t, half filling (from memory)


def _optimizer(lr: float, steps: int):
    return optax.chain(pl.optimize.stochastic_reconfiguration(shift=optax.exponential_decay(1e-2, steps // 4, 0.1,
                                                                                            end_value=1e-4)),
                       optax.sgd(lr))


def _train(model, hamiltonian, space, move, steps, samples, chains, eval_samples, lr, seed=0, start=None,
           optimizer=None, params=None):
    """Train ``model`` for ``steps`` and evaluate it on ``eval_samples`` (``eval_samples=0``: no
    evaluation, ``estimate`` and ``acceptance`` are None). ``start``: a configuration or a
    ``(chains, n_sites)`` batch the chains start from; ``params``: initial parameters."""
    sampler = pl.sampling.MetropolisChains(space, n_chains=chains, move=move, burn_in=2)
    optimizer = _optimizer(lr, steps) if optimizer is None else optimizer
    search = pl.train.GroundStateSearch(model, hamiltonian, sampler, optimizer, n_samples=samples)
    state = search.init(jax.random.PRNGKey(seed), params)
    if start is not None:  # chains start at given configurations (e.g. the HF determinant)
        x = jax.numpy.asarray(start, state.chains.x.dtype)
        x = jax.numpy.tile(x, (chains, 1)) if x.ndim == 1 else x
        state = state._replace(chains=sampler.refresh(state.chains._replace(x=x), pl.states.BoundState(model, state.params)))
    state, _ = search.run(steps, state=state, progress=progress, print_every=max(1, steps // 10))
    if not eval_samples:
        return search, state, None, None
    estimate, acceptance = search.evaluate(state, eval_samples, burn_in_sweeps=4)
    return search, state, estimate, acceptance


def ring_projection(lattice):
    """The projection of the half-filled 4n-site ring (N↑ = N↓ even, periodic): the ground state's
    sector (momentum π, odd under the site mirror, even under the spin exchange; checked by ED
    for L = 8 and 12, tests/test_fermion_symmetry.py) on the 4 elements generated by the mirror
    and the spin exchange. On L = 12 (300 steps, 1024 samples) this reached 2.3e-3 against 2.0e-2
    without projection; adding the translation by L/2 (8 elements) was no better after 100 steps
    at twice the cost."""
    group = pl.symmetry.product(pl.symmetry.point_group(lattice), pl.symmetry.spin_flip(lattice))
    return pl.symmetry.sector(group, point_irrep="odd", spin_parity=1)


def square_projection(lattice):
    """The projection of the half-filled periodic 4×4 lattice: the 16 elements of the point group
    C4v times the spin exchange, trivial irrep A1, spin parity +1. The sector: the unprojected
    backflow (Néel start, 250 steps) has weight 0.498(4) in (k = 0, A1, p = +1) and 0.499(5) in
    (k = (π, π), A1, p = −1) and < 3e-4 in every other real sector of the space group × spin
    exchange (measured as E_|ψ|²[ψ_χ/ψ] on 4096 samples): the Néel state's two halves. The
    ground state of a half-filled bipartite Hubbard model is a singlet (Lieb, PRL 62, 1201
    (1989), from memory), whose spin-exchange parity is (−1)^{N/2} = +1 for N = 16 (as for the
    rings, checked by ED in tests/test_fermion_symmetry.py), so the ground state is in the first;
    the second holds the triplet. On 16 translations (k = 0) the same warm start gained as much (1.54e-2 against
    1.45e-2 after 50 steps) at the same cost."""
    group = pl.symmetry.product(pl.symmetry.point_group(lattice), pl.symmetry.spin_flip(lattice))
    return pl.symmetry.sector(group, point_irrep="A1", spin_parity=1)


def hubbard_case(extent, steps, samples, chains, eval_samples, hidden, lr, reference=None, source="ED",
                 projection=None, lower_lr_at=None, warm_steps=0) -> dict:
    """One Hubbard case (U = 4t, half filling): backflow × Jastrow from the Néel UHF start, SR.

    ``projection``: a function lattice -> Sector; the trained state is then the fermionic
    projection of the backflow. ``lower_lr_at``: the rate drops to lr/5 at that step.
    ``warm_steps``: with a projection, first train the backflow alone for ``warm_steps`` (lr, then
    lr/5 from step ``lower_lr_at``), then train the projected state from there for ``steps`` at
    lr/5 (a projected step costs |G| unprojected ones)."""
    with Timer() as timer:
        lattice = pl.lattices.chain(extent[0]) if len(extent) == 1 else pl.lattices.square(*extent)
        n = lattice.n_sites
        space = fm.FermionSpace(n, n // 2, n // 2)
        H = fm.hubbard(lattice, t=1.0, U=HUBBARD_U)
        if reference is None:
            progress(f"ED of {space!r} ({space.size} states)")
            reference, _ = pl.reference.ground_state(H, space, tol=1e-10)
        # unrestricted Hartree-Fock (Néel start): the U = 0 shell of these rings and of 4×4 is open
        mean_field = fm.hubbard_mean_field(space, fm.one_body_matrix(H), HUBBARD_U, pattern=2 * lattice.sublattice - 1)
        model = fm.BackflowDeterminant(space, mean_field.guess, hidden=hidden, jastrow=True)
        move = fm.Hop.along(lattice.bonds, space)
        # constant shift 1e-3, no trust radius: on the 8-site ring this went on down to 2e-3 in 300
        # steps at lr 0.15, while a trust radius of 1 (or the decaying shift) stalled near 3e-2
        # lower_lr_at: the rate drops to lr/5 there; its noise floor set the 4×4 plateau (2.3e-2 at
        # lr 0.15, 1.9e-2 within 50 steps of the drop)
        def descent(rate):
            return optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-3), optax.sgd(rate))

        optimizer = descent(lr if lower_lr_at is None else optax.piecewise_constant_schedule(lr, {lower_lr_at: 0.2}))
        params = start = None
        if warm_steps:  # the unprojected backflow first; its parameters become the projected base's
            if projection is None:
                raise ValueError("warm_steps needs a projection")
            progress(f"warm start: {warm_steps} unprojected steps")
            _, warm, _, _ = _train(model, H, space, move, warm_steps, samples, chains, 0, lr, optimizer=optimizer)
            params, start = {"params": {"base": warm.params["params"]}}, warm.chains.x
            optimizer = descent(lr / 5)
        if projection is not None:  # lattice -> Sector of lattice symmetries (fermionic signs)
            projection = projection(lattice)
            model = fm.FermionSymmetrized(model, space, projection)
        search, state, est, acc = _train(model, H, space, move, steps, samples, chains, eval_samples, lr,
                                         optimizer=optimizer, params=params, start=start)
    record = {
        "benchmark": "fermions",
        "system": {"model": "hubbard", "lattice": lattice.kind, "extent": list(extent), "pbc": True, "t": 1.0,
                   "U": HUBBARD_U, "n_up": space.n_up, "n_down": space.n_down},
        "method": {"trial_state": f"backflow determinant (hidden={hidden}) x density Jastrow, UHF orbitals"
                   + ("" if projection is None else f", projected on {projection.label} of {projection.group.name} "
                                                    f"({len(projection.group)} elements)"),
                   "mean_field_energy": mean_field.energy,
                   "sampler": f"Metropolis hops along bonds, {chains} chains", "optimizer": "SR shift 1e-3 + sgd: "
                   + (f"{warm_steps} unprojected steps at " if warm_steps else "") + f"{lr:g}"
                   + ("" if lower_lr_at is None else f" ({lr / 5:g} from step {lower_lr_at})")
                   + (f", then {steps} projected steps at {lr / 5:g}" if warm_steps else ""),
                   "tau": float(est.tau), "rhat": float(est.rhat), "acceptance": acc},
        "energy": float(np.real(est.mean)), "error_bar": float(est.error), "reference": float(reference),
        "reference_source": source, "rel_error": relative_error(float(np.real(est.mean)), float(reference)),
        "seconds": timer.seconds, "steps": steps + warm_steps, "samples_per_step": samples,
        "n_params": search.n_parameters(state),
    }
    if len(extent) == 1:
        record["lieb_wu_per_site"] = pl.reference.hubbard_chain_energy_per_site(4.0)
    return record


LIH = [("Li", (0.0, 0.0, 0.0)), ("H", (0.0, 0.0, 1.5949))]  # Å, experiment
H2O = [("O", (0.0, 0.0, 0.0)), ("H", (0.0, 0.7572, 0.5865)), ("H", (0.0, -0.7572, 0.5865))]  # Å, experiment


def n2(bond: float):
    return [("N", (0.0, 0.0, 0.0)), ("N", (0.0, 0.0, bond))]


def _perturb_heads(params, scale=1e-3, seed=0):
    """Backflow heads (zero at init) set to ``scale`` × standard normal numbers, the rest untouched:
    the state starts as its mean-field determinant (E ≈ E_HF for HF orbitals) but is no longer an
    exact stationary point with zero amplitude away from the HF configuration."""
    leaves, tree = jax.tree_util.tree_flatten_with_path(params)
    keys = jax.random.split(jax.random.PRNGKey(seed), len(leaves))
    out = [v + scale * jax.random.normal(k, v.shape, v.dtype) if "head" in jax.tree_util.keystr(path) else v
           for (path, v), k in zip(leaves, keys)]
    return jax.tree_util.tree_unflatten(jax.tree_util.tree_structure(params), out)


def exact_molecule_case(name, atoms, steps, hidden, lr, n_frozen=0, shift=1e-3, trust=1.0) -> dict:
    """Backflow determinant trained with exact sums over the whole sector (ExactEnumeration):
    noise-free energy, gradient and S; started at the HF orbitals with slightly perturbed heads."""
    with Timer() as timer:
        problem = fm.molecular_hamiltonian(atoms, "sto-3g", units="angstrom", n_frozen=n_frozen)
        reference = problem.fci_energy()
        progress(f"{name}: {problem.space!r} ({problem.space.size} configurations), frozen core {n_frozen}; "
                 f"HF {problem.hartree_fock_energy:.6f}, FCI {reference:.6f}")
        model = fm.BackflowDeterminant(problem.space, problem.hartree_fock_guess(), hidden=hidden)
        sampler = pl.sampling.ExactEnumeration(problem.space)
        optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=shift, solver="dense",
                                                                       max_metric_norm=trust), optax.sgd(lr))
        search = pl.train.GroundStateSearch(model, problem.hamiltonian, sampler, optimizer,
                                            n_samples=sampler.n_chains)
        key = jax.random.PRNGKey(0)
        params = _perturb_heads(jax.jit(model.init)(key, jax.numpy.asarray(problem.hartree_fock_configuration())[None]))
        state = search.init(key, params)
        state, _ = search.run(steps, state=state, progress=progress, print_every=max(1, steps // 10))
        est, _ = search.evaluate(state, sampler.n_chains)
    energy = float(np.real(est.mean))
    return {
        "benchmark": "fermions",
        "system": {"model": "molecule_basis", "name": name, "basis": "sto-3g",
                   "atoms": [[s, list(p)] for s, p in problem.atoms], "units": "bohr",
                   "n_up": problem.space.n_up, "n_down": problem.space.n_down, "n_frozen": n_frozen,
                   "n_orbitals": problem.space.n_orbitals},
        "method": {"trial_state": f"backflow determinant (hidden={hidden}), HF orbitals, heads 1e-3 noise",
                   "estimator": f"exact sums over all {problem.space.size} configurations (ExactEnumeration)",
                   "optimizer": f"SR dense shift {shift}, trust radius {trust} + sgd {lr}",
                   "hartree_fock": problem.hartree_fock_energy},
        "energy": energy, "error_bar": 0.0, "reference": reference,
        "reference_source": "PySCF FCI, same basis" + (f" and frozen core ({n_frozen} orbitals, CASCI)" if n_frozen else ""),
        "rel_error": relative_error(energy, reference),
        "abs_error_mha": abs(energy - reference) * 1000.0, "seconds": timer.seconds, "steps": steps,
        "samples_per_step": sampler.n_chains, "n_params": search.n_parameters(state),
        "loadavg": list(os.getloadavg()),
    }


def molecule_case(name, atoms, steps, samples, chains, eval_samples, hidden, lr, noise=0.2) -> dict:
    with Timer() as timer:
        problem = fm.molecular_hamiltonian(atoms, "sto-3g", units="angstrom")
        reference = problem.fci_energy()
        progress(f"{name}: {problem.space!r}, {problem.hamiltonian!r}, max connections "
                 f"{problem.hamiltonian.max_connections}; HF {problem.hartree_fock_energy:.6f}, FCI {reference:.6f}")
        model = fm.BackflowDeterminant(problem.space, problem.hartree_fock_guess(noise=noise), hidden=hidden)
        search, state, est, acc = _train(model, problem.hamiltonian, problem.space, fm.any_hop(), steps, samples,
                                         chains, eval_samples, lr, start=problem.hartree_fock_configuration())
    energy = float(np.real(est.mean))
    return {
        "benchmark": "fermions",
        "system": {"model": "molecule_basis", "name": name, "basis": "sto-3g",
                   "atoms": [[s, list(p)] for s, p in problem.atoms], "units": "bohr",
                   "n_up": problem.space.n_up, "n_down": problem.space.n_down},
        "method": {"trial_state": f"backflow determinant (hidden={hidden}), HF orbitals + noise {noise}",
                   "sampler": f"Metropolis any-orbital hops, {chains} chains", "optimizer": f"SR + sgd {lr}",
                   "hartree_fock": problem.hartree_fock_energy, "tau": float(est.tau), "acceptance": acc},
        "energy": energy, "error_bar": float(est.error), "reference": reference,
        "reference_source": "PySCF FCI, same basis", "rel_error": relative_error(energy, reference),
        "abs_error_mha": abs(energy - reference) * 1000.0, "seconds": timer.seconds, "steps": steps,
        "samples_per_step": samples, "n_params": search.n_parameters(state),
    }


def throughput_case(extent, chains, sweeps) -> dict:
    lattice = pl.lattices.square(*extent)
    n = lattice.n_sites
    space = fm.FermionSpace(n, n // 2, n // 2)
    model = fm.SlaterDeterminant(space)
    params = model.init(jax.random.PRNGKey(0), space.random(jax.random.PRNGKey(1), 1))
    sampler = pl.sampling.MetropolisChains(space, n_chains=chains, bonds=lattice.bonds)
    rates = {}
    for fast in (True, False):
        bound = pl.states.BoundState(model, params, fast=fast)
        run = jax.jit(lambda key, st, b: sampler.sample(key, st, b, sweeps)[:3])
        st = sampler.init(jax.random.PRNGKey(2), bound)
        jax.block_until_ready(run(jax.random.PRNGKey(3), st, bound))  # compile
        t0 = time.perf_counter()
        jax.block_until_ready(run(jax.random.PRNGKey(4), st, bound))
        rates[fast] = sweeps * sampler.sweep * chains / (time.perf_counter() - t0)
    return {"benchmark": "fermions", "system": {"model": "hubbard", "lattice": "square", "extent": list(extent),
                                                "pbc": True, "n_up": space.n_up, "n_down": space.n_down},
            "method": {"trial_state": "Slater determinant", "sampler": f"Metropolis hops, {chains} chains"},
            "metric": "hop proposals per second, fast determinant updates", "value": rates[True],
            "unit": "proposals/s", "baseline": rates[False], "ratio": rates[True] / rates[False]}


CASES = ("hubbard8", "hubbard12", "square4x4", "h2o", "n2", "n2-curve", "throughput")
N2_BONDS = (1.3, 0.9, 1.7, 2.2)  # Å; with the equilibrium 1.0977 Å (case "n2") five bond lengths


def _cases(parser) -> None:
    parser.add_argument("--case", action="append", choices=CASES,
                        help="run only these cases (repeatable; default: all of the full run)")


def main() -> None:
    args = parse_args("fermions", "Hubbard models and molecules in a basis: backflow VMC vs ED / FCI", extra=_cases)
    records = []

    def keep(record):
        records.append(emit(record))
        if args.save:  # after every case, so a run cut short keeps what it measured
            save_results(args.save)
        return record

    if args.quick:
        keep(hubbard_case([6], 150, 256, 16, 4096, 24, 0.15))
        keep(exact_molecule_case("LiH", LIH, 60, 16, 0.05))
        keep(molecule_case("LiH", LIH, 60, 256, 16, 2048, 16, 0.05))
        keep(throughput_case((4, 4), 16, 4))
        summary(records, benchmark="fermions", quick=True)
        return
    cases = args.case or CASES
    if "hubbard8" in cases:
        keep(hubbard_case([8], 800, 1024, 64, 32768, 16, 0.15))
    if "hubbard12" in cases:
        keep(hubbard_case([12], 1000, 1024, 64, 131072, 24, 0.15, projection=ring_projection, lower_lr_at=700))
    if "square4x4" in cases:
        keep(hubbard_case([4, 4], 400, 1024, 64, 32768, 32, 0.15, reference=16 * SQUARE_4x4_U4_PER_SITE,
                          source="ED 4x4 (from memory)", projection=square_projection, lower_lr_at=150,
                          warm_steps=250))
    if "h2o" in cases:
        keep(exact_molecule_case("H2O", H2O, 150, 16, 0.05))
    curve = []
    if "n2" in cases:
        curve.append(keep(exact_molecule_case("N2 r=1.0977 A", n2(1.0977), 150, 16, 0.05, n_frozen=2)))
    if "n2-curve" in cases:
        for bond in N2_BONDS:
            curve.append(keep(exact_molecule_case(f"N2 r={bond} A", n2(bond), 100, 16, 0.05, n_frozen=2)))
    if "throughput" in cases:
        keep(throughput_case((4, 4), 16, 16))
    extra = {"n2_curve_largest_error_mha": max(r["abs_error_mha"] for r in curve)} if curve else {}
    summary(records, benchmark="fermions", quick=False, **extra)


if __name__ == "__main__":
    main()
