"""Learning a quantum state from measurement snapshots (neural-network state tomography).

An experiment returns single-shot records: every site measured in a local Pauli basis
(Z, X or Y), one outcome ±1 per site. A trial state ψ_θ is trained to maximise the likelihood
of the records, Π_shots |ψ_θ,b(s)|² / Σ_x |ψ_θ(x)|² (Torlai, Mazzola, Carrasquilla, Troyer,
Melko & Carleo, Nat. Phys. 14, 447 (2018)): the Z shots fix |ψ|, shots in rotated bases fix
the phases. Modules, one concept each:

* ``records`` — :class:`MeasurementRecord` (±1 or bits, per-site basis letters), files;
* ``rotations`` — amplitudes in product bases (exact vectors and trial states);
* ``simulate`` — reproducible simulated records from any enumerable state;
* ``likelihood`` — the NLL and its gradients (exact, normalised, CD-k, persistent CD);
* ``training`` — :func:`learn_from_shots`: mini-batches, shuffling, held-out shots, early stopping;
* ``metrics`` — fidelity, classical KL per basis, observables from the state and from the shots.
"""

from psiloom.tomography.records import BASIS_LETTERS, MeasurementRecord, basis_codes, basis_string, load_record
from psiloom.tomography.rotations import rotate_vector, rotated_log_amplitudes, shot_tables
from psiloom.tomography.simulate import full_vector, measurement_probabilities, pair_bases, simulate_record
from psiloom.tomography.likelihood import (
    NORMALISERS, descent_direction, gibbs_chains, log_normaliser, negative_log_likelihood,
    nll_and_gradient, sampled_surrogate, shot_log_probabilities, surrogate_gradient,
)
from psiloom.tomography.training import LearnedState, learn_from_shots, record_nll, resolve_normaliser
from psiloom.tomography.metrics import (
    ShotEstimate, learned_vector, measured_kl, shot_expectation, state_expectation, state_fidelity,
)

__all__ = [
    "BASIS_LETTERS", "MeasurementRecord", "basis_codes", "basis_string", "load_record",
    "rotate_vector", "rotated_log_amplitudes", "shot_tables",
    "full_vector", "measurement_probabilities", "pair_bases", "simulate_record",
    "NORMALISERS", "descent_direction", "gibbs_chains", "log_normaliser", "negative_log_likelihood",
    "nll_and_gradient", "sampled_surrogate", "shot_log_probabilities", "surrogate_gradient",
    "LearnedState", "learn_from_shots", "record_nll", "resolve_normaliser",
    "ShotEstimate", "learned_vector", "measured_kl", "shot_expectation", "state_expectation", "state_fidelity",
]
