"""Samplers: Metropolis kernels over many chains and their proposal moves, block Gibbs for
RBMs, parallel tempering, and direct sampling of autoregressive trial states."""

from psiloom.sampling.direct import ChainRuleSampler, DrawInfo
from psiloom.sampling.gibbs import BlockGibbsSampler, GibbsInfo, RBMWeights, gibbs_update, rbm_weights
from psiloom.sampling.metropolis import ChainState, MetropolisSampler, StepInfo, metropolis_step
from psiloom.sampling.moves import (
    OrderedMove,
    bond_exchange,
    changes_magnetisation,
    mixture,
    ordered_exchange,
    ordered_flips,
    pair_exchange,
    single_flip,
)
from psiloom.sampling.tempering import (
    TemperingInfo,
    TemperingSampler,
    TemperingState,
    geometric_betas,
    replica_exchange,
    tempered_metropolis_step,
)

__all__ = [
    "ChainState", "MetropolisSampler", "StepInfo", "metropolis_step", "bond_exchange",
    "pair_exchange", "single_flip", "mixture", "changes_magnetisation", "OrderedMove", "ordered_flips",
    "ordered_exchange",
    "BlockGibbsSampler", "GibbsInfo", "RBMWeights", "gibbs_update", "rbm_weights",
    "TemperingSampler", "TemperingState", "TemperingInfo", "geometric_betas", "replica_exchange",
    "tempered_metropolis_step",
    "ChainRuleSampler", "DrawInfo",
]
