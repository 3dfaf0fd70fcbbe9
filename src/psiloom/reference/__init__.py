"""Exact references: every exact diagonalisation (dense or Lanczos, optionally in a symmetry
sector), closed-form energies (free-fermion TFIM ring, Bethe-ansatz Heisenberg ring), exact time
evolution of state vectors (sparse matrix exponential) and the free-fermion TFIM ring quench."""

from .bethe import HULTHEN_ENERGY_PER_SITE, heisenberg_ring_energy, heisenberg_ring_rapidities
from .hubbard import hubbard_chain_energy_per_site
from .tfim import tfim_ring_energy, tfim_ring_energy_per_site_infinite

__all__ = [
    "HULTHEN_ENERGY_PER_SITE",
    "heisenberg_ring_energy",
    "heisenberg_ring_rapidities",
    "hubbard_chain_energy_per_site",
    "tfim_ring_energy",
    "tfim_ring_energy_per_site_infinite",
]

from psiloom.reference.lanczos import (  # noqa: E402
    DENSE_LIMIT, ground_state, lowest_eigenpairs, operator_matrix, sector_eigenpairs,
)

__all__ += ["DENSE_LIMIT", "ground_state", "lowest_eigenpairs", "operator_matrix", "sector_eigenpairs"]

from psiloom.reference.vectors import expectation, fidelity, state_vector  # noqa: E402

__all__ += ["expectation", "fidelity", "state_vector"]

from psiloom.reference.evolution import evolve_expectations, evolve_state  # noqa: E402
from psiloom.reference.tfim_quench import tfim_ring_quench_sx  # noqa: E402

__all__ += ["evolve_expectations", "evolve_state", "tfim_ring_quench_sx"]
