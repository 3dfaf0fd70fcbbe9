"""Exact reference energies for benchmarking trial wavefunctions."""

from .bethe import HULTHEN_ENERGY_PER_SITE, heisenberg_ring_energy, heisenberg_ring_rapidities
from .tfim import tfim_ring_energy, tfim_ring_energy_per_site_infinite

__all__ = [
    "HULTHEN_ENERGY_PER_SITE",
    "heisenberg_ring_energy",
    "heisenberg_ring_rapidities",
    "tfim_ring_energy",
    "tfim_ring_energy_per_site_infinite",
]

from psiloom.exact.lanczos import ground_state, lowest_eigenpairs  # noqa: E402

__all__ += ["ground_state", "lowest_eigenpairs"]
