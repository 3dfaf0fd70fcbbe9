"""Gradients and preconditioners: energy gradient, sample geometry, stochastic reconfiguration
(dense, sample-space and matrix-free CG solvers), its held-out check, local-energy clipping, iterate averaging,
the lowest-variance window."""

from psiloom.optimize.averaging import IterateAverageState, averaged_parameters, iterate_average
from psiloom.optimize.outliers import winsorize_local_energies
from psiloom.optimize.flatten import conj_complex_leaves, ravel_real, tree_norm
from psiloom.optimize.gradient import SampleGeometry, energy_gradient
from psiloom.optimize.holdout import HeldOutCheck, held_out_check, held_out_scan
from psiloom.optimize.selection import WindowSelectionState, lowest_variance_window, selected_parameters
from psiloom.optimize.sr import SRState, stochastic_reconfiguration

__all__ = [
    "conj_complex_leaves", "ravel_real", "tree_norm", "SampleGeometry", "energy_gradient",
    "SRState", "stochastic_reconfiguration", "winsorize_local_energies", "HeldOutCheck", "held_out_check",
    "held_out_scan", "IterateAverageState", "iterate_average", "averaged_parameters",
    "WindowSelectionState", "lowest_variance_window", "selected_parameters",
]
