"""Electrons in continuous space: atoms and molecules with neural determinant trial states.

Data flow, as on the lattice side:

    system (nuclei, n_up, n_down) → trial state (log|ψ|, sign) → ElectronSampler (|ψ|²)
        → CoulombHamiltonian (local energy: kinetic + potential) → stats → optimize → train

Units: bohr and hartree. Configurations have shape ``(n_samples, n_electrons, 3)``, the first
``n_up`` electrons spin-up. Trial states return real log|ψ|; ``sign_and_log`` gives the sign.
The optional Hartree-Fock start (:mod:`psiloom.electrons.pretrain`) needs PySCF.
"""

from psiloom.electrons.base import ElectronState
from psiloom.electrons.basis import BasisFunction, aufbau_guess, default_basis
from psiloom.electrons.cusp_map import NuclearCuspMap
from psiloom.electrons.determinants import (
    SlaterJastrow,
    neural_slater_jastrow,
    signed_log_det,
    signed_log_sum_exp,
    slater_jastrow,
)
from psiloom.electrons.features import MomentMixer
from psiloom.electrons.hamiltonian import CoulombHamiltonian, EnergyParts, kinetic_energy, potential_energy
from psiloom.electrons.jastrow import CuspJastrow, NeuralJastrow
from psiloom.electrons.laplacian import forward_laplacian, hessian_laplacian, value_grad_laplacian
from psiloom.electrons.observables import (
    EnergyComponents,
    EvaluationPass,
    energy_components,
    evaluate_components,
    evaluation_pass,
)
from psiloom.electrons.properties import (
    DEBYE_PER_AU,
    Difference,
    Profile,
    Spread,
    axial_density,
    dipole_moment,
    energy_difference,
    local_energy_spread,
    radial_density,
)
from psiloom.electrons.scan import ScanPoint, check_scan, follow_nuclei, geometry_scan
from psiloom.electrons.backflow import BackflowShift
from psiloom.electrons.orbitals import BackflowOrbitals, SlaterTypeOrbitals
from psiloom.electrons.sampler import ElectronSampler, WalkerState
from psiloom.electrons.system import BOHR_PER_ANGSTROM, Molecule, atom, from_xyz, hund_spin, molecule, parse_xyz

__all__ = [
    "ElectronState", "BasisFunction", "aufbau_guess", "default_basis", "NuclearCuspMap", "SlaterJastrow",
    "neural_slater_jastrow", "signed_log_det", "signed_log_sum_exp", "slater_jastrow", "MomentMixer",
    "CoulombHamiltonian", "EnergyParts", "kinetic_energy", "potential_energy", "CuspJastrow",
    "NeuralJastrow", "EnergyComponents", "energy_components", "evaluate_components",
    "EvaluationPass", "evaluation_pass", "DEBYE_PER_AU", "Difference", "Profile", "axial_density", "dipole_moment",
    "energy_difference", "local_energy_spread", "Spread", "radial_density", "ScanPoint", "check_scan", "follow_nuclei", "geometry_scan", "forward_laplacian", "hessian_laplacian", "value_grad_laplacian", "BackflowOrbitals", "BackflowShift",
    "SlaterTypeOrbitals", "ElectronSampler", "WalkerState", "BOHR_PER_ANGSTROM", "Molecule", "atom",
    "from_xyz", "hund_spin", "molecule", "parse_xyz",
]
