"""Fermions in second quantisation: occupation configurations, ladder-operator sums, Hubbard
and t-V models, molecules in a Gaussian basis (PySCF integrals), determinant trial states
(Slater, Slater-Jastrow, neural backflow) and particle-number-conserving moves.

Conventions (signs, ordering, units) are in :mod:`psiloom.fermions.space` and
:mod:`psiloom.fermions.operators`. The states plug into :class:`psiloom.train.GroundStateSearch` with a
:class:`psiloom.sampling.MetropolisChains` over a :class:`FermionSpace` (which picks hops), or, for
small sectors (molecules in a minimal basis), with exact sums over every configuration
(:class:`psiloom.sampling.ExactEnumeration`).
"""

from psiloom.fermions.space import FermionSpace, occupation_codes, spinless_space
from psiloom.fermions.operators import FermionOperator, annihilation, creation, fermion, number
from psiloom.fermions.jordan_wigner import jordan_wigner
from psiloom.fermions.models import hubbard, one_body_matrix, spinless_tv
from psiloom.fermions.determinants import (
    DeterminantState, OrbitalGuess, SlaterDeterminant, SlaterDensityJastrow, determinant_fast_updates, lowest_orbitals,
)
from psiloom.fermions.backflow import BackflowDeterminant
from psiloom.fermions.mean_field import MeanFieldResult, hubbard_mean_field
from psiloom.fermions.moves import AnyHop, FermionMove, Hop, SpinExchange, SpinFlip, any_hop
from psiloom.fermions.symmetric import FermionSymmetrized, fermion_images
from psiloom.fermions.molecules import MolecularProblem, integrals_operator, molecular_hamiltonian

__all__ = [
    "FermionSpace", "occupation_codes", "spinless_space", "FermionOperator", "annihilation", "creation", "fermion",
    "number", "jordan_wigner", "hubbard", "one_body_matrix", "spinless_tv", "DeterminantState", "OrbitalGuess",
    "SlaterDeterminant", "SlaterDensityJastrow", "determinant_fast_updates", "lowest_orbitals", "BackflowDeterminant",
    "MeanFieldResult", "hubbard_mean_field",
    "AnyHop", "FermionMove", "Hop", "SpinExchange", "SpinFlip", "any_hop", "MolecularProblem", "integrals_operator",
    "molecular_hamiltonian", "FermionSymmetrized", "fermion_images",
]
