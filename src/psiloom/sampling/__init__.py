"""Samplers: Metropolis kernels over many chains and their proposal moves."""

from psiloom.sampling.metropolis import ChainState, MetropolisSampler, StepInfo, metropolis_step
from psiloom.sampling.moves import bond_exchange, pair_exchange, single_flip

__all__ = [
    "ChainState", "MetropolisSampler", "StepInfo", "metropolis_step", "bond_exchange",
    "pair_exchange", "single_flip",
]
