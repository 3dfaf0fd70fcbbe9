"""Gradient and Laplacian of a scalar function of many coordinates, three ways.

For f : R^D → R (here f = log|ψ| of one electron configuration, D = 3·n_electrons) the kinetic
energy needs the gradient ∇f and the Laplacian ∇²f = Σ_k ∂²f/∂x_k². Three interchangeable
implementations sit behind :func:`value_grad_laplacian`'s ``method`` option:

``"hessian"`` — jvp of the gradient. ``∇f`` by reverse mode, linearised once; then the k-th
    Hessian column ``H e_k`` is a forward-mode derivative of ``∇f`` along the unit vector
    ``e_k`` and ``∇²f = Σ_k (H e_k)_k`` (D forward-over-reverse passes, vectorised with vmap).

``"forward"`` — a forward Laplacian written here. The program of ``f`` (its jaxpr) is
    re-evaluated with every intermediate array ``y`` carried as a triple::

        (y, ∇y, ∇²y)      with ∇y of shape (D, *y.shape) and ∇²y of the shape of y,

    propagated in one forward sweep by the rules (Li et al., "Forward Laplacian", 2023)

        linear map L:        (Ly,   L∇y,            L∇²y)
        elementwise φ(y):    (φ(y), φ'(y)∇y,        φ'(y)∇²y + φ''(y)|∇y|²)
        product a·b:         (ab,   a∇b + b∇a,      a∇²b + b∇²a + 2∇a·∇b)

    (dot products and matrix products follow the product rule). Any other primitive (LU
    factorisations, maxima, control flow) falls back to the exact generic rule
    ``∇²(g∘y) = J_g ∇²y + Σ_k (∂_k y)ᵀ H_g (∂_k y)`` evaluated with nested forward-mode
    derivatives of that primitive alone, so every differentiable JAX program is supported.
    Custom-derivative functions are entered through their primal program.

``"folx"`` — the optional forward-Laplacian package ``folx`` (PyPI), when installed.

All three return the same numbers to rounding error; which one is fastest depends on the
network and the machine (see ``benchmarks/molecules.py``).
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp
from jax import lax
from jax.extend import core as jex

METHODS = ("forward", "hessian", "folx")


# --------------------------------------------------------------------------- public entry points
def value_grad_laplacian(f: Callable, x: jax.Array, method: str = "forward"):
    """``(f(x), ∇f(x), ∇²f(x))`` for scalar ``f`` of an array ``x`` (gradient shaped like ``x``).

    Args:
        f: scalar function of one array (for batches, ``jax.vmap`` this function).
        x: the point; any shape, floating dtype.
        method: ``"forward"`` (own forward Laplacian), ``"hessian"`` (jvp of the gradient) or
            ``"folx"`` (optional package).
    """
    if method == "forward":
        return forward_laplacian(f, x)
    if method == "hessian":
        return hessian_laplacian(f, x)
    if method == "folx":
        return folx_laplacian(f, x)
    raise ValueError(f"unknown Laplacian method {method!r}; available: {', '.join(METHODS)}")


def hessian_laplacian(f: Callable, x: jax.Array):
    """Laplacian as the trace of the Hessian, one jvp of ``∇f`` per coordinate."""
    x = jnp.asarray(x)
    shape, d = x.shape, x.size
    flat = lambda v: f(v.reshape(shape))
    value = flat(x.reshape(-1))
    grad, hvp = jax.linearize(jax.grad(flat), x.reshape(-1))
    eye = jnp.eye(d, dtype=x.dtype)
    columns = jax.vmap(hvp)(eye)  # row k = H e_k
    return value, grad.reshape(shape), jnp.trace(columns)


def folx_laplacian(f: Callable, x: jax.Array):
    """Laplacian by the optional ``folx`` package (raises ImportError naming it when absent)."""
    try:
        import folx
    except ImportError as err:  # pragma: no cover - depends on the environment
        raise ImportError("method='folx' needs the optional package folx (pip install folx)") from err
    x = jnp.asarray(x)
    shape = x.shape
    out = folx.forward_laplacian(lambda v: f(v.reshape(shape)))(x.reshape(-1))
    grad = out.jacobian.dense_array.reshape(shape)
    return out.x, grad, out.laplacian


def forward_laplacian(f: Callable, x: jax.Array):
    """Own forward Laplacian: one sweep through the jaxpr of ``f`` carrying (y, ∇y, ∇²y)."""
    x = jnp.asarray(x)
    if not jnp.issubdtype(x.dtype, jnp.floating):
        raise ValueError(f"forward_laplacian needs a floating point input, got dtype {x.dtype}")
    shape, d = x.shape, x.size
    closed = jax.make_jaxpr(f)(x)
    seed = _Jet(x, jnp.eye(d, dtype=x.dtype).reshape(d, *shape), jnp.zeros_like(x))
    (out,) = _eval_jaxpr(closed.jaxpr, closed.consts, [seed])
    if not isinstance(out, _Jet):  # f does not depend on x
        return out, jnp.zeros_like(x), jnp.zeros_like(out)
    if out.v.ndim != 0:
        raise ValueError(f"forward_laplacian needs a scalar function, got output shape {out.v.shape}")
    return out.v, out.g.reshape(shape), out.l


# --------------------------------------------------------------------------- the interpreter
class _Jet(NamedTuple):
    """An intermediate carried with its gradient (D, *shape) and Laplacian (shape)."""

    v: jax.Array
    g: jax.Array
    l: jax.Array


def _bind_params(prim, params):
    """``(subfuns, params)`` for ``prim.bind`` across JAX versions."""
    out = prim.get_bind_params(params)
    if isinstance(out, tuple) and len(out) == 2 and isinstance(out[0], (list, tuple)):
        return list(out[0]), out[1]
    return [], out


def _is_jet(a) -> bool:
    return isinstance(a, _Jet)


def _value(a):
    return a.v if isinstance(a, _Jet) else a


def _inexact(aval) -> bool:
    return jnp.issubdtype(aval.dtype, jnp.inexact)


def _eval_jaxpr(jaxpr, consts, args):
    env: dict = {}

    def read(a):
        return a.val if isinstance(a, jex.Literal) else env[a]

    def write(var, val):
        if type(var).__name__ != "DropVar":
            env[var] = val

    for var, val in zip(jaxpr.constvars, consts):
        write(var, val)
    for var, val in zip(jaxpr.invars, args):
        write(var, val)
    for eqn in jaxpr.eqns:
        ins = [read(a) for a in eqn.invars]
        if any(_is_jet(a) for a in ins):
            outs = _apply_rule(eqn, ins)
        else:
            subfuns, params = _bind_params(eqn.primitive, eqn.params)
            outs = eqn.primitive.bind(*subfuns, *ins, **params)
        if not eqn.primitive.multiple_results:
            outs = [outs]
        for var, val in zip(eqn.outvars, outs):
            write(var, val)
    return [read(a) for a in jaxpr.outvars]


# Primitives linear in all of their (floating) operands.
_LINEAR_ALL = {
    "neg", "reshape", "broadcast_in_dim", "transpose", "squeeze", "expand_dims", "slice",
    "reduce_sum", "rev", "copy", "copy_p", "real", "imag", "conj", "reduce_precision", "cumsum",
    "pad", "concatenate", "add", "sub", "add_any", "sharding_constraint", "split", "complex",
    "mesh_cast", "reshard",
}
# Primitives linear in some operands, the others being fixed parameters (indices, predicates).
_LINEAR_IN = {
    "gather": (0,),
    "dynamic_slice": (0,),
    "dynamic_update_slice": (0, 1),
    "scatter-add": (0, 2),
    "scatter_add": (0, 2),
    "select_n": None,  # all but the predicate (slot 0)
}
# Elementwise functions of one operand (further operands, if any, must be constants).
_ELEMENTWISE = {
    "exp", "exp2", "log", "log1p", "expm1", "tanh", "logistic", "sin", "cos", "tan", "sqrt",
    "rsqrt", "cbrt", "integer_pow", "pow", "abs", "erf", "erfc", "atan", "asin", "acos", "sinh",
    "cosh", "asinh", "acosh", "atanh", "square", "lgamma", "digamma", "erf_inv", "logaddexp",
}
# Piecewise-constant results: derivative zero (almost everywhere), computed on values only.
_ZERO_DERIVATIVE = {
    "sign", "floor", "ceil", "round", "is_finite", "eq", "ne", "lt", "le", "gt", "ge", "and", "or",
    "not", "xor", "stop_gradient", "argmax", "argmin", "iota", "nextafter", "population_count",
    "reduce_and", "reduce_or", "shift_left", "shift_right_logical", "shift_right_arithmetic",
}
_CALLS = {"pjit", "jit", "closed_call", "core_call", "custom_jvp_call", "custom_vjp_call",
          "custom_vjp_call_jaxpr", "remat", "checkpoint", "custom_lin"}


def _apply_rule(eqn, ins):
    prim = eqn.primitive
    name = prim.name
    params = eqn.params
    float_outs = [_inexact(v.aval) for v in eqn.outvars]

    if name in _CALLS:
        sub = params.get("jaxpr", params.get("call_jaxpr", params.get("fun_jaxpr")))
        if sub is not None:
            if hasattr(sub, "consts"):
                outs = _eval_jaxpr(sub.jaxpr, sub.consts, ins)
            else:
                outs = _eval_jaxpr(sub, [], ins)
            return outs if prim.multiple_results else outs[0]
    if name in _ZERO_DERIVATIVE or not any(float_outs):
        subfuns, bparams = _bind_params(prim, params)
        return prim.bind(*subfuns, *[_value(a) for a in ins], **bparams)
    if name == "convert_element_type":
        if not float_outs[0]:
            return prim.bind(_value(ins[0]), **params)
        return _linear(prim, params, ins, (0,))
    if name in _LINEAR_ALL:
        return _linear(prim, params, ins, tuple(range(len(ins))))
    if name in _LINEAR_IN:
        slots = _LINEAR_IN[name]
        if slots is None:
            slots = tuple(range(1, len(ins)))
        if all(i in slots for i, a in enumerate(ins) if _is_jet(a)):
            return _linear(prim, params, ins, slots)
        return _generic(eqn, ins)
    if name in ("mul", "dot_general"):
        a, b = ins
        if not _is_jet(a):
            return _linear(prim, params, ins, (1,))
        if not _is_jet(b):
            return _linear(prim, params, ins, (0,))
        return _bilinear(prim, params, a, b)
    if name == "div":
        a, b = ins
        if not _is_jet(b):
            return _linear(prim, params, ins, (0,))
        inv = _unary(lambda t: 1.0 / t, b)
        if not _is_jet(a):
            return _linear(lax.mul_p, {}, [a, inv], (1,))
        return _bilinear(lax.mul_p, {}, a, inv)
    if name in _ELEMENTWISE and all(not _is_jet(a) for a in ins[1:]):
        rest = [_value(a) for a in ins[1:]]
        return _unary(lambda t: prim.bind(t, *rest, **params), ins[0])
    return _generic(eqn, ins)


def _linear(prim, params, ins, slots):
    """Rule for a map linear in the operands at ``slots`` (others fixed)."""
    values = [_value(a) for a in ins]
    v = prim.bind(*values, **params)
    jets = [i for i in slots if _is_jet(ins[i])]

    def with_tangents(tangents):
        args = list(values)
        for i in slots:
            args[i] = jnp.zeros_like(values[i]) if not _is_jet(ins[i]) else None
        for i, t in zip(jets, tangents):
            args[i] = t
        return prim.bind(*args, **params)

    g = jax.vmap(lambda *ts: with_tangents(ts))(*[ins[i].g for i in jets])
    l = with_tangents([ins[i].l for i in jets])
    if prim.multiple_results:
        return [_Jet(vi, gi, li) for vi, gi, li in zip(v, g, l)]
    return _Jet(v, g, l)


def _bilinear(prim, params, a: _Jet, b: _Jet):
    """Product rule for ``prim(a, b)`` bilinear (mul, dot_general)."""
    op = lambda x, y: prim.bind(x, y, **params)
    v = op(a.v, b.v)
    g = jax.vmap(op, (0, None))(a.g, b.v) + jax.vmap(op, (None, 0))(a.v, b.g)
    cross = jnp.sum(jax.vmap(op)(a.g, b.g), axis=0)
    l = op(a.l, b.v) + op(a.v, b.l) + 2.0 * cross
    return _Jet(v, g, l)


def _unary(fn, a):
    """Chain rule for an elementwise function of one jet."""
    if not _is_jet(a):
        return fn(a)
    ones = jnp.ones_like(a.v)
    first = lambda t: jax.jvp(fn, (t,), (ones,))[1]
    (v, d1) = jax.jvp(fn, (a.v,), (ones,))
    d2 = jax.jvp(first, (a.v,), (ones,))[1]
    g = d1 * a.g
    l = d1 * a.l + d2 * jnp.sum(a.g * a.g, axis=0)
    return _Jet(v, g, l)


def _generic(eqn, ins):
    """Exact rule for any differentiable primitive via nested forward derivatives.

    With y the jet inputs and g the primitive: ∇(g∘y) = J_g ∇y and
    ∇²(g∘y) = J_g ∇²y + Σ_k (∂_k y)ᵀ H_g (∂_k y), the last term a second directional
    derivative along each column ∂_k y.
    """
    prim = eqn.primitive
    subfuns, bparams = _bind_params(prim, eqn.params)
    values = [_value(a) for a in ins]
    jet_idx = [i for i, a in enumerate(ins) if _is_jet(a)]
    float_outs = [k for k, var in enumerate(eqn.outvars) if _inexact(var.aval)]

    def fn(*jv):
        args = list(values)
        for i, t in zip(jet_idx, jv):
            args[i] = t
        out = prim.bind(*subfuns, *args, **bparams)
        out = out if prim.multiple_results else [out]
        return tuple(out[k] for k in float_outs)

    primals = tuple(values[i] for i in jet_idx)

    def along(*u):
        first = lambda *p: jax.jvp(fn, p, u)[1]
        return jax.jvp(first, primals, u)

    t1, t2 = jax.vmap(along)(*[ins[i].g for i in jet_idx])
    outs, jl = jax.jvp(fn, primals, tuple(ins[i].l for i in jet_idx))
    all_outs = prim.bind(*subfuns, *values, **bparams)
    all_outs = list(all_outs) if prim.multiple_results else [all_outs]
    for j, k in enumerate(float_outs):
        all_outs[k] = _Jet(outs[j], t1[j], jl[j] + jnp.sum(t2[j], axis=0))
    return all_outs if prim.multiple_results else all_outs[0]
