"""Stochastic reconfiguration (natural gradient) as an optax transformation.

Given the real quantum geometric tensor S = Re⟨ΔO* ΔO⟩ = XᵀX and the force F = ½ ∇E
(see :mod:`psiloom.optimize.gradient`), the update direction is

    δ = (S + Λ)⁻¹ F ,        Λ = ε I + ε_rel · diag(S) ,

with an absolute diagonal shift ε and an optional relative (scale-invariant) shift ε_rel, each a
float or an optax schedule of the step count. Chained with ``optax.sgd(η)`` this gives
θ ← θ − η δ, a discretised imaginary-time step of length η (Sorella 1998; Carleo & Troyer 2017).
The transformation needs the per-sample geometry and receives it as the extra keyword argument
``geometry`` (a :class:`SampleGeometry`), which the training step passes to every transformation
of an ``optax.chain``. Complex parameters are two real parameters each (real and imaginary part),
which is exact for non-holomorphic trial states as well.

Solvers (the ``solver`` option; all give the same δ up to rounding or the CG tolerance):

``"dense"``
    Forms the P×P matrix S = XᵀX and solves by Cholesky: O(nP² + P³). Best for few parameters.
``"sample_space"``
    Uses XᵀX + εI and XXᵀ + εI sharing their non-zero spectrum, i.e. the push-through identity
    (XᵀX + εI)⁻¹Xᵀ = Xᵀ(XXᵀ + εI)⁻¹ (Chen & Heyl, Nat. Phys. 2024; Rende et al. 2024). With the
    residual ε_res of :meth:`SampleGeometry.residual` (F = Xᵀ ε_res)

        δ = Xᵀ (X Xᵀ + ε I)⁻¹ ε_res ,

    an n×n solve (n samples, 2n for complex ψ): O(n²P + n³), far cheaper when P ≫ n. Should the
    incoming gradient differ from Xᵀε_res (an earlier transformation rescaled it), the remainder
    r = F − Xᵀε_res is added exactly through the Woodbury form
    (S + εI)⁻¹ r = (r − Xᵀ(XXᵀ + εI)⁻¹X r)/ε, so the output is always (S + Λ)⁻¹ F.
    With a relative shift the same is done for X̃ = X Λ^{-1/2}.
``"cg"``
    Matrix-free conjugate gradient (jax.scipy.sparse.linalg.cg) with S v = Xᵀ(X v) applied by a
    jvp and a vjp of the log-amplitude (:meth:`SampleGeometry.s_operator`): neither X nor S is
    formed, memory O(P + n). Options ``tol``, ``atol``, ``maxiter`` and ``warm_start`` (start
    from the previous step's δ). Only the absolute shift is available (diag S needs X).
``"auto"`` (the default)
    ``"sample_space"`` when the parameters outnumber the rows of X, else ``"dense"`` (decided
    from static shapes at trace time): the exact solve that is cheaper for the shapes, and one that
    fits the memory limit (``"cg"`` can be faster still on large states, but stops at its tolerance).

Sharded samples (``GroundStateSearch(mesh=...)``, :mod:`psiloom.parallel`): the rows of X live
on the device that holds their samples; parameters, F and δ are replicated. XLA's partitioner then
communicates as follows (read off the compiled programs on 4 simulated devices):

* ``"dense"``: each device forms its partial X_dᵀX_d, one all-reduce of the P×P matrix (plus the
  P-vector of the force); every device factorises S and solves, redundantly.
* ``"sample_space"``: XXᵀ couples all samples, so X (n×P) is all-gathered and the n×n Gram matrix
  is factorised on every device (the Cholesky factorisation is not partitioned); Xᵀ(…) ends in an
  all-reduce of a P-vector. Cheap to communicate only while n·P is small, as it is where this
  solver wins (P ≫ n is about compute, and X is needed whole).
* ``"cg"``: per iteration, the jvp is local, the centring all-reduces 1-2 block means and the vjp
  all-reduces one P-vector (Xᵀu summed over devices); the CG vector updates are replicated.

The trust radius and the relative shift add one all-reduce each (a scalar, a P-vector), the
carried-over direction one more P-vector (Xᵀ X δ_prev). The three solvers give the same δ on
any number of devices up to the order of additions (``tests/test_parallel.py``; the carried-over
direction is not among the cases tested there).

Trust radius (``max_metric_norm``, optional): a step whose length in the metric,
‖δ‖_S = (δᵀ S δ)^{1/2}, exceeds a bound r is shortened to it, δ ← δ · r/‖δ‖_S (a trust region in
the Fubini-Study metric; the direction is unchanged). To first order the step moves ψ by
η‖δ‖_S in state space (η the learning rate), so r bounds that distance whatever one sample
does. It matters when a chain first reaches a region the state weights enormously and its local
energies dwarf the others' (a measured case is in the documentation's benchmark notes).

Carried-over direction (``momentum``, optional): with μ ∈ [0, 1) each step solves the regularised
least-squares problem of Goldshlager, Abrahamsen & Lin (J. Chem. Phys. 161, 2024), whose
regulariser pulls toward the previous step's direction δ_prev instead of toward zero,

    δ = argmin_φ ‖X φ − ε_res‖² + ε ‖φ − μ δ_prev‖²  =  (S + ε I)⁻¹ (F + ε μ δ_prev)
      = μ δ_prev + (S + ε I)⁻¹ (F − μ S δ_prev) .

The batch's n rows of X fix δ in the directions they resolve (there μ δ_prev is refitted, not
added: this is not heavy-ball momentum), while in the directions they do not resolve the earlier
batches' solution carries over with weight μ, so over about 1/(1 − μ) steps the direction is
fitted to many batches' samples at one batch's cost (a randomised Kaczmarz iteration, as the
paper shows). The last computation is done as the solvers' own: the residual becomes
ε_res − μ X δ_prev (sample space) or the force F − μ S δ_prev (dense, CG; a CG warm start then
begins at (1 − μ) δ_prev, the previous step's value of the unknown δ − μ δ_prev). δ_prev is the
transformation's previous output (after the trust radius, before the learning rate), kept in the
state; μ = 0 is plain SR. Only the absolute shift is available with it.

Mixed-precision Gram matrix (``gram_dtype``, ``"sample_space"`` only; the other solvers ignore it):
the n×n product K = X Xᵀ costs n²P flops (half of them with the block-triangular product of
:func:`gram_matrix`), most of an SR step when P ≫ n (measured on a 1024-sample step of an
18 419-parameter LiH state, two cores: 0.36 s in float64, 0.17 s in float32, of a ~1.3 s step).
With ``gram_dtype="float32"`` K is formed in single precision (entries off by ~u₃₂‖x_i‖‖x_j‖,
u₃₂ = 6 × 10⁻⁸), factorised in X's precision, and every solve is refined ``refinement_steps``
times against the exact operator (two matrix-vector products with X in X's precision each):
y ← y + K̃⁻¹(b − (XXᵀ + εI) y). Each step multiplies the error by ‖K̃⁻¹(K − K̃)‖ ≲ u₃₂ tr K / ε,
so two steps reach X's precision when the shift ε is well above u₃₂ tr K (for the LiH step,
tr K ≈ 10² against ε = 10⁻³: a factor ~10⁻² per step). With ε → 0 and a nearly singular K the
refinement need not converge: keep the default precision there.

Memory guard (``memory_limit``): ``"dense"`` and ``"sample_space"`` form X (n×P, 2n×P for complex
ψ; ``chunk`` does not bound it: the chunks are concatenated), next to the per-sample
log-derivatives O it is built from, and the P×P or n×n matrix with its Cholesky factor. Before
anything is compiled (at trace time, from static shapes) the bytes of these arrays are estimated,

    dense:         b · (2·rows·P + 2·P²) ,      sample_space:  b · (2·rows·P + 2·rows²) ,

(b bytes per number, rows = n or 2n), and a solver above the limit raises ``ValueError`` saying
how much it would need and which solver fits (``"cg"`` needs O(n + P)). The default limit is half
of the physical memory (or of the cgroup limit, where lower; on an accelerator at most what XLA
may allocate there); ``memory_limit=float("inf")``
turns the guard off. Measured: dense SR with 2^20 samples of an L=100 RBM asked XLA for 160 GiB.
With ``"auto"`` the preferred solver above is taken if it fits, else the other one, else ``"cg"``
(absolute shift only).
"""

from __future__ import annotations

import numbers
import os
from typing import Any, Callable, NamedTuple

import jax
import jax.numpy as jnp
import optax

from psiloom.optimize.flatten import ravel_real
from psiloom.reduce import sample_sum
from psiloom._validation import ArgumentTypeError, finite_real, nonnegative_int, positive_int, positive_real

SOLVERS = ("dense", "sample_space", "cg", "auto")


class SRState(NamedTuple):
    """Optax state of :func:`stochastic_reconfiguration`: the update count and the previous δ
    (for the CG warm start or the carried-over direction)."""
    count: jax.Array  # type: ignore[assignment]  # number of updates made (Optax's name; shadows tuple.count)
    previous: Any = None  # last δ (real vector) for the CG warm start or ``momentum``, else None


def _as_schedule(value, name) -> Callable:
    if callable(value):
        return value
    try:
        v = finite_real(name, value, minimum=0.0)
    except ArgumentTypeError:
        raise ArgumentTypeError(
            f"{name} must be a finite real number >= 0 or a schedule (callable), got {value!r} "
            f"({type(value).__name__})"
        ) from None
    return lambda count: v


def physical_memory_bytes() -> int | None:
    """Bytes of physical memory available to this process (the cgroup limit where lower), or None."""
    total = None
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (AttributeError, ValueError, OSError):
        pass
    for path in ("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory/memory.limit_in_bytes"):
        try:
            with open(path) as f:
                text = f.read().strip()
            limit = int(text)
        except (OSError, ValueError):
            continue
        if limit > 0 and (total is None or limit < total):
            total = limit
    return total if total and total > 0 else None


def default_memory_limit() -> float:
    """Half of :func:`physical_memory_bytes`, and at most the memory XLA may allocate on an
    accelerator (``memory_stats()["bytes_limit"]`` of the first device, where it reports one);
    ``inf`` where neither is known."""
    total = physical_memory_bytes()
    limit = float("inf") if total is None else 0.5 * total
    try:
        device = jax.devices()[0]
        if device.platform != "cpu":
            stats = device.memory_stats() or {}
            if stats.get("bytes_limit"):
                limit = min(limit, float(stats["bytes_limit"]))
    except Exception:  # noqa: BLE001 - a backend without memory statistics keeps the host bound
        pass
    return limit


def solver_memory_bytes(solver: str, rows: int, n_params: int, itemsize: int = 8) -> int:
    """Estimated bytes of the largest arrays a solver forms (module docstring, "Memory guard").

    ``rows``: rows of X (samples, twice that for complex ψ); ``n_params``: real parameters P.
    The matrix-free ``"cg"`` solver keeps a few vectors: O(P) plus one chunk of samples.
    """
    rows, p = int(rows), int(n_params)
    if solver == "dense":
        return itemsize * (2 * rows * p + 2 * p * p)
    if solver == "sample_space":
        return itemsize * (2 * rows * p + 2 * rows * rows)
    if solver == "cg":
        return itemsize * (8 * p + 4 * rows)
    raise ValueError(f"unknown SR solver {solver!r}; available: {', '.join(map(repr, SOLVERS))}")


def _gib(n: float) -> str:
    return f"{n / 2**30:.3g} GiB"


def _choose_solver(solver: str, rows: int, n_params: int, itemsize: int, limit: float, can_cg: bool) -> str:
    """The solver to trace: ``solver`` itself if it fits ``limit``; for ``"auto"`` the first that fits."""
    need = {k: solver_memory_bytes(k, rows, n_params, itemsize) for k in ("dense", "sample_space", "cg")}
    if solver == "auto":
        first = "sample_space" if n_params > rows else "dense"
        order = [first, "dense" if first == "sample_space" else "sample_space"] + (["cg"] if can_cg else [])
        for kind in order:
            if need[kind] <= limit:
                return kind
        kind = order[0]
    else:
        kind = solver
    if need[kind] <= limit:
        return kind
    fits = [k for k in ("sample_space", "dense") if need[k] <= limit]
    if can_cg:
        fits.append("cg")
    advice = (f"use solver={fits[0]!r} (about {_gib(need[fits[0]])})" if fits else
              "use solver='cg' without relative_shift (memory O(n + P))")
    raise ValueError(
        f"stochastic reconfiguration with solver={solver!r} would need about {_gib(need[kind])} "
        f"for {kind!r} with n={rows} rows of the log-derivative matrix and P={n_params} parameters "
        f"(X is n×P; {'S is P×P' if kind == 'dense' else 'XXᵀ is n×n'}), above memory_limit = {_gib(limit)} "
        f"(default: half the physical memory); {advice}, fewer samples per step, or a larger memory_limit")


def _solve_dense(x, force, lam):
    """(XᵀX + diag lam)⁻¹ F by Cholesky; lam scalar or (P,)."""
    s = x.T @ x
    s = s + jnp.diag(jnp.broadcast_to(lam, force.shape).astype(s.dtype))
    chol = jax.scipy.linalg.cho_factor(s, lower=True)
    return jax.scipy.linalg.cho_solve(chol, force)


#: Row blocks of the symmetric Gram product X Xᵀ (see :func:`gram_matrix`) from this many rows on.
GRAM_BLOCK_ROWS = 256
GRAM_BLOCKS = 4


def gram_matrix(x, dtype=None, blocks: int | None = None):
    """K = X Xᵀ (n×n) from the blocks on and above the diagonal, mirrored below it.

    The rows are split into ``blocks`` groups (default ``GRAM_BLOCKS`` from
    ``GRAM_BLOCK_ROWS`` rows on, else one); only the b(b+1)/2 products X_i X_jᵀ with i ≤ j are
    formed, so the flops are (b+1)/(2b) of the full product (5/8 for b = 4: 0.36 s against 0.46 s
    for 1024 × 18 419 in float64 on two cores), and K is exactly symmetric. ``dtype``: the
    precision the product is formed in (default: X's); the result is returned in X's dtype.
    """
    n = x.shape[0]
    if blocks is None:
        blocks = GRAM_BLOCKS if n >= GRAM_BLOCK_ROWS else 1
    out_dtype = x.dtype
    y = x if dtype is None else x.astype(dtype)
    symmetric = lambda a: 0.5 * (a + a.T)  # a diagonal block's product is symmetric only up to rounding
    if blocks <= 1:
        return symmetric(y @ y.T).astype(out_dtype)
    edges = [round(i * n / blocks) for i in range(blocks + 1)]
    parts = [y[edges[i]:edges[i + 1]] for i in range(blocks)]
    upper = {(i, j): parts[i] @ parts[j].T if j > i else symmetric(parts[i] @ parts[i].T)
             for i in range(blocks) for j in range(i, blocks)}
    rows = [jnp.concatenate([upper[i, j] if j >= i else upper[j, i].T for j in range(blocks)], axis=1)
            for i in range(blocks)]
    return jnp.concatenate(rows, axis=0).astype(out_dtype)


def _gram_solver(x, diagonal, gram_dtype, refinement_steps):
    """b ↦ (X Xᵀ + diagonal·I)⁻¹ b by Cholesky, the Gram matrix formed in ``gram_dtype``.

    With a lower precision than X's the factor is of K̃ = fl(X Xᵀ) + diagonal·I; each refinement
    step adds K̃⁻¹(b − (X(Xᵀy) + diagonal·y)), the residual taken in X's precision by two
    matrix-vector products (classical iterative refinement, Wilkinson 1963; Higham, Accuracy and
    Stability of Numerical Algorithms, ch. 12). The error shrinks by ‖K̃⁻¹(K − K̃)‖ per step,
    about u₃₂‖K‖/λ_min(K̃) with u₃₂ = 6 × 10⁻⁸ (module docstring, "Mixed-precision Gram matrix").
    """
    k = gram_matrix(x, gram_dtype)
    k = k + diagonal * jnp.eye(k.shape[0], dtype=k.dtype)
    chol = jax.scipy.linalg.cho_factor(k, lower=True)
    base = lambda b: jax.scipy.linalg.cho_solve(chol, b)
    if gram_dtype is None or jnp.dtype(gram_dtype).itemsize >= x.dtype.itemsize or refinement_steps == 0:
        return base

    def solve(b):
        y = base(b)
        for _ in range(refinement_steps):
            y = y + base(b - (x @ (x.T @ y) + diagonal * y))
        return y
    return solve


def _solve_sample_space_scalar(x, residual, force, eps, gram_dtype=None, refinement_steps=0):
    """(XᵀX + εI)⁻¹ F via the n×n system, F = Xᵀ residual + r (r normally rounding-small)."""
    solve = _gram_solver(x, eps, gram_dtype, refinement_steps)
    r = force - x.T @ residual
    # both right-hand sides in one solve (one pass over X per refinement product)
    y = solve(jnp.stack([residual, x @ r], axis=1))
    both = x.T @ y
    safe = jnp.where(eps > 0, eps, 1.0)
    correction = jnp.where(eps > 0, (r - both[:, 1]) / safe, 0.0)
    return both[:, 0] + correction


def _solve_sample_space_diag(x, residual, force, lam, gram_dtype=None, refinement_steps=0):
    """(XᵀX + Λ)⁻¹ F with a positive diagonal Λ (P,), via X̃ = X Λ^{-1/2} and an n×n system."""
    lam = jnp.where(lam > 0, lam, 1.0)  # a zero column of X has F_k = 0: any Λ_k gives δ_k = 0
    d = 1.0 / jnp.sqrt(lam)
    xt = x * d
    solve = _gram_solver(xt, jnp.ones((), x.dtype), gram_dtype, refinement_steps)
    # main part: Λ^{-1/2} X̃ᵀ (X̃X̃ᵀ + I)⁻¹ ε_res ; remainder r̃ = Λ^{-1/2}(F − Xᵀ ε_res) by Woodbury
    r = d * (force - x.T @ residual)
    both = xt.T @ solve(jnp.stack([residual, xt @ r], axis=1))
    inner = both[:, 0] + r - both[:, 1]
    return d * inner


def stochastic_reconfiguration(
    shift=1e-3,
    solver: str = "auto",
    *,
    relative_shift=None,
    tol: float = 1e-10,
    atol: float = 0.0,
    maxiter: int | None = None,
    warm_start: bool = False,
    max_metric_norm: float | None = None,
    momentum: float = 0.0,
    memory_limit: float | None = None,
    gram_dtype=None,
    refinement_steps: int = 2,
) -> optax.GradientTransformationExtraArgs:
    """Precondition the energy gradient with (S + ε I + ε_rel diag S)⁻¹ (see module docstring).

    Args:
        shift: absolute diagonal shift ε ≥ 0, a float or a schedule ``count -> ε``.
        solver: ``"auto"`` (default), ``"dense"``, ``"sample_space"`` or ``"cg"``.
        relative_shift: optional ε_rel ≥ 0 (float or schedule) multiplying diag S
            (``"dense"`` and ``"sample_space"`` only).
        tol, atol: CG stopping rule ‖S̃δ − F‖ ≤ max(tol·‖F‖, atol) (``"cg"`` only).
        maxiter: CG iteration cap (default: 10·P as in jax.scipy).
        warm_start: start CG from the previous δ (stored in the state).
        max_metric_norm: optional trust radius r > 0: shorten δ to ‖δ‖_S = (δᵀSδ)^{1/2} ≤ r
            (module docstring); ``None`` leaves δ as solved.
        momentum: weight μ ∈ [0, 1) of the previous direction in the regulariser ε‖δ − μδ_prev‖²
            (module docstring, "Carried-over direction"); 0 (default) is plain SR.
        memory_limit: bytes the solver's matrices may take (module docstring, "Memory guard");
            ``None``: half of the physical memory; ``float("inf")``: no check. A solver above
            it raises ``ValueError`` at trace time (``"auto"`` picks one that fits).
        gram_dtype: precision of the ``"sample_space"`` Gram product X Xᵀ, e.g. ``"float32"``
            (module docstring, "Mixed-precision Gram matrix"); ``None`` (default): X's own.
        refinement_steps: iterative-refinement steps of each n×n solve when ``gram_dtype`` is
            lower than X's precision (default 2; each costs two matrix-vector products with X).

    The output replaces the gradient by δ (a pytree like ``params``; complex leaves in psiloom's
    convention Re + i Im); chain with ``optax.sgd(learning_rate)``.
    """
    if solver not in SOLVERS:
        raise ValueError(f"unknown SR solver {solver!r}; available: {', '.join(map(repr, SOLVERS))}")
    shift_fn = _as_schedule(shift, "shift")
    rel_fn = None if relative_shift is None else _as_schedule(relative_shift, "relative_shift")
    if rel_fn is not None and solver == "cg":
        raise ValueError("relative_shift needs diag(S), which the matrix-free 'cg' solver does not form; "
                         "use solver='dense' or 'sample_space'")
    tol = finite_real("tol", tol, minimum=0.0)
    atol = finite_real("atol", atol, minimum=0.0)
    if maxiter is not None:
        maxiter = positive_int("maxiter", maxiter)
    momentum = finite_real("momentum", momentum, minimum=0.0)
    if not momentum < 1.0:
        raise ValueError(f"momentum must lie in [0, 1), got {momentum!r}")
    if momentum > 0 and rel_fn is not None:
        raise ValueError("momentum needs a scalar shift ε (the regulariser ε‖δ − μδ_prev‖²); "
                         "leave relative_shift=None")
    use_previous = (warm_start and solver == "cg") or momentum > 0
    if max_metric_norm is not None:
        max_metric_norm = positive_real("max_metric_norm", max_metric_norm)
    if gram_dtype is not None:
        try:
            gram_dtype = jnp.dtype(gram_dtype)
        except TypeError:
            raise ValueError(f"gram_dtype must be None or a floating dtype such as 'float32', "
                             f"got {gram_dtype!r}") from None
        if not jnp.issubdtype(gram_dtype, jnp.floating):
            raise ValueError(f"gram_dtype must be a real floating dtype such as 'float32', got {gram_dtype!r}")
    refinement_steps = nonnegative_int("refinement_steps", refinement_steps)

    if memory_limit is None:
        limit = default_memory_limit()
    elif (isinstance(memory_limit, bool) or not isinstance(memory_limit, numbers.Real)
          or not memory_limit > 0):  # NaN fails the comparison
        raise ValueError(f"memory_limit must be a positive number of bytes (or None), got {memory_limit!r}")
    else:
        limit = float(memory_limit)

    def init(params):
        previous = jnp.zeros_like(ravel_real(params)[0]) if use_previous else None
        return SRState(count=jnp.zeros((), jnp.int32), previous=previous)

    def update(updates, state, params=None, *, geometry=None, **extra):
        del params, extra
        if geometry is None:
            raise ValueError(
                "stochastic_reconfiguration needs the keyword argument geometry=SampleGeometry(...); "
                "the psiloom training step passes it automatically"
            )
        g, unravel = ravel_real(updates)
        force = 0.5 * g
        eps = jnp.asarray(shift_fn(state.count), force.dtype)
        rows = geometry.n_samples * (2 if geometry.complex_output else 1)
        kind = _choose_solver(solver, rows, force.shape[0], force.dtype.itemsize, limit, rel_fn is None)

        previous = state.previous
        s_op = x = None
        if kind == "cg":
            s_op = geometry.s_operator()
            matvec = lambda v: s_op(v) + eps * v
            if momentum > 0:  # solve for δ − μδ_prev: force F − μ S δ_prev
                force = force - momentum * s_op(previous)
            # the unknown is δ − μδ_prev, so the previous step's value of it, (1 − μ)δ_prev, starts CG
            x0 = (1.0 - momentum) * previous if warm_start else None
            delta, _ = jax.scipy.sparse.linalg.cg(matvec, force, x0=x0, tol=tol, atol=atol, maxiter=maxiter)
        else:
            x = geometry.jacobian()
            residual = geometry.residual() if kind == "sample_space" else None
            if momentum > 0:  # solve for δ − μδ_prev: residual ε_res − μXδ_prev, force Xᵀ(that) + r
                seen = momentum * (x @ previous)
                force = force - x.T @ seen
                if residual is not None:
                    residual = residual - seen
            if rel_fn is not None:
                lam = eps + jnp.asarray(rel_fn(state.count), force.dtype) * sample_sum(x * x)
            else:
                lam = eps
            if kind == "dense":
                delta = _solve_dense(x, force, lam)
            elif rel_fn is None:
                delta = _solve_sample_space_scalar(x, residual, force, eps, gram_dtype, refinement_steps)
            else:
                delta = _solve_sample_space_diag(x, residual, force, lam, gram_dtype, refinement_steps)
        if momentum > 0:
            delta = delta + momentum * previous
        if max_metric_norm is not None:
            # ‖δ‖_S² = δᵀ Xᵀ X δ, from X when it is formed, else one application of S
            norm2 = jnp.vdot(delta, s_op(delta)) if s_op is not None else sample_sum((x @ delta) ** 2)
            norm = jnp.sqrt(jnp.maximum(jnp.real(norm2), 0.0))
            delta = delta * jnp.minimum(1.0, max_metric_norm / jnp.maximum(norm, jnp.finfo(norm.dtype).tiny))
        if use_previous:
            previous = delta
        return unravel(delta.astype(g.dtype)), SRState(count=state.count + 1, previous=previous)

    return optax.GradientTransformationExtraArgs(init, update)
