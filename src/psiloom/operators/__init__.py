"""Operators: Pauli-sum Hamiltonians and observables, model builders, local estimators."""

from psiloom.operators.pauli import PauliSum, pauli, total
from psiloom.operators.models import (
    heisenberg,
    j1j2,
    magnetization_z,
    spin_correlation,
    spin_correlation_component,
    staggered_magnetization_z,
    transverse_field_ising,
    xxz,
)
from psiloom.operators.local import local_estimates
from psiloom.operators import observables
from psiloom.operators.observables import (
    correlation_operators,
    energy_statistics,
    magnetizations,
    spin_correlations,
    v_score,
)

__all__ = [
    "PauliSum", "pauli", "total", "heisenberg", "j1j2", "magnetization_z", "spin_correlation",
    "spin_correlation_component", "staggered_magnetization_z", "transverse_field_ising", "xxz",
    "local_estimates", "observables", "correlation_operators", "energy_statistics", "magnetizations",
    "spin_correlations", "v_score",
]
