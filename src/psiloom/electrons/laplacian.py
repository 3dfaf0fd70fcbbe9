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

    (dot products and matrix products follow the product rule).

    Per-particle blocks. When x has shape (n, w) (n particles, w = 3 coordinates each) most
    early intermediates depend on few particles along one axis: a one-electron feature y[.., i, ..]
    depends on r_i only, a pair quantity y[.., i, .., j, ..] on r_i and r_j. Such a gradient is
    stored as *blocks*, one per particle axis a, each of shape ``(w, *y.shape)``::

        ∂y[.., i_a, ..] / ∂x_{e,c} = δ(e, i_a) b_a[c, .., i_a, ..]     (summed over the blocks),

    beside (or instead of) the dense part ``(D, *y.shape)``; x itself is one block on axis 0 with
    b[c, i, k] = δ_ck. A pair quantity then costs 2w instead of D = n·w numbers per entry, a
    one-particle quantity w instead of D. The rules keep blocks where the math allows::

        linear map L:        each block goes through L and keeps its particle axis, moved to
                             where L puts it (broadcasts, transposes, reshapes; sums, slices,
                             gathers, concatenations, dot_general along other axes); where L
                             contracts the particle axis (sum or dot_general over particles), the
                             result depends on every particle: that block turns dense, the
                             contracted axis taken as a batch axis (particle e's term is the
                             derivative along x_e), a sum over it as a mere axis move;
        elementwise φ(y):    φ'(y) times each block, and |∇y|² = Σ_a |b_a|² + 2 Σ_{a<a'}
                             δ(i_a, i_a') b_a·b_a' (+ dense terms);
        products:            block by block; the cross term ∇a·∇b pairs a block on axis p with
                             one on axis q through δ(i_p, i_q): no mask for the same (or a
                             contracted or batched pair of) axes, else a mask on two axes of one
                             operand or of the result; against a dense part the block's own
                             particle rows are taken (a diagonal), not the block scattered.

    A jet with a dense part absorbs its blocks into it (once every particle matters nothing is
    left to save), and anything without a block rule (a slice along the particle axis, dynamic
    slices, scatters, the generic rule below) scatters blocks into the dense form first: b_a
    placed at rows e = i_a, exactly. The form changes the cost, never the numbers
    (``sparse=False`` keeps everything dense).

    A listed set of further primitives (``GENERIC_RULE``: LU and other factorisations, maxima,
    control flow) uses the exact generic rule ``∇²(g∘y) = J_g ∇²y + Σ_k (∂_k y)ᵀ H_g (∂_k y)``
    evaluated with nested forward-mode derivatives of that primitive alone. Custom-derivative
    functions are entered through their primal program.

    No silent slow path: a primitive in none of these lists (a JAX version that renamed or
    added one) still gets the exact generic rule, but first an :class:`UnknownPrimitiveWarning`
    names it (once per primitive, Python's default warning filter); psiloom's test suite turns
    that warning into an error (``filterwarnings`` in ``pyproject.toml``), so CI fails on the
    JAX versions it tests rather than slowing down. The supported JAX versions are the range
    pinned in ``pyproject.toml``, which is what CI installs.

``"folx"`` — the optional forward-Laplacian package ``folx`` (PyPI), when installed.

All three return the same numbers to rounding error; which one is fastest depends on the
network and the machine (see ``benchmarks/molecules.py``).
"""

from __future__ import annotations

import math
import warnings
from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp
from jax import lax
from jax.extend import core as jex

from psiloom._validation import boolean

METHODS = ("forward", "hessian", "folx")


class UnknownPrimitiveWarning(RuntimeWarning):
    """The forward Laplacian met a JAX primitive without a rule of its own (see module docstring)."""


# --------------------------------------------------------------------------- public entry points
def value_grad_laplacian(f: Callable, x: jax.Array, method: str = "forward"):
    """``(f(x), ∇f(x), ∇²f(x))`` for scalar ``f`` of an array ``x`` (gradient shaped like ``x``).

    Args:
        f: scalar function of one array (for batches, ``jax.vmap`` this function).
        x: the point; any shape, floating dtype.
        method: ``"forward"`` (own forward Laplacian; per-particle blocks when ``x`` has shape
            ``(n_particles, 3)``), ``"hessian"`` (jvp of the gradient) or ``"folx"`` (optional
            package).
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


def forward_laplacian(f: Callable, x: jax.Array, sparse: bool = True):
    """Own forward Laplacian: one sweep through the jaxpr of ``f`` carrying (y, ∇y, ∇²y).

    Args:
        f: scalar function of one array.
        x: the point. With shape ``(n, d)`` (n particles in d dimensions, n ≥ 2) and
            ``sparse=True`` gradients of intermediates that depend on one particle per slice are
            kept in the per-particle block form (module docstring); otherwise all are dense.
        sparse: use the per-particle block form where it applies (same numbers to rounding).
    """
    x = jnp.asarray(x)
    if not jnp.issubdtype(x.dtype, jnp.floating):
        raise ValueError(f"forward_laplacian needs a floating point input, got dtype {x.dtype}")
    sparse = boolean("sparse", sparse)
    shape, d = x.shape, x.size
    closed = jax.make_jaxpr(f)(x)
    if sparse and x.ndim == 2 and x.shape[0] > 1:
        n, w = x.shape
        layout = _Layout(n, w)
        # block g[c, i, k] = ∂x_ik / ∂r_ic = δ_ck on axis 0 (particle i)
        block = jnp.broadcast_to(jnp.eye(w, dtype=x.dtype)[:, None, :], (w, n, w))
        seed = _Jet(x, None, jnp.zeros_like(x), ((0, block),))
    else:
        layout = _Layout(d, 1)
        seed = _Jet(x, jnp.eye(d, dtype=x.dtype).reshape(d, *shape), jnp.zeros_like(x))
    (out,) = _eval_jaxpr(closed.jaxpr, closed.consts, [seed], layout)
    if not isinstance(out, _Jet):  # f does not depend on x
        return out, jnp.zeros_like(x), jnp.zeros_like(out)
    if out.v.ndim != 0:
        raise ValueError(f"forward_laplacian needs a scalar function, got output shape {out.v.shape}")
    return out.v, _full_gradient(out, layout).reshape(shape), out.l


# --------------------------------------------------------------------------- the jets
class _Layout(NamedTuple):
    """Input of shape (n, w): n particles with w coordinates each, D = n·w (dense: n = D, w = 1)."""

    n: int
    w: int


class _Jet(NamedTuple):
    """An intermediate y with its Laplacian and its gradient in two parts (module docstring):

    ``g`` — dense part (D, *shape) or None; ``blocks`` — ((axis, b), ...) with distinct axes,
    b of shape (w, *shape): ∂y[..., i_axis, ...]/∂x_{e,c} = δ(e, i_axis) b[c, ..., i_axis, ...].
    """

    v: jax.Array
    g: jax.Array | None
    l: jax.Array
    blocks: tuple = ()


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


def _axis_array(n: int, ndim: int, axes: tuple, dtype):
    """eye(n) laid along ``axes`` (two of them) of an ndim array, size 1 elsewhere."""
    shape = [n if k in axes else 1 for k in range(ndim)]
    return jnp.eye(n, dtype=dtype).reshape(shape)


def _one_hot(layout: _Layout, ndim: int, axis: int, dtype):
    """(n, 1, …, n at 1+axis, …): δ(e, i_axis) with the particle e leading."""
    shape = [layout.n] + [layout.n if k == axis else 1 for k in range(ndim)]
    return jnp.eye(layout.n, dtype=dtype).reshape(shape)


def _densify_block(layout: _Layout, axis: int, b):
    """(D, *shape) dense gradient of one block (scatter along the particle index)."""
    shape = b.shape[1:]
    full = _one_hot(layout, len(shape), axis, b.dtype)[:, None] * b[None]
    return full.reshape(layout.n * layout.w, *shape)


def _take_particle(layout: _Layout, g, axis: int):
    """(w, *shape): Σ_e δ(e, i_axis) g[(e, c), ...] — the part of a dense gradient that a block on
    ``axis`` meets in a contraction over D (broadcast sizes of 1 along ``axis`` are allowed)."""
    shape = g.shape[1:]
    full = g.reshape(layout.n, layout.w, *shape)
    if shape[axis] == 1:  # broadcast along the axis: particle e's rows sit at index 0
        return jnp.moveaxis(jnp.squeeze(full, 2 + axis), 0, 1 + axis)
    return jnp.moveaxis(jnp.diagonal(full, axis1=0, axis2=2 + axis), -1, 1 + axis)


def _full_gradient(a: _Jet, layout: _Layout):
    """Dense (D, *shape) gradient of a jet (zeros when it has none)."""
    total = a.g
    for axis, b in a.blocks:
        dense = _densify_block(layout, axis, b)
        total = dense if total is None else total + dense
    if total is None:
        total = jnp.zeros((layout.n * layout.w, *jnp.shape(a.v)), a.v.dtype)
    return total


def _dense_jet(a, layout: _Layout):
    return _Jet(a.v, _full_gradient(a, layout), a.l) if _is_jet(a) else a


def _sum(terms, like):
    terms = [t for t in terms if t is not None]
    if not terms:
        return jnp.zeros_like(like)
    total = terms[0]
    for t in terms[1:]:
        total = total + t
    return total


def _grad_square(a: _Jet, layout: _Layout):
    """|∇y|² = Σ_{e,c} (∂y/∂x_ec)² elementwise, from the dense part and the blocks."""
    terms = [] if a.g is None else [jnp.sum(a.g * a.g, axis=0)]
    ndim = a.v.ndim
    for k, (p, bp) in enumerate(a.blocks):
        terms.append(jnp.sum(bp * bp, axis=0))
        for q, bq in a.blocks[k + 1:]:
            terms.append(2.0 * jnp.sum(bp * bq, axis=0) * _axis_array(layout.n, ndim, (p, q), bp.dtype))
        if a.g is not None:
            terms.append(2.0 * jnp.sum(_take_particle(layout, a.g, p) * bp, axis=0))
    return _sum(terms, a.v)


def _make_jet(v, g, l, blocks, layout: _Layout):
    """A jet in normal form: blocks sorted by axis, and folded into the dense part if there is one
    (a gradient that depends on all particles gains nothing from keeping blocks beside it)."""
    blocks = tuple(sorted(blocks, key=lambda t: t[0]))
    if g is not None and blocks:
        g = _sum([g, *(_densify_block(layout, axis, b) for axis, b in blocks)], None)
        blocks = ()
    return _Jet(v, g, l, blocks)


def _add_jets(v, l, parts, layout: _Layout):
    """Jet with value v, Laplacian l and gradient the sum of the parts' gradients."""
    dense = [p.g for p in parts if p.g is not None]
    blocks: dict = {}
    for p in parts:
        for axis, b in p.blocks:
            blocks[axis] = b if axis not in blocks else blocks[axis] + b
    g = None if not dense else _sum(dense, None)
    return _make_jet(v, g, l, blocks.items(), layout)


# --------------------------------------------------------------------------- the interpreter
def _eval_jaxpr(jaxpr, consts, args, layout: _Layout):
    env: dict = {}

    def read(a):
        return a.val if isinstance(a, jex.Literal) else env[a]

    def write(var, val):
        if not isinstance(var, jex.DropVar):
            env[var] = val

    for var, val in zip(jaxpr.constvars, consts):
        write(var, val)
    for var, val in zip(jaxpr.invars, args):
        write(var, val)
    for eqn in jaxpr.eqns:
        ins = [read(a) for a in eqn.invars]
        if any(_is_jet(a) for a in ins):
            outs = _apply_rule(eqn, ins, layout)
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
_LINEAR_IN: dict[str, tuple[int, ...] | None] = {
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
#: Primitives known to need the exact generic rule (no cheaper structure exploited).
GENERIC_RULE = frozenset({
    "lu", "lu_pivots_to_permutation", "triangular_solve", "cholesky", "qr", "householder_product", "eigh",
    "svd", "custom_linear_solve", "reduce_max", "reduce_min", "max", "min", "clamp", "atan2", "rem",
    "cond", "while", "scan", "sort", "cumprod", "cummax", "cummin", "cumlogsumexp", "reduce_prod",
    "select_and_gather_add", "reduce_window_sum", "conv_general_dilated", "erf_inv",
})
_CALLS = {"pjit", "jit", "closed_call", "core_call", "custom_jvp_call", "custom_vjp_call",
          "custom_vjp_call_jaxpr", "remat", "checkpoint", "custom_lin"}
# Elementwise in every operand (operands of equal rank): a particle axis stays where it is.
_SAME_AXIS = {
    "neg", "copy", "copy_p", "real", "imag", "conj", "reduce_precision", "convert_element_type", "add", "sub",
    "add_any", "select_n", "sharding_constraint", "mesh_cast", "reshard", "complex", "mul", "div",
}


def _apply_rule(eqn, ins, layout: _Layout):
    prim = eqn.primitive
    name = prim.name
    params = eqn.params
    float_outs = [_inexact(v.aval) for v in eqn.outvars]

    if name in _CALLS:
        sub = params.get("jaxpr", params.get("call_jaxpr", params.get("fun_jaxpr")))
        if sub is not None:
            if hasattr(sub, "consts"):
                outs = _eval_jaxpr(sub.jaxpr, sub.consts, ins, layout)
            else:
                outs = _eval_jaxpr(sub, [], ins, layout)
            return outs if prim.multiple_results else outs[0]
    if name in _ZERO_DERIVATIVE or not any(float_outs):
        subfuns, bparams = _bind_params(prim, params)
        return prim.bind(*subfuns, *[_value(a) for a in ins], **bparams)
    if name == "convert_element_type":
        if not float_outs[0]:
            return prim.bind(_value(ins[0]), **params)
        return _linear(prim, params, ins, (0,), layout)
    if name in _LINEAR_ALL:
        return _linear(prim, params, ins, tuple(range(len(ins))), layout)
    if name in _LINEAR_IN:
        slots = _LINEAR_IN[name]
        if slots is None:
            slots = tuple(range(1, len(ins)))
        if all(i in slots for i, a in enumerate(ins) if _is_jet(a)):
            return _linear(prim, params, ins, slots, layout)
        return _generic(eqn, ins, layout)
    if name in ("mul", "dot_general"):
        a, b = ins
        if not _is_jet(a):
            return _linear(prim, params, ins, (1,), layout)
        if not _is_jet(b):
            return _linear(prim, params, ins, (0,), layout)
        return _bilinear(prim, params, a, b, layout)
    if name == "div":
        a, b = ins
        if not _is_jet(b):
            return _linear(prim, params, ins, (0,), layout)
        inv = _unary(lambda t: 1.0 / t, b, layout)
        if not _is_jet(a):
            return _linear(lax.mul_p, {}, [a, inv], (1,), layout)
        return _bilinear(lax.mul_p, {}, a, inv, layout)
    if name in _ELEMENTWISE and all(not _is_jet(a) for a in ins[1:]):
        rest = [_value(a) for a in ins[1:]]
        return _unary(lambda t: prim.bind(t, *rest, **params), ins[0], layout)
    if not _is_known(name):
        warnings.warn(f"forward_laplacian has no rule for the JAX primitive {name!r} (JAX {jax.__version__}); "
                      "using the exact but slower generic rule. Supported JAX versions: see psiloom's "
                      "pyproject.toml", UnknownPrimitiveWarning, stacklevel=2)
    return _generic(eqn, ins, layout)


def _is_known(name: str) -> bool:
    """Whether a primitive has a rule of its own or is listed for the generic rule."""
    return (name in GENERIC_RULE or name in _LINEAR_ALL or name in _LINEAR_IN or name in _ELEMENTWISE
            or name in _CALLS or name in ("mul", "dot_general", "div", "convert_element_type"))


def _dot_free(ndim: int, contract, batch):
    return [k for k in range(ndim) if k not in contract and k not in batch]


def _axis_map(name: str, params, shapes, slot: int, axis: int):
    """Output position of the particle axis ``axis`` of operand ``slot`` under a linear map, or
    None where the map mixes particles along it (contracts, slices or reshapes that axis)."""
    shape = shapes[slot]
    if name in _SAME_AXIS:
        return axis
    if name == "broadcast_in_dim":
        return params["broadcast_dimensions"][axis]
    if name == "transpose":
        return list(params["permutation"]).index(axis)
    if name == "squeeze":
        dims = params["dimensions"]
        return None if axis in dims else axis - sum(1 for k in dims if k < axis)
    if name == "reduce_sum":
        axes = params["axes"]
        return None if axis in axes else axis - sum(1 for k in axes if k < axis)
    if name == "reshape":
        if params.get("dimensions") is not None:
            return None
        new = tuple(params["new_sizes"])
        prefix = math.prod(shape[:axis])
        for k, size in enumerate(new):
            if size == shape[axis] and math.prod(new[:k]) == prefix:
                return k
        return None
    if name == "slice":
        strides = params.get("strides")
        whole = (params["start_indices"][axis] == 0 and params["limit_indices"][axis] == shape[axis]
                 and (strides is None or strides[axis] == 1))
        return axis if whole else None
    if name == "pad":
        return axis if tuple(params["padding_config"][axis]) == (0, 0, 0) else None
    if name == "rev":
        return None if axis in params["dimensions"] else axis
    if name == "cumsum":
        return None if params["axis"] == axis else axis
    if name == "concatenate":
        return None if params["dimension"] == axis else axis
    if name == "split":
        return None if params["axis"] == axis else axis
    if name == "gather" and slot == 0:
        dn = params["dimension_numbers"]
        fixed = set(dn.collapsed_slice_dims) | set(dn.operand_batching_dims)
        if axis in fixed or axis in dn.start_index_map or params["slice_sizes"][axis] != shape[axis]:
            return None
        kept = [k for k in range(len(shape)) if k not in fixed]
        return dn.offset_dims[kept.index(axis)]
    if name == "dot_general":
        (lc, rc), (lb, rb) = params["dimension_numbers"]
        lhs_free = _dot_free(len(shapes[0]), lc, lb)
        rhs_free = _dot_free(len(shapes[1]), rc, rb)
        contract, batch, free = (lc, lb, lhs_free) if slot == 0 else (rc, rb, rhs_free)
        if axis in batch:
            return list(batch).index(axis)
        if axis in contract:
            return None
        return len(lb) + (free.index(axis) if slot == 0 else len(lhs_free) + free.index(axis))
    return None


def _linear(prim, params, ins, slots, layout: _Layout):
    """Rule for a map linear in the operands at ``slots`` (others fixed): applied to the dense
    part, to each block (which keeps its particle axis where the map allows, else is scattered
    into the dense part), and to the Laplacian."""
    values = [_value(a) for a in ins]
    v = prim.bind(*values, **params)
    jets = [i for i in slots if _is_jet(ins[i])]
    shapes = [jnp.shape(a) for a in values]

    def with_tangents(tangents: dict):
        args = list(values)
        for i in slots:
            args[i] = tangents[i] if i in tangents else jnp.zeros_like(values[i])
        return prim.bind(*args, **params)

    def mapped(tangents: dict):
        keys = list(tangents)
        return jax.vmap(lambda *ts: with_tangents(dict(zip(keys, ts))))(*tangents.values())

    dense_in = {i: ins[i].g for i in jets if ins[i].g is not None}
    groups: dict = {}
    for i in jets:
        for axis, b in ins[i].blocks:
            groups.setdefault(axis, {})[i] = b
    out_blocks, extra = [], []
    for axis, members in groups.items():
        targets = {_axis_map(prim.name, params, shapes, i, axis) for i in members}
        if len(targets) == 1 and None not in targets:
            out_blocks.append((targets.pop(), mapped(members)))
        elif prim.name == "reduce_sum":  # a sum over the particle axis: the block turns dense directly
            (b,) = members.values()
            others = tuple(k for k in params["axes"] if k != axis)
            b = jnp.sum(b, axis=tuple(k + 1 for k in others))
            b = jnp.moveaxis(b, 1 + axis - sum(1 for k in others if k < axis), 0)
            extra.append(b.reshape(layout.n * layout.w, *jnp.shape(v)))
        elif prim.name == "dot_general" and len(members) == 1:  # the particle axis is contracted
            ((i, b),) = members.items()
            extra.append(_contracted_block(params, values, i, axis, b, layout))
        else:
            for i, b in members.items():
                dense = _densify_block(layout, axis, b)
                dense_in[i] = dense if i not in dense_in else dense_in[i] + dense
    g = mapped(dense_in) if dense_in else None
    l = with_tangents({i: ins[i].l for i in jets})
    if prim.multiple_results:
        n_out = len(v)
        gs = [None] * n_out if g is None else list(g)
        gs = [_sum([gk, *extra], None) if (gk is not None or extra) else None for gk in gs]
        return [_make_jet(v[k], gs[k], l[k], [(axis, b[k]) for axis, b in out_blocks], layout) for k in range(n_out)]
    if extra:
        g = _sum([g, *extra], None)
    return _make_jet(v, g, l, out_blocks, layout)


def _contracted_block(params, values, slot: int, axis: int, b, layout: _Layout):
    """Dense gradient of dot_general(a, y) (y fixed) where the block of operand ``slot`` sits on a
    contracted axis: with that contraction turned into a batch dimension the map keeps one term
    per particle, and particle e's term is the derivative along x_e (no scatter, n times fewer
    products than densifying first)."""
    (lc, rc), (lb, rb) = params["dimension_numbers"]
    mine, other = (lc, rc) if slot == 0 else (rc, lc)
    k = list(mine).index(axis)
    partner = other[k]
    mine_c = tuple(d for d in mine if d != axis)
    other_c = tuple(d for d in other if d != partner)
    if slot == 0:
        dims = ((mine_c, other_c), ((*lb, axis), (*rb, partner)))
    else:
        dims = ((other_c, mine_c), ((*lb, partner), (*rb, axis)))
    fixed = values[1 - slot]
    op = lambda t: lax.dot_general_p.bind(*((t, fixed) if slot == 0 else (fixed, t)), **{**params, "dimension_numbers": dims})
    out = jax.vmap(op)(b)  # (w, *batch, n, *free)
    out = jnp.moveaxis(out, 1 + len(lb), 0)  # (n, w, *out_shape)
    return out.reshape(layout.n * layout.w, *out.shape[2:])


def _dot_over_leading(params, x, y):
    """Σ_k dot_general(x[k], y[k]) as one dot_general contracting the leading axes too."""
    (lc, rc), (lb, rb) = params["dimension_numbers"]
    dims = (((0, *(k + 1 for k in lc)), (0, *(k + 1 for k in rc))),
            (tuple(k + 1 for k in lb), tuple(k + 1 for k in rb)))
    return lax.dot_general_p.bind(x, y, **{**params, "dimension_numbers": dims})


def _partner(params, slot: int, axis: int):
    """The other operand's axis paired with ``axis`` of operand ``slot`` by a dot_general
    contraction or batch dimension, or None for a free axis."""
    (lc, rc), (lb, rb) = params["dimension_numbers"]
    mine, other = ((lc, lb), (rc, rb)) if slot == 0 else ((rc, rb), (lc, lb))
    for dims, partner in zip(mine, other):
        if axis in dims:
            return partner[list(dims).index(axis)]
    return None


def _cross(prim, params, a: _Jet, b: _Jet, layout: _Layout, out_ndim: int):
    """Terms of ∇a·∇b pushed through the bilinear map: Σ over the D coordinates of op(∂a, ∂b).

    For blocks on particle axes p (of a) and q (of b) the sum over particles e of
    δ(e, i_p) δ(e, i_q) leaves δ(i_p, i_q): a mask on two axes of one operand (when q is paired
    with an axis of a by the contraction, or p with one of b) or of the output (both free), then
    one bilinear map with the w block components contracted."""
    if prim.name == "mul":
        over_leading = lambda x, y: jnp.sum(x * y, axis=0)
    else:
        over_leading = lambda x, y: _dot_over_leading(params, x, y)
    shapes = [jnp.shape(a.v), jnp.shape(b.v)]
    terms = []
    if a.g is not None and b.g is not None:
        terms.append(over_leading(a.g, b.g))
    for dense, blocks, slot in ((a.g, b.blocks, 1), (b.g, a.blocks, 0)):
        if dense is None:
            continue
        for q, bq in blocks:  # dense part of one operand meets a block of the other
            partner = q if prim.name == "mul" else _partner(params, slot, q)
            if partner is not None:
                taken = _take_particle(layout, dense, partner)
                terms.append(over_leading(taken, bq) if slot == 1 else over_leading(bq, taken))
            else:
                full = _densify_block(layout, q, bq)
                terms.append(over_leading(dense, full) if slot == 1 else over_leading(full, dense))
    for p, ap in a.blocks:
        for q, bq in b.blocks:
            if prim.name == "mul":
                term = over_leading(ap, bq)
                terms.append(term if p == q else term * _axis_array(layout.n, out_ndim, (p, q), term.dtype))
                continue
            q_in_a, p_in_b = _partner(params, 1, q), _partner(params, 0, p)
            if q_in_a is not None:
                x = ap if q_in_a == p else ap * _axis_array(layout.n, ap.ndim - 1, (p, q_in_a), ap.dtype)[None]
                terms.append(over_leading(x, bq))
            elif p_in_b is not None:
                terms.append(over_leading(ap, bq * _axis_array(layout.n, bq.ndim - 1, (p_in_b, q), bq.dtype)[None]))
            else:
                out_p = _axis_map("dot_general", params, shapes, 0, p)
                out_q = _axis_map("dot_general", params, shapes, 1, q)
                terms.append(over_leading(ap, bq) * _axis_array(layout.n, out_ndim, (out_p, out_q), ap.dtype))
    return terms


def _bilinear(prim, params, a: _Jet, b: _Jet, layout: _Layout):
    """Product rule for ``prim(a, b)`` bilinear (mul, dot_general)."""
    first = _linear(prim, params, [a, b.v], (0,), layout)
    second = _linear(prim, params, [a.v, b], (1,), layout)
    v = first.v
    cross = _cross(prim, params, a, b, layout, v.ndim)
    l = first.l + second.l + 2.0 * _sum(cross, v)
    return _add_jets(v, l, [first, second], layout)


def _unary(fn, a, layout: _Layout):
    """Chain rule for an elementwise function of one jet."""
    if not _is_jet(a):
        return fn(a)
    ones = jnp.ones_like(a.v)
    first = lambda t: jax.jvp(fn, (t,), (ones,))[1]
    (v, d1) = jax.jvp(fn, (a.v,), (ones,))
    d2 = jax.jvp(first, (a.v,), (ones,))[1]
    g = None if a.g is None else d1 * a.g
    l = d1 * a.l + d2 * _grad_square(a, layout)
    return _Jet(v, g, l, tuple((axis, d1 * b) for axis, b in a.blocks))


def _generic(eqn, ins, layout: _Layout):
    """Exact rule for any differentiable primitive via nested forward derivatives.

    With y the jet inputs (made dense first) and g the primitive: ∇(g∘y) = J_g ∇y and
    ∇²(g∘y) = J_g ∇²y + Σ_k (∂_k y)ᵀ H_g (∂_k y), the last term a second directional
    derivative along each column ∂_k y.
    """
    ins = [_dense_jet(a, layout) for a in ins]
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
