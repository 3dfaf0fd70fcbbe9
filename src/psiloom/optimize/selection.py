"""Choosing the trial state to evaluate: the stretch of iterates with the lowest energy variance.

A long stochastic optimisation does not settle: its iterate θ_t wanders, and at times drifts
away for hundreds of steps and comes back (measured on LiH: 100-step means of the training
energy 3-4 mHa apart within one run, the local-energy variance 0.006-0.02 Ha², with metric step
lengths ‖δ‖_S the same throughout). The last iterate is then a draw from that wander. This
transformation records the iterates in consecutive windows of ``window`` updates from update
``start`` on, and keeps the mean of the window whose mean local-energy variance was lowest,

    W* = argmin_W (1/w) Σ_{t∈W} σ²(θ_t) ,      θ_sel = (1/w) Σ_{t∈W*} θ_t ,

where σ²(θ_t) = ‖ε_res‖² = Σ_s ω_s |E_L(x_s) − Ē|² is the variance of the local energies of the
samples drawn from |ψ_{θ_t}|² at update t (ω_s = 1/n, or the importance weights; the local
energies as the training step passes them, i.e. winsorised when the search clips them). The
variance is the criterion because it vanishes at an eigenstate and is estimated with a relative
error ~ (κ/n)^{1/2} per update (κ the kurtosis), so a window of w updates ranks stretches far
better than their mean energies, whose differences are of the order of their noise (the
zero-variance principle; Umrigar, Wilson & Wilkins, PRL 60, 1719 (1988) use it as the objective;
here it only ranks). Inside the chosen window the iterates are averaged (Polyak-Ruppert, see
:mod:`psiloom.optimize.averaging`).

The selected parameters are a trial state of their own: the energy that counts is that of a
separate evaluation pass with fresh samples, which is variational whatever the selection
did (the selection used the training samples only). Optimisation itself is unchanged.

Usage (chain it last; it reads the parameters θ_t the samples came from and the sample geometry
the training step passes to every transformation of the chain)::

    optax.chain(stochastic_reconfiguration(), optax.sgd(lr), lowest_variance_window(100, start=1000))
    ...
    params = selected_parameters(train_state.opt_state)
"""

from __future__ import annotations

from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import optax

from psiloom._validation import integer
from psiloom.optimize.averaging import find_unique_state, running_mean


class WindowSelectionState(NamedTuple):
    """State of :func:`lowest_variance_window`.

    Attributes:
        n_updates: updates seen so far (int32).
        in_window: updates recorded in the current window (int32, < ``window``).
        window_params: running mean of θ_t over the current window (pytree like ``params``;
            after a window closes it holds that window's mean until the next update overwrites it).
        window_variance: running mean of σ²(θ_t) over the current window (float; likewise).
        n_windows: completed windows (int32).
        best_params: the mean parameters of the completed window with the lowest mean variance
            (zeros while ``n_windows`` is 0).
        best_variance: that window's mean variance (0 while ``n_windows`` is 0: the state stays
            finite, as the training loop's non-finite guard requires).
        best_end: the number of updates at the end of that window (int32; 0 while none).
    """

    n_updates: jax.Array
    in_window: jax.Array
    window_params: Any
    window_variance: jax.Array
    n_windows: jax.Array
    best_params: Any
    best_variance: jax.Array
    best_end: jax.Array


def lowest_variance_window(window: int, start: int = 0) -> optax.GradientTransformationExtraArgs:
    """Keep the mean parameters of the ``window``-update stretch with the lowest mean variance.

    Args:
        window: updates per window (≥ 1). Windows are consecutive and do not overlap: updates
            ``start + 1 … start + window`` form the first, and so on; a window still open at the
            end of a run is not a candidate.
        start: updates to skip before the first window (≥ 0).

    Returns:
        a transformation whose ``update(updates, state, params, geometry=...)`` returns
        ``updates`` unchanged; ``params`` (θ_t, the parameters the update's samples came from)
        and the keyword ``geometry`` (a :class:`~psiloom.optimize.SampleGeometry`, which the
        training step passes) are required. Read the choice with :func:`selected_parameters`.
    """
    window = integer("lowest_variance_window: window", window, minimum=1)
    start = integer("lowest_variance_window: start", start, minimum=0)

    def init(params):
        zeros = jax.tree_util.tree_map(jnp.zeros_like, params)
        return WindowSelectionState(
            n_updates=jnp.zeros((), jnp.int32), in_window=jnp.zeros((), jnp.int32), window_params=zeros,
            window_variance=jnp.zeros(()), n_windows=jnp.zeros((), jnp.int32), best_params=zeros,
            best_variance=jnp.zeros(()), best_end=jnp.zeros((), jnp.int32))

    def update(updates, state, params=None, *, geometry=None, **extra):
        del extra
        if params is None or geometry is None:
            raise ValueError("lowest_variance_window needs the parameters and the sample geometry: call "
                             "update(updates, state, params, geometry=...) (the psiloom training step does)")
        residual = geometry.residual()
        variance = jnp.sum(residual * residual).astype(state.window_variance.dtype)
        n_updates = state.n_updates + 1
        recording = n_updates > start
        k = state.in_window + recording.astype(jnp.int32)  # θ_t's index in its window (1-based)
        weight = jnp.where(recording, 1.0 / jnp.maximum(k, 1), 0.0)

        window_params = running_mean(state.window_params, params, weight)
        window_variance = state.window_variance + (variance - state.window_variance) * weight
        closes = recording & (k == window)
        better = closes & ((state.n_windows == 0) | (window_variance < state.best_variance))
        best_params = jax.tree_util.tree_map(lambda b, w: jnp.where(better, w, b), state.best_params, window_params)
        new_state = WindowSelectionState(
            n_updates=n_updates,
            in_window=jnp.where(closes, 0, k),
            window_params=window_params,  # the next window's first weight is 1: no reset needed
            window_variance=window_variance,
            n_windows=state.n_windows + closes.astype(jnp.int32),
            best_params=best_params,
            best_variance=jnp.where(better, window_variance, state.best_variance),
            best_end=jnp.where(better, n_updates, state.best_end),
        )
        return updates, new_state

    return optax.GradientTransformationExtraArgs(init, update)


def find_selection_state(opt_state) -> WindowSelectionState:
    """The one :class:`WindowSelectionState` in an optimiser state (at any depth of a chain)."""
    return find_unique_state(opt_state, WindowSelectionState, "lowest_variance_window(window, start)")


def selected_parameters(opt_state):
    """θ_sel, the mean parameters of the chosen window (module docstring).

    Raises ``ValueError`` when no window has been completed yet (the run was shorter than
    ``start + window`` updates).
    """
    state = find_selection_state(opt_state)
    if int(state.n_windows) < 1:
        raise ValueError(f"selected_parameters: no window completed after {int(state.n_updates)} updates; "
                         "run past lowest_variance_window's start + window")
    return state.best_params
