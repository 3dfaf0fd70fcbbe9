"""Samplers: Metropolis kernels over many chains and their proposal moves, block Gibbs for
RBMs, parallel tempering, and direct sampling of autoregressive trial states.

Layout: ``base`` (the :class:`Sampler` interface, the shared acceptance step and burn-in /
collection driver), ``moves`` (typed proposal moves), ``metropolis``, ``tempering``,
``gibbs``, ``direct``, ``enumeration`` (exact sums over a small space), and ``compiled`` (Numba sweeps fed a state's plain RBM arrays)."""

from psiloom.sampling.base import Sampler, burn_in_and_collect, metropolis_accept, place_starts
from psiloom.sampling.direct import ChainRuleSampler, DrawInfo
from psiloom.sampling.enumeration import EnumerationInfo, ExactEnumeration, born_weights
from psiloom.sampling.gibbs import BlockGibbsSampler, GibbsInfo, RBMWeights, gibbs_update, rbm_weights
from psiloom.sampling.metropolis import ChainState, MetropolisChains, StepInfo, metropolis_step
from psiloom.sampling.moves import (
    BondExchange,
    GlobalFlip,
    Mixture,
    Move,
    OrderedMove,
    PairExchange,
    SingleFlip,
    global_flip,
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
    "Sampler", "metropolis_accept", "burn_in_and_collect", "place_starts",
    "ChainState", "MetropolisChains", "StepInfo", "metropolis_step",
    "Move", "SingleFlip", "BondExchange", "PairExchange", "GlobalFlip", "Mixture", "OrderedMove",
    "single_flip", "pair_exchange", "global_flip",
    "BlockGibbsSampler", "GibbsInfo", "RBMWeights", "gibbs_update", "rbm_weights",
    "TemperingSampler", "TemperingState", "TemperingInfo", "geometric_betas", "replica_exchange",
    "tempered_metropolis_step",
    "ChainRuleSampler", "DrawInfo", "ExactEnumeration", "EnumerationInfo", "born_weights",
]
