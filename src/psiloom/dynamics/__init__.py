"""Time evolution of trial states by the time-dependent variational principle (TDVP).

* :mod:`~psiloom.dynamics.equation`: the TDVP linear system S θ̇ = G from samples or by exact
  enumeration (holomorphic and real-parameter formulations, real and imaginary time) and the
  TDVP residual;
* :mod:`~psiloom.dynamics.regularisation`: diagonal shift, pseudo-inverse, signal-to-noise cutoff;
* :mod:`~psiloom.dynamics.integrators`: Euler, Heun, RK4, adaptive RK23/RK45 over pytrees;
* :mod:`~psiloom.dynamics.evolution`: the driver (time grid, observables, history, checkpoints);
* :mod:`~psiloom.dynamics.initial`: initial states (product states in RBM form).
"""

from psiloom.dynamics.equation import TDVPSystem, log_derivatives, residual, tdvp_system
from psiloom.dynamics.evolution import (EvolutionState, NonFiniteEvolution, StageInfo, TimeEvolution,
                                        Trajectory)
from psiloom.dynamics.initial import product_state_rbm
from psiloom.dynamics.integrators import TABLEAUS, Tableau, next_step_size, runge_kutta_step, tableau
from psiloom.dynamics.regularisation import DiagonalShift, PseudoInverse, SignalToNoise, make_regularisation

__all__ = [
    "TDVPSystem", "log_derivatives", "residual", "tdvp_system",
    "EvolutionState", "NonFiniteEvolution", "StageInfo", "TimeEvolution", "Trajectory",
    "product_state_rbm",
    "TABLEAUS", "Tableau", "next_step_size", "runge_kutta_step", "tableau",
    "DiagonalShift", "PseudoInverse", "SignalToNoise", "make_regularisation",
]
