"""How well a learned state agrees with its target and with the shots.

* :func:`state_fidelity` — F = |⟨ψ_target|ψ_θ⟩|² / (⟨ψ_target|ψ_target⟩⟨ψ_θ|ψ_θ⟩) by enumeration.
* :func:`measured_kl` — the classical Kullback-Leibler divergence of the Born distributions in
  each basis, KL_b = Σ_s p_b(s) log(p_b(s)/q_b(s)), p of the target, q of the learned state
  (0 when they agree; +inf when the learned state forbids an outcome the target allows).
* :func:`shot_expectation` — ⟨O⟩ of a Pauli sum estimated directly from the shots (below).
* :func:`state_expectation` — ⟨O⟩ of the learned state, exact by enumeration or sampled.
* :func:`record_nll` (in :mod:`~psiloom.tomography.training`) — the NLL of held-out shots.

Estimating a Pauli sum O = Σ_t c_t P_t from shots: a shot measured in a basis that agrees with
the letters of P_t on its sites gives the value Π_{i∈t} s_i, whose mean over those shots is an
unbiased estimate of ⟨P_t⟩. With f_t the fraction of shots compatible with P_t (fixed by the
measurement plan), every shot contributes y = Σ_t c_t [shot compatible with t] Π_{i∈t} s_i / f_t,
whose mean is Σ_t c_t ⟨P_t⟩_shots and whose standard error, std(y)/√S, includes the correlations
between terms estimated from the same shots (the shots are independent). A term no shot can
estimate (f_t = 0) makes the operator unmeasurable and raises.
"""

from __future__ import annotations

from typing import NamedTuple

import jax
import numpy as np

from psiloom import stats
from psiloom._validation import ArgumentTypeError, positive_int
from psiloom.operators.pauli import PauliSum
from psiloom.reference.vectors import expectation, fidelity
from psiloom.spaces import SpinSpace
from psiloom.tomography.records import BASIS_LETTERS, MeasurementRecord
from psiloom.tomography.simulate import full_vector, measurement_probabilities
from psiloom.tomography.training import ENUMERATION_LIMIT

__all__ = ["ShotEstimate", "learned_vector", "state_fidelity", "measured_kl", "shot_expectation",
           "state_expectation"]


class ShotEstimate(NamedTuple):
    """An expectation value estimated from independent shots: mean and one standard error."""

    mean: float
    error: float
    n_shots: int  # shots that contributed to at least one term

    def __str__(self) -> str:
        return stats.parenthesis_notation(self.mean, self.error)


def learned_vector(model, variables, n_sites: int) -> np.ndarray:
    """The normalised vector of a trial state over all 2^N configurations (configuration order);
    ``ValueError`` when it cannot be enumerated or normalised."""
    n_sites = positive_int("n_sites", n_sites)
    if n_sites > ENUMERATION_LIMIT:
        raise ValueError(f"a trial state on {n_sites} sites cannot be enumerated (limit {ENUMERATION_LIMIT})")
    from psiloom.reference.vectors import state_vector

    try:
        return state_vector(lambda x: model.apply(variables, x), SpinSpace(n_sites))
    except ValueError as err:
        raise ValueError(f"the trial state cannot be normalised: {err}") from err


def state_fidelity(model, variables, target, space: SpinSpace | None = None) -> float:
    """Fidelity of the learned state with ``target`` (a vector over ``space``, default all 2^N)."""
    t = full_vector(target, space)
    n = t.size.bit_length() - 1
    return fidelity(t, learned_vector(model, variables, n))


def measured_kl(model, variables, target, bases, space: SpinSpace | None = None) -> dict[str, float]:
    """``{basis: KL_b(p_target ‖ q_learned)}`` for each basis string in ``bases``."""
    t = full_vector(target, space)
    n = t.size.bit_length() - 1
    v = learned_vector(model, variables, n)
    out = {}
    for b in ([bases] if isinstance(bases, str) else list(bases)):
        p = measurement_probabilities(t, b)
        q = measurement_probabilities(v, b)
        live = p > 0
        with np.errstate(divide="ignore"):
            out[b] = float(np.sum(p[live] * (np.log(p[live]) - np.log(q[live]))))
    return out


def shot_expectation(record: MeasurementRecord, operator: PauliSum) -> ShotEstimate:
    """⟨O⟩ of a Pauli sum estimated from the shots alone (module docstring)."""
    if not isinstance(record, MeasurementRecord):
        raise ArgumentTypeError(f"record must be a MeasurementRecord, got {type(record).__name__}")
    if not isinstance(operator, PauliSum):
        raise ArgumentTypeError(f"operator must be a PauliSum, got {type(operator).__name__}")
    if operator.n_sites != record.n_sites:
        raise ValueError(f"the operator acts on {operator.n_sites} sites, the record has {record.n_sites}")
    s = record.n_shots
    y = np.zeros(s, np.complex128)
    used = np.zeros(s, bool)
    for string, coef in operator.terms.items():
        if not string:
            y += coef
            continue
        sites = np.array([site for site, _ in string])
        letters = np.array([BASIS_LETTERS.index(letter) for _, letter in string])
        compatible = np.all(record.bases[:, sites] == letters[None, :], axis=1)
        f = compatible.mean()
        if f == 0:
            text = "".join(letter for _, letter in string)
            raise ValueError(f"no shot measured sites {sites.tolist()} in the bases {text!r}: the term "
                             f"{text}{sites.tolist()} cannot be estimated from this record")
        value = np.prod(record.outcomes[:, sites], axis=1)
        y += np.where(compatible, coef * value / f, 0.0)
        used |= compatible
    mean = y.mean()
    error = float(np.std(y.real, ddof=1) / np.sqrt(s)) if s > 1 else float("nan")
    value = float(mean.real) if operator.is_hermitian() else complex(mean)
    return ShotEstimate(value, error, int(used.sum()))


def state_expectation(model, variables, operator: PauliSum, key: jax.Array | None = None,
                      n_samples: int | None = None, n_sites: int | None = None):
    """⟨O⟩ of the learned state: exact by enumeration (no ``n_samples``: returns a float), or
    from ``n_samples`` draws (a :class:`psiloom.stats.Estimate` with its error bar): exact draws
    of a :class:`~psiloom.states.ChainRuleState`, block Gibbs chains of a real RBM, Metropolis
    chains otherwise."""
    if not isinstance(operator, PauliSum):
        raise ArgumentTypeError(f"operator must be a PauliSum, got {type(operator).__name__}")
    n = operator.n_sites if n_sites is None else positive_int("n_sites", n_sites)
    if n_samples is None:
        return expectation(operator, learned_vector(model, variables, n))
    n_samples = positive_int("n_samples", n_samples)
    if key is None:
        raise ValueError("sampled expectation values need a PRNG key")
    from psiloom import sampling
    from psiloom.operators.observables import measure
    from psiloom.states import BoundState, ChainRuleState, RBM

    space = SpinSpace(n)
    bound = BoundState(model, variables)
    n_chains = 16
    if isinstance(model, ChainRuleState):
        sampler = sampling.ChainRuleSampler(space, n_chains=n_chains)
    elif isinstance(model, RBM) and not model.complex_params:
        sampler = sampling.BlockGibbsSampler(space, n_chains=n_chains, burn_in=64)
    else:
        sampler = sampling.MetropolisChains(space, n_chains=n_chains, burn_in=64 * n)
    k_init, k_run = jax.random.split(key)
    chain_state = sampler.init(k_init, bound)
    xs, logs, _, _ = sampler.sample(k_run, chain_state, bound, -(-n_samples // n_chains))
    return measure(bound, {"O": operator}, xs, logs)["O"]
