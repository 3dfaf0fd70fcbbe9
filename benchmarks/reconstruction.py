"""Benchmark: learning ground states from simulated measurement shots (psiloom.tomography).

Questions: how close does a trial state trained on N simulated single-shot records come to the
state that produced them, as N grows (10³ … 10⁵)? Cases:

* ``tfim`` L = 10, h = J (Pauli units), Z shots, RBM α = 1 with the exact (enumerated) likelihood:
  fidelity with the ED vector, energy and nearest-neighbour ⟨σᶻσᶻ⟩ of the learned state against ED,
  and ⟨σᶻσᶻ⟩ estimated directly from the shots;
* ``tfim`` L = 20 (full mode only), Z shots, autoregressive ChainRuleState (exactly normalised):
  no fidelity; energy (from exact draws of the learned state, with its error bar) against the
  free-fermion value and ⟨σᶻσᶻ⟩ against the ED vector that produced the shots;
* ``heisenberg`` L = 6 (S = σ/2, no Marshall rotation, so ψ0 carries its signs): Z shots plus
  shots with one neighbouring pair rotated to XX or YY, amplitude RBM × phase RBM, against the
  same model trained on the Z shots alone.

``--quick`` (< 3 min on two cores): L = 10 with 10⁴ shots and the Heisenberg pair.
JSON lines per benchmarks/README.md; ``energy`` is the learned state's energy; the summary
carries ``fidelity_quick`` (the fidelity of the L = 10, 10⁴-shot case) and ``cases``.
"""

from __future__ import annotations

import math

import jax

jax.config.update("jax_enable_x64", True)

import numpy as np  # noqa: E402
import optax  # noqa: E402

import psiloom as pl  # noqa: E402
from psiloom import tomography as tm  # noqa: E402
from _common import Timer, emit, lattice_system, parse_args, progress, relative_error, summary  # noqa: E402

S = pl.states


def _schedule(n_train: int, batch: int, total_steps: int, lr: float):
    per_epoch = max(1, n_train // batch)
    epochs = max(1, math.ceil(total_steps / per_epoch))
    return epochs, optax.adam(optax.cosine_decay_schedule(lr, epochs * per_epoch, 0.1))


def tfim_case(n_sites: int, n_shots: int, seed: int = 0, steps: int = 800) -> dict:
    with Timer() as timer:
        lattice = pl.lattices.chain(n_sites)
        H = pl.operators.transverse_field_ising(lattice, J=1.0, h=1.0)
        e0, v0 = pl.reference.ground_state(H)
        zz = pl.operators.pauli(n_sites, "ZZ", (0, 1))
        zz_exact = pl.reference.expectation(zz, v0)
        record = tm.simulate_record(jax.random.PRNGKey(seed), v0, "Z" * n_sites, n_shots)
        n_train = int(0.9 * n_shots)
        batch = max(32, min(500, n_train // 10))
        exact = n_sites <= 12
        model = S.RBM(alpha=1) if exact else S.ChainRuleState(features=4)
        epochs, optimizer = _schedule(n_train, batch, steps, 0.02 if exact else 0.01)
        result = tm.learn_from_shots(model, record, optimizer, jax.random.PRNGKey(seed + 1), epochs=epochs,
                                     batch_size=batch, normaliser="exact" if exact else "normalised",
                                     progress=None)
        shots_zz = tm.shot_expectation(record, zz)
        if exact:
            fidelity = tm.state_fidelity(result.model, result.variables, v0)
            energy = tm.state_expectation(result.model, result.variables, H)
            error = 0.0
            zz_model, zz_error = tm.state_expectation(result.model, result.variables, zz), 0.0
        else:
            fidelity = None
            key = jax.random.PRNGKey(seed + 2)
            est = tm.state_expectation(result.model, result.variables, H, key=key, n_samples=16384)
            energy, error = float(np.real(est.mean)), float(est.error)
            est = tm.state_expectation(result.model, result.variables, zz, key=key, n_samples=16384)
            zz_model, zz_error = float(np.real(est.mean)), float(est.error)
    reference = pl.reference.tfim_ring_energy(n_sites, J=1.0, h=1.0)
    progress(f"tfim L={n_sites} shots={n_shots}: F={fidelity} E={energy:.6f} (exact {reference:.6f})")
    return {
        "benchmark": "reconstruction",
        "case": f"tfim_L{n_sites}_z_shots",
        "system": lattice_system("tfim", "chain", [n_sites], True, "pauli", J=1.0, h=1.0),
        "method": {"trial_state": "RBM alpha=1" if exact else "ChainRuleState features=4",
                   "likelihood": result.normaliser, "optimizer": "adam, cosine decay", "epochs": epochs,
                   "best_epoch": result.best_epoch, "bases": "Z"},
        "n_shots": n_shots,
        "fidelity": fidelity,
        "energy": energy,
        "error_bar": error,
        "reference": reference,
        "reference_source": "free fermions (Pfeuty 1970), closed form",
        "rel_error": relative_error(energy, reference),
        "ed_energy": float(e0),
        "nn_correlation": zz_model,
        "nn_correlation_error_bar": zz_error,
        "nn_correlation_reference": float(zz_exact),
        "nn_correlation_abs_error": abs(zz_model - zz_exact),
        "nn_correlation_from_shots": shots_zz.mean,
        "nn_correlation_from_shots_error_bar": shots_zz.error,
        "seconds": timer.seconds,
        "steps": epochs * max(1, n_train // batch),
        "samples_per_step": batch,
        "n_params": S.count_real_parameters(result.variables),
    }


def heisenberg_case(rotated: bool, seed: int = 3, epochs: int = 25) -> dict:
    n = 6
    with Timer() as timer:
        H = pl.operators.heisenberg(pl.lattices.chain(n))
        e0, v0 = pl.reference.ground_state(H)
        k1, k2 = jax.random.split(jax.random.PRNGKey(seed))
        record = tm.simulate_record(k1, v0, "Z" * n, 4000)
        if rotated:
            record = record.concatenate(tm.simulate_record(k2, v0, tm.pair_bases(n, ("XX", "YY")), 400))
        model = S.ProductState([S.RBM(alpha=1, init_scale=0.1), S.PurePhase(S.RBM(alpha=0.2, init_scale=0.1))])
        steps = epochs * (int(0.9 * record.n_shots) // 400)
        optimizer = optax.adam(optax.cosine_decay_schedule(0.05, steps, 0.1))
        result = tm.learn_from_shots(model, record, optimizer, jax.random.PRNGKey(seed + 4), epochs=epochs,
                                     batch_size=400, normaliser="exact")
        fidelity = tm.state_fidelity(result.model, result.variables, v0)
        energy = tm.state_expectation(result.model, result.variables, H)
        kl = tm.measured_kl(result.model, result.variables, v0, ["Z" * n, "XXZZZZ", "YYZZZZ"])
    progress(f"heisenberg L=6 rotated={rotated}: F={fidelity:.4f} E={energy:.5f} (ED {e0:.5f})")
    return {
        "benchmark": "reconstruction",
        "case": "heisenberg_L6_" + ("z_and_pair_shots" if rotated else "z_shots_only"),
        "system": lattice_system("heisenberg", "chain", [n], True, "spin", J=1.0),
        "method": {"trial_state": "RBM alpha=1 x PurePhase(RBM alpha=0.2)", "likelihood": "exact",
                   "optimizer": "adam 0.05, cosine decay", "epochs": epochs,
                   "bases": "Z + XX/YY on each neighbouring pair" if rotated else "Z"},
        "n_shots": record.n_shots,
        "fidelity": fidelity,
        "kl_per_basis": kl,
        "energy": energy,
        "error_bar": 0.0,
        "reference": float(e0),
        "reference_source": "ED",
        "rel_error": relative_error(energy, e0),
        "seconds": timer.seconds,
        "steps": steps,
        "samples_per_step": 400,
        "n_params": S.count_real_parameters(result.variables),
    }


def main() -> None:
    args = parse_args("reconstruction", "learning ground states from simulated shots")
    records = []
    if args.quick:
        records.append(emit(tfim_case(10, 10_000)))
        fidelity_quick = records[-1]["fidelity"]
    else:
        for n_shots in (1_000, 10_000, 100_000):
            records.append(emit(tfim_case(10, n_shots)))
            if n_shots == 10_000:
                fidelity_quick = records[-1]["fidelity"]
        for n_shots in (10_000, 100_000):
            records.append(emit(tfim_case(20, n_shots, steps=1500)))
    records.append(emit(heisenberg_case(True)))
    records.append(emit(heisenberg_case(False)))
    summary(records, benchmark="reconstruction", fidelity_quick=fidelity_quick,
            cases=[r["case"] + f"_{r['n_shots']}" for r in records])


if __name__ == "__main__":
    main()
