"""Explicit Runge-Kutta integrators of dy/dt = f(t, y) over pytrees, fixed-step and adaptive.

One step of an s-stage explicit method with Butcher tableau (a, b, c) is

    k_i = f(t + c_i h, y + h Σ_{j<i} a_ij k_j),      y(t + h) = y + h Σ_i b_i k_i ,

and an embedded pair adds a second weight vector b̂ of lower order q, so that

    e = h Σ_i (b_i − b̂_i) k_i                                      (error estimate, O(h^{q+1}))

costs no extra evaluation. Methods (``TABLEAUS``): ``"euler"`` (order 1), ``"heun"`` (2),
``"rk4"`` (classic, 4), ``"rk23"`` (Bogacki & Shampine 1989, 3(2)) and ``"rk45"``
(Dormand & Prince 1980, 5(4)); the coefficients are the published ones (from memory).

The right-hand side is ``f(t, y, carry, key) -> (dy, carry, info)``: ``carry`` is threaded
through the stages in order (Markov chains continue from stage to stage) and each stage gets
its own key, split from the step's key, so a step is a pure function of (t, y, h, carry, key)
and a run is reproducible by seed. ``info`` of the first stage (at (t, y)) is returned: it
carries what the error norm needs (the TDVP metric S).

Step-size control (:func:`next_step_size`, the standard controller, Hairer, Nørsett & Wanner,
*Solving ODEs I*, §II.4): a step with error norm ‖e‖ ≤ tol is accepted; either way the next
step is h · min(grow, max(shrink, safety · (tol/‖e‖)^{1/(q+1)})). For the TDVP the norm is the
distance in the metric of the state space, ‖e‖_S = (e† S e)^{1/2} (a Fubini-Study length), so
``tol`` bounds the per-step error of the *state*, not of individual parameters. With Monte Carlo
estimates the stages see independent noise, which the error estimate also measures: the steps
then also shrink until h · noise < tol.
"""

from __future__ import annotations

from fractions import Fraction as Fr
from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import one_of

__all__ = ["Tableau", "TABLEAUS", "tableau", "runge_kutta_step", "next_step_size"]


class Tableau(NamedTuple):
    """Butcher tableau: ``a`` (s×s, strictly lower), ``b`` (s,), ``c`` (s,), ``order``;
    embedded pairs also ``b_low`` (s,) of order ``low_order``."""

    name: str
    a: tuple
    b: tuple
    c: tuple
    order: int
    b_low: tuple | None = None
    low_order: int | None = None

    @property
    def adaptive(self) -> bool:
        """True when the tableau carries an embedded lower-order solution (error estimate)."""
        return self.b_low is not None

    @property
    def stages(self) -> int:
        """Number of stages s (evaluations of the TDVP right-hand side per step)."""
        return len(self.b)


def _f(rows):
    return tuple(tuple(float(Fr(v)) for v in row) for row in rows)


def _v(row):
    return tuple(float(Fr(v)) for v in row)


#: The Butcher tableaus by name (euler, heun, rk4; adaptive rk23 and rk45).
TABLEAUS = {
    "euler": Tableau("euler", _f([[0]]), _v([1]), _v([0]), 1),
    "heun": Tableau("heun", _f([[0, 0], [1, 0]]), _v(["1/2", "1/2"]), _v([0, 1]), 2),
    "rk4": Tableau("rk4", _f([[0, 0, 0, 0], ["1/2", 0, 0, 0], [0, "1/2", 0, 0], [0, 0, 1, 0]]),
                   _v(["1/6", "1/3", "1/3", "1/6"]), _v([0, "1/2", "1/2", 1]), 4),
    "rk23": Tableau("rk23", _f([[0, 0, 0, 0], ["1/2", 0, 0, 0], [0, "3/4", 0, 0], ["2/9", "1/3", "4/9", 0]]),
                    _v(["2/9", "1/3", "4/9", 0]), _v([0, "1/2", "3/4", 1]), 3,
                    _v(["7/24", "1/4", "1/3", "1/8"]), 2),
    "rk45": Tableau(
        "rk45",
        _f([[0] * 7,
            ["1/5", 0, 0, 0, 0, 0, 0],
            ["3/40", "9/40", 0, 0, 0, 0, 0],
            ["44/45", "-56/15", "32/9", 0, 0, 0, 0],
            ["19372/6561", "-25360/2187", "64448/6561", "-212/729", 0, 0, 0],
            ["9017/3168", "-355/33", "46732/5247", "49/176", "-5103/18656", 0, 0],
            ["35/384", 0, "500/1113", "125/192", "-2187/6784", "11/84", 0]]),
        _v(["35/384", 0, "500/1113", "125/192", "-2187/6784", "11/84", 0]),
        _v([0, "1/5", "3/10", "4/5", "8/9", 1, 1]), 5,
        _v(["5179/57600", 0, "7571/16695", "393/640", "-92097/339200", "187/2100", "1/40"]), 4),
}


def tableau(name) -> Tableau:
    """The tableau of a method name (one of ``TABLEAUS``), or a :class:`Tableau` as given."""
    if isinstance(name, Tableau):
        return name
    if not isinstance(name, str):
        raise TypeError(f"integrator must be a method name (one of {', '.join(TABLEAUS)}), got {name!r}")
    return TABLEAUS[one_of("integrator", name, tuple(TABLEAUS))]


def runge_kutta_step(f: Callable, tab: Tableau, t, y, h, carry, key, error_norm: Callable | None = None):
    """One step of ``tab`` from (t, y) with step ``h``.

    Returns ``(y_new, carry, error, info)``: ``error`` is ``error_norm(e, info)`` of the
    embedded estimate (0 for fixed-step methods; Euclidean norm when ``error_norm`` is None) and
    ``info`` is the right-hand side's info at the first stage.

    The stages run in one ``lax.scan`` (the stage derivatives k_i stacked along a leading axis,
    y_i = y + h Σ_j a_ij k_j with the zero upper triangle included), so ``f`` is traced and
    compiled once whatever the number of stages.
    """
    s = tab.stages
    keys = jax.random.split(key, s)
    a = jnp.asarray(tab.a, jnp.result_type(float))
    c = jnp.asarray(tab.c, jnp.result_type(float))
    k_shape = jax.eval_shape(lambda yy, cc, kk: f(t, yy, cc, kk)[0], y, carry, keys[0])
    ks0 = jax.tree_util.tree_map(lambda l: jnp.zeros((s, *l.shape), l.dtype), k_shape)

    def combine(base, weights, ks):
        return jax.tree_util.tree_map(
            lambda l, kk: l + (h * jnp.tensordot(weights.astype(kk.dtype), kk, axes=1)).astype(l.dtype), base, ks)

    def stage(state, inputs):
        ks, cry = state
        i, a_row, c_i, k_i = inputs
        yi = combine(y, a_row, ks)
        k, cry, info = f(t + c_i * h, yi, cry, k_i)
        ks = jax.tree_util.tree_map(lambda stack, new: stack.at[i].set(new), ks, k)
        return (ks, cry), info

    (ks, carry), infos = jax.lax.scan(stage, (ks0, carry), (jnp.arange(s), a, c, keys))
    info0 = jax.tree_util.tree_map(lambda l: l[0], infos)
    y_new = combine(y, jnp.asarray(tab.b, a.dtype), ks)
    if tab.adaptive:
        zero = jax.tree_util.tree_map(jnp.zeros_like, y)
        e = combine(zero, jnp.asarray(tab.b, a.dtype) - jnp.asarray(tab.b_low, a.dtype), ks)
        if error_norm is None:
            error = jnp.sqrt(sum(jnp.sum(jnp.abs(l) ** 2) for l in jax.tree_util.tree_leaves(e)))
        else:
            error = error_norm(e, info0)
    else:
        error = jnp.zeros((), jnp.result_type(float))
    return y_new, carry, error, info0


def next_step_size(h, error, tol, low_order: int, safety: float = 0.9, shrink: float = 0.2, grow: float = 5.0):
    """``(accepted, h_next)`` of the standard controller (module docstring). Works on host floats
    and on traced scalars; a non-finite error rejects the step and shrinks h by ``shrink``."""
    xp = jnp if isinstance(error, jax.Array) else np
    finite = xp.isfinite(error)
    safe_err = xp.where(finite & (error > 0), error, 1.0)
    factor = xp.where(error > 0, safety * (tol / safe_err) ** (1.0 / (low_order + 1)), grow)
    factor = xp.where(finite, xp.clip(factor, shrink, grow), shrink)
    return finite & (error <= tol), h * factor
