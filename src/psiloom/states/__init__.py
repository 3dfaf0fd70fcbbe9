"""Trial states: Flax modules mapping configurations to (complex) log-amplitudes."""

from psiloom.states.base import (
    TrialState,
    check_input_size,
    count_real_parameters,
    default_complex_dtype,
    default_real_dtype,
    init_parameters,
)
from psiloom.states.autoregressive import ChainRuleState
from psiloom.states.bound import BoundState
from psiloom.states.fast import FastUpdates, RBMArrays, fast_updates_of, supports_fast_updates
from psiloom.states.feedforward import FeedForward
from psiloom.states.jastrow import TwoBodyJastrow
from psiloom.states.product import ProductState
from psiloom.states.phase import PurePhase
from psiloom.states.rbm import RBM, RBMCache, log_two_cosh, rbm_fast_updates, sum_log_two_cosh
from psiloom.states.symmetric import Symmetrized
from psiloom.states.translation_rbm import TranslationInvariantRBM
from psiloom.states.equivariant import GroupConv, GroupConvNet, GroupLift

__all__ = [
    "TrialState", "check_input_size", "count_real_parameters", "default_complex_dtype",
    "default_real_dtype", "init_parameters", "FeedForward", "TwoBodyJastrow", "ProductState", "PurePhase",
    "RBM", "log_two_cosh", "sum_log_two_cosh", "BoundState", "ChainRuleState",
    "FastUpdates", "RBMArrays", "fast_updates_of", "supports_fast_updates", "RBMCache", "rbm_fast_updates",
    "Symmetrized", "TranslationInvariantRBM", "GroupConv", "GroupConvNet", "GroupLift",
]
