"""psiloom: neural trial wavefunctions for variational Monte Carlo on JAX, Flax and Optax.

Data flows one way through the subpackages:

    lattices / spaces  →  states (log ψ)  →  sampling  →  operators (local estimates)
        →  stats  →  optimize (gradient, preconditioner)  →  vmc (the step), loop, train (the facade)

``reference`` holds exact reference solutions (sparse ED by Lanczos, free fermions, Bethe ansatz).
psiloom follows the dtype of its inputs; enable ``jax_enable_x64`` for float64, which
stochastic reconfiguration needs for relative accuracies beyond ~1e-5.
"""

from psiloom import batching, compilation, reference, lattices, operators, optimize, parallel, plotting, reduce, sampling, spaces, states, stats, symmetry, train
from psiloom import checkpoint, history, loop, vmc  # the pieces behind train.GroundStateSearch
from psiloom import tomography  # learning a state from measurement shots
from psiloom import electrons  # atoms and molecules (continuous space); imports the modules above

#: The package version (also in ``pyproject.toml``).
__version__ = "0.1.0"

__all__ = ["batching", "compilation", "reference", "lattices", "operators", "optimize", "parallel", "plotting", "reduce", "sampling", "spaces", "states",
           "stats", "symmetry", "train", "vmc", "loop", "history", "checkpoint", "electrons", "tomography", "__version__"]
