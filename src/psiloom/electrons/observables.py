"""Energy components with error bars: kinetic, potential and the virial ratio.

From samples x of |ψ|² (``(n_time, n_chains, N, 3)``) the local energy parts of
:class:`~psiloom.electrons.CoulombHamiltonian` are averaged chain-wise with
:func:`psiloom.stats.estimate` (autocorrelation-corrected errors):

    ⟨T⟩, ⟨V_en⟩, ⟨V_ee⟩, ⟨V⟩ = ⟨V_en⟩ + ⟨V_ee⟩ + V_NN, ⟨E⟩ = ⟨T⟩ + ⟨V⟩ (hartree),

and the virial ratio −⟨V⟩/⟨T⟩, which equals 2 for any exact eigenstate of an atom (virial
theorem for Coulomb systems) and for molecules at equilibrium geometry only approximately
(the nuclear forces vanish only at the exact equilibrium distance).
"""

from __future__ import annotations

from typing import Any, NamedTuple

import jax

from psiloom import stats
from psiloom.electrons.hamiltonian import CoulombHamiltonian


class EnergyComponents(NamedTuple):
    """Estimates of the energy parts (hartree) and the virial ratio −⟨V⟩/⟨T⟩.

    ``str()`` gives one labelled line per part (``format`` of each Estimate) and the ratio.
    """

    total: stats.Estimate
    kinetic: stats.Estimate
    potential: stats.Estimate
    electron_nuclear: stats.Estimate
    electron_electron: stats.Estimate
    virial_ratio: Any  # −⟨V⟩ / ⟨T⟩ (a real number; a 0-d array when computed in JAX)

    def format(self) -> str:
        """One line per component, aligned, in parenthesis notation (hartree)."""
        labels = (("total E", self.total), ("kinetic T", self.kinetic), ("potential V", self.potential),
                  ("electron-nuclear", self.electron_nuclear), ("electron-electron", self.electron_electron))
        width = max(len(label) for label, _ in labels)
        lines = [f"{label:<{width}}  {est.format()}" for label, est in labels]
        lines.append(f"{'virial −V/T':<{width}}  {float(self.virial_ratio):.4f}  (2 for an exact eigenstate)")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.format()


def energy_components(hamiltonian: CoulombHamiltonian, log_amp_fn, samples, chunk: int | None = None) -> EnergyComponents:
    """Estimates of the energy parts over ``samples`` of shape ``(n_time, n_chains, N, 3)``."""
    return _components_and_local_energies(hamiltonian, log_amp_fn, samples, chunk)[0]


def _components_and_local_energies(hamiltonian, log_amp_fn, samples, chunk=None):
    if samples.ndim != 4:
        raise ValueError(f"samples must have shape (n_time, n_chains, n_electrons, 3), got {samples.shape}")
    t, c = samples.shape[:2]
    parts = hamiltonian.local_energy_parts(log_amp_fn, samples.reshape(t * c, *samples.shape[2:]), chunk)
    shaped = lambda v: v.reshape(t, c)
    kinetic = stats.estimate(shaped(parts.kinetic))
    potential = stats.estimate(shaped(parts.potential))
    return EnergyComponents(
        total=stats.estimate(shaped(parts.total)),
        kinetic=kinetic,
        potential=potential,
        electron_nuclear=stats.estimate(shaped(parts.electron_nuclear)),
        electron_electron=stats.estimate(shaped(parts.electron_electron)),
        virial_ratio=-potential.mean / kinetic.mean,
    ), shaped(parts.total)


#: Configurations per local-energy batch in an evaluation pass. The forward Laplacian holds a
#: gradient of every intermediate for each configuration (tens of kB for He, more for larger
#: systems), so a pass of 5·10⁵ He samples at once asked for ~30 GB; batches of this size keep
#: a pass's memory bounded whatever its length.
EVALUATION_CHUNK = 4096


def evaluate_components(search, state, n_samples: int, key: jax.Array | None = None, burn_in_sweeps: int = 10,
                        chunk: int | None = EVALUATION_CHUNK) -> tuple[EnergyComponents, float]:
    """A separate evaluation pass of a :class:`psiloom.train.GroundStateSearch` at fixed parameters.

    Continues the search's chains from ``state``, discards ``burn_in_sweeps`` sweeps and stores
    ``n_samples`` (rounded up to a multiple of the number of chains), through the same sampling
    path as ``search.evaluate`` (fast updates included; default key ``fold_in(state.key, 11)``).
    Local energies are computed ``chunk`` configurations at a time (:data:`EVALUATION_CHUNK`;
    ``None``: all at once). Returns ``(EnergyComponents, acceptance)``.
    """
    components, _, _, acceptance = evaluation_pass(search, state, n_samples, key, burn_in_sweeps, chunk)
    return components, acceptance


class EvaluationPass(NamedTuple):
    """What one evaluation pass at fixed parameters returns (see :func:`evaluation_pass`)."""

    components: EnergyComponents
    local_energies: jax.Array  # (n_time, n_chains) E_L (hartree), for correlated differences
    samples: jax.Array  # (n_time, n_chains, N, 3) configurations (bohr), for densities and dipoles
    acceptance: float


def evaluation_pass(search, state, n_samples: int, key: jax.Array | None = None, burn_in_sweeps: int = 10,
                    chunk: int | None = EVALUATION_CHUNK) -> EvaluationPass:
    """Like :func:`evaluate_components`, also returning the local energies and the samples."""
    chains, key, n_per_chain, burn_in = search.evaluation_inputs(state, n_samples, key, burn_in_sweeps, fold=11)
    hamiltonian = search.hamiltonian

    @jax.jit
    def run(params, chains, key):
        xs, _, _, acceptance, log_amp = search.vmc.draw(params, chains, key, n_per_chain, burn_in)
        components, local = _components_and_local_energies(hamiltonian, log_amp, xs, chunk)
        return components, local, xs, acceptance

    components, local, xs, acceptance = run(state.params, chains, key)
    return EvaluationPass(components, local, xs, float(acceptance))
