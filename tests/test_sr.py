"""Stochastic reconfiguration solvers: dense, sample-space, matrix-free CG.

Every check compares against an independent reference: the linear system
(XᵀX + ε I + ε_rel diag XᵀX) δ = F solved with ``numpy.linalg.solve``, where X is built in
numpy — from the closed-form RBM log-derivatives (Carleo & Troyer, Science 355, 602 (2017):
∂_a log ψ = x, ∂_b log ψ = tanh θ, ∂_W log ψ = x tanh θ) or by central finite differences for a
non-holomorphic network. The sample-space identity Xᵀ(XXᵀ + εI)⁻¹ = (XᵀX + εI)⁻¹Xᵀ is exact
linear algebra (Chen & Heyl, Nat. Phys. 2024; Rende et al. 2024), so that form must agree with
the dense one to rounding (~1e-10 in float64).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from hypothesis import given, strategies as st

import psiloom as pl
from psiloom.optimize import SampleGeometry, energy_gradient, ravel_real, stochastic_reconfiguration

SOLVERS = ("dense", "sample_space", "cg", "auto")


# ----------------------------------------------------------------------------- helpers
class MatrixGeometry:
    """A stand-in for SampleGeometry holding an explicit real X and residual (what SR reads)."""

    def __init__(self, x, residual, complex_output=False):
        self.x = jnp.asarray(x)
        self.eps = jnp.asarray(residual)
        self.complex_output = complex_output
        self.n_samples = self.x.shape[0] // (2 if complex_output else 1)

    def jacobian(self):
        return self.x

    def residual(self):
        return self.eps

    def s_matvec(self, v):
        return self.x.T @ (self.x @ v)

    def s_operator(self):
        return self.s_matvec


def numpy_sr(x, force, shift, rel=0.0):
    x = np.asarray(x, np.float64)
    s = x.T @ x
    a = s + shift * np.eye(s.shape[0]) + rel * np.diag(np.diag(s))
    return np.linalg.solve(a, np.asarray(force, np.float64))


def apply_sr(solver, x, residual, force=None, shift=1e-2, rel=None, **kw):
    """δ from the optax transformation for the gradient 2F (F = Xᵀε unless given)."""
    geom = MatrixGeometry(x, residual)
    if force is None:
        force = np.asarray(x).T @ np.asarray(residual)
    params = {"w": jnp.zeros(np.asarray(x).shape[1])}
    tx = stochastic_reconfiguration(shift, solver, relative_shift=rel, **kw)
    out, state = tx.update({"w": 2.0 * jnp.asarray(force)}, tx.init(params), params, geometry=geom)
    return np.asarray(out["w"]), state


def rbm_log_derivatives(params, x):
    """Closed-form O = ∂ log ψ/∂(real parameters) of the RBM, in numpy, per parameter name.

    log ψ = a·x + Σ_j log 2cosh θ_j, θ = xW + b (Carleo & Troyer 2017). For complex parameters
    ψ is holomorphic in them, so ∂/∂Re p = O_p and ∂/∂Im p = i O_p.
    """
    p = {k: np.asarray(v) for k, v in params["params"].items()}
    x = np.asarray(x, np.float64)
    t = np.tanh(x @ p["kernel"] + p["hidden_bias"])  # (n, M)
    o = {
        "hidden_bias": t,
        "kernel": (x[:, :, None] * t[:, None, :]).reshape(len(x), -1),
        "visible_bias": x.astype(t.dtype),
    }
    cols, layout = [], []
    for name in sorted(o):
        cols.append(o[name])
        layout.append((name, o[name].shape[1], np.iscomplexobj(p[name])))
        if np.iscomplexobj(p[name]):
            cols.append(1j * o[name])
    return np.concatenate(cols, axis=1), layout


def centred_x(o, complex_output):
    n = o.shape[0]
    d = (o - o.mean(axis=0)) / np.sqrt(n)
    return np.concatenate([d.real, d.imag]) if complex_output else d.real


def unpack(delta, layout, shapes):
    """numpy real vector (ordered as in rbm_log_derivatives) → dict of leaves, Re + i Im."""
    out, i = {}, 0
    for name, size, is_complex in layout:
        re = delta[i:i + size]
        i += size
        if is_complex:
            out[name] = (re + 1j * delta[i:i + size]).reshape(shapes[name])
            i += size
        else:
            out[name] = re.reshape(shapes[name])
    return out


# ----------------------------------------------------------------------------- solvers vs numpy
@jax.jit
def all_solver_outputs(x, res, force, shift, rel):
    """δ of every solver (and with / without relative shift) for one explicit X, compiled once
    per shape. Shifts enter as schedules (callables) so that they may be traced values."""
    geom = MatrixGeometry(x, res)
    params = {"w": jnp.zeros(x.shape[1])}
    grad = {"w": 2.0 * force}
    out = {}
    for solver in SOLVERS:
        for use_rel in (False, True):
            if solver == "cg" and use_rel:
                continue
            tx = stochastic_reconfiguration(lambda c: shift, solver, relative_shift=(lambda c: rel) if use_rel else None,
                                            tol=1e-13)
            out[solver, use_rel] = tx.update(grad, tx.init(params), params, geometry=geom)[0]["w"]
    return out


SHAPES = [(3, 5), (8, 17), (12, 4), (6, 30)]  # (samples, parameters): both P > n and P < n


@given(
    shape=st.sampled_from(SHAPES),
    shift=st.floats(1e-3, 1.0),
    rel=st.floats(1e-3, 1.0),
    factor=st.floats(-2.0, 2.0),
    seed=st.integers(0, 2**16),
)
def test_all_solvers_match_numpy_solve(shape, shift, rel, factor, seed):
    # reference: numpy.linalg.solve of (XᵀX + εI + ε_rel diag XᵀX) δ = F (exact linear algebra).
    # F = Xᵀε_res is what the training step passes; a rescaled or perturbed F (an earlier
    # transformation such as clip_by_global_norm changed it) must give (S + Λ)⁻¹ F all the same.
    n, p = shape
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, p))
    res = rng.normal(size=n)
    cond = (np.linalg.norm(x, 2) ** 2 + shift) / shift  # condition number bound of S + εI
    for exact_force, force in ((True, x.T @ res), (False, factor * (x.T @ res) + 0.1 * rng.normal(size=p))):
        outs = all_solver_outputs(x, res, force, shift, rel)
        for (solver, use_rel), delta in outs.items():
            ref = numpy_sr(x, force, shift, rel if use_rel else 0.0)
            if solver == "cg":  # stops at ‖r‖ ≤ 1e-13‖F‖: error ≤ cond·1e-13
                tol = 1e-13 * cond + 1e-11
            elif solver in ("sample_space", "auto") and not exact_force and not use_rel:
                # the remainder F − Xᵀε goes through the Woodbury form (r − XᵀK⁻¹Xr)/ε, whose
                # rounding grows like u·cond² (standard perturbation bound for a difference of
                # nearly equal terms divided by ε), u = 2.2e-16
                tol = 2.2e-16 * cond ** 2 + 1e-10
            else:
                tol = 1e-10
            err = np.linalg.norm(np.asarray(delta) - ref) / np.linalg.norm(ref)
            assert err <= tol, (solver, use_rel, err)


def test_sample_space_equals_dense_when_parameters_exceed_samples():
    # P = 400 ≫ n = 24: identical in exact arithmetic (push-through identity), ~1e-10 in float64
    # (rounding of the dense P×P solve grows like u·‖S‖/ε, hence a moderate shift here)
    rng = np.random.default_rng(3)
    x = rng.normal(size=(24, 400)) / 5
    res = rng.normal(size=24)
    dense, _ = apply_sr("dense", x, res, shift=1e-3)
    sample, _ = apply_sr("sample_space", x, res, shift=1e-3)
    ref = numpy_sr(x, x.T @ res, 1e-3)
    np.testing.assert_allclose(sample, dense, rtol=0, atol=1e-10 * np.abs(dense).max())
    np.testing.assert_allclose(sample, ref, rtol=0, atol=1e-10 * np.abs(ref).max())


def test_cg_respects_maxiter_and_warm_start():
    rng = np.random.default_rng(5)
    x = rng.normal(size=(30, 20))
    res = rng.normal(size=30)
    ref = numpy_sr(x, x.T @ res, 1e-3)
    one, _ = apply_sr("cg", x, res, shift=1e-3, maxiter=1)
    # one CG iteration from 0 is the steepest-descent step along F: δ₁ = (FᵀF / FᵀAF) F (textbook CG)
    f = x.T @ res
    a = x.T @ x + 1e-3 * np.eye(20)
    np.testing.assert_allclose(one, (f @ f) / (f @ a @ f) * f, rtol=1e-10)
    assert np.linalg.norm(one - ref) > 1e-3 * np.linalg.norm(ref)
    # warm start: the state carries the previous δ; a second call starting there is converged
    geom = MatrixGeometry(x, res)
    params = {"w": jnp.zeros(20)}
    tx = stochastic_reconfiguration(1e-3, "cg", warm_start=True, tol=1e-12)
    state = tx.init(params)
    out, state = tx.update({"w": 2 * jnp.asarray(f)}, state, params, geometry=geom)
    np.testing.assert_allclose(np.asarray(state.previous), ref, rtol=1e-7)
    tx1 = stochastic_reconfiguration(1e-3, "cg", warm_start=True, maxiter=1)
    out1, _ = tx1.update({"w": 2 * jnp.asarray(f)}, state._replace(count=jnp.ones((), jnp.int32)), params,
                         geometry=geom)
    np.testing.assert_allclose(np.asarray(out1["w"]), ref, rtol=1e-6)


@pytest.mark.parametrize("momentum", [0.0, 0.6])
def test_cg_warm_start_with_momentum_starts_at_the_fixed_point(momentum):
    # Repeating one batch, δ = argmin ‖Xφ − ε_res‖² + ε‖φ − μδ‖² has the fixed point
    # (XᵀX + (1 − μ)ε I) δ* = Xᵀε_res (algebra from the update rule). Started from δ_prev = δ*, CG's
    # unknown δ − μδ_prev equals (1 − μ)δ*, so a warm start there returns δ* after one iteration;
    # the reference is numpy.linalg.solve.
    rng = np.random.default_rng(11)
    x = rng.normal(size=(30, 20))
    res = rng.normal(size=30)
    f = x.T @ res
    fixed = np.linalg.solve(x.T @ x + (1 - momentum) * 1e-3 * np.eye(20), f)
    params = {"w": jnp.zeros(20)}
    tx = stochastic_reconfiguration(1e-3, "cg", warm_start=True, momentum=momentum, maxiter=1)
    state = tx.init(params)._replace(previous=jnp.asarray(fixed), count=jnp.ones((), jnp.int32))
    out, state = tx.update({"w": 2 * jnp.asarray(f)}, state, params, geometry=MatrixGeometry(x, res))
    np.testing.assert_allclose(np.asarray(out["w"]), fixed, rtol=1e-8)
    cold = stochastic_reconfiguration(1e-3, "cg", momentum=momentum, maxiter=1)
    out, _ = cold.update({"w": 2 * jnp.asarray(f)}, cold.init(params)._replace(previous=jnp.asarray(fixed)),
                         params, geometry=MatrixGeometry(x, res))
    assert np.linalg.norm(np.asarray(out["w"]) - fixed) > 1e-3 * np.linalg.norm(fixed)


def test_shift_schedule_is_followed():
    # ε(t) from an optax schedule, checked against numpy.linalg.solve at each count
    rng = np.random.default_rng(7)
    x = rng.normal(size=(8, 12))
    res = rng.normal(size=8)
    f = x.T @ res
    sched = optax.linear_schedule(1.0, 1e-2, transition_steps=2)
    geom = MatrixGeometry(x, res)
    params = {"w": jnp.zeros(12)}
    for solver in ("dense", "sample_space", "cg"):
        tx = stochastic_reconfiguration(sched, solver, tol=1e-13)
        state = tx.init(params)
        for t, eps in enumerate((1.0, 0.505, 1e-2, 1e-2)):
            out, state = tx.update({"w": 2 * jnp.asarray(f)}, state, params, geometry=geom)
            ref = numpy_sr(x, f, eps)
            np.testing.assert_allclose(np.asarray(out["w"]), ref, rtol=1e-7, err_msg=f"{solver} t={t}")
        assert int(state.count) == 4


# ----------------------------------------------------------------------------- real trial states
@pytest.fixture(scope="module")
def rbm_batches():
    space = pl.spaces.SpinSpace(6)
    x = space.random(jax.random.PRNGKey(0), 16)
    e_loc = jax.random.normal(jax.random.PRNGKey(2), (16,)) * 2.0 - 3.0
    return x, e_loc


def geometry_sr_outputs(model, chunk, configs):
    """Compiled: SR δ of every (solver, shift, relative shift) in ``configs`` for a trial state."""

    @jax.jit
    def run(params, x, e_loc):
        _, grad = energy_gradient(model.apply, params, x, e_loc)
        geom = SampleGeometry(model.apply, params, x, e_loc, chunk=chunk)
        out = {}
        for solver, shift, rel in configs:
            tx = stochastic_reconfiguration(shift, solver, relative_shift=rel, tol=1e-13)
            out[solver, shift, rel] = tx.update(grad, tx.init(params), params, geometry=geom)[0]
        return grad, out

    return run


RBM_CONFIGS = [(solver, 1e-3, None) for solver in SOLVERS] + [
    (solver, 1e-2, 0.05) for solver in ("dense", "sample_space", "auto")]


@pytest.mark.parametrize("complex_params,chunk", [(False, None), (True, None), (True, 5)])
def test_rbm_sr_update_equals_closed_form_dense_solution(rbm_batches, complex_params, chunk):
    # X from the closed-form RBM log-derivatives (Carleo & Troyer 2017), complex parameters split
    # into (Re, Im) with ∂/∂Im = i ∂/∂Re (holomorphic ψ); F = Re⟨ΔO* ΔE⟩; numpy.linalg.solve.
    x, e_loc = rbm_batches
    if complex_params:
        e_loc = e_loc + 0.5j * jnp.cos(jnp.arange(16.0))
    model = pl.states.RBM(alpha=1, complex_params=complex_params, init_scale=0.4)
    params = model.init(jax.random.PRNGKey(1), x)
    o, layout = rbm_log_derivatives(params, x)
    xm = centred_x(o, complex_params)
    de = (np.asarray(e_loc) - np.asarray(e_loc).mean()) / np.sqrt(len(e_loc))
    force = np.real(np.conj((o - o.mean(0)) / np.sqrt(len(o))).T @ de)
    shapes = {k: v.shape for k, v in params["params"].items()}
    _, outs = geometry_sr_outputs(model, chunk, RBM_CONFIGS)(params, x, e_loc)
    for (solver, shift, rel), out in outs.items():
        ref = unpack(numpy_sr(xm, force, shift, rel or 0.0), layout, shapes)
        for name, want in ref.items():
            got = np.asarray(out["params"][name])
            assert np.iscomplexobj(got) == complex_params
            np.testing.assert_allclose(got, want, rtol=1e-7, atol=1e-9 * np.abs(want).max(),
                                       err_msg=f"{solver} {name} shift={shift} rel={rel}")


def finite_difference_x(model, params, x, h=1e-5):
    """X = [Re ΔO; Im ΔO]/√n by central differences of log ψ in each real parameter (numpy)."""
    leaves, treedef = jax.tree_util.tree_flatten(params)
    apply = jax.jit(model.apply)
    cols = []
    for li, leaf in enumerate(leaves):
        base = np.asarray(leaf)
        for idx in np.ndindex(base.shape):
            vals = []
            for sign in (1, -1):
                pert = base.copy()
                pert[idx] += sign * h
                new = list(leaves)
                new[li] = jnp.asarray(pert)
                vals.append(np.asarray(apply(jax.tree_util.tree_unflatten(treedef, new), x)))
            cols.append((vals[0] - vals[1]) / (2 * h))
    return np.stack(cols, axis=1)


def test_non_holomorphic_state_real_split():
    # FeedForward with a phase head: log ψ is a non-holomorphic (real-parameter, complex-valued)
    # function. Reference X by central finite differences (numpy), solved with numpy.
    model = pl.states.FeedForward(hidden=(1.0,), complex_output=True)
    space = pl.spaces.SpinSpace(4)
    x = space.random(jax.random.PRNGKey(3), 12)
    params = model.init(jax.random.PRNGKey(4), x)
    params = jax.tree_util.tree_map(lambda p: p * 3.0, params)  # leave the near-linear regime
    e_loc = jax.random.normal(jax.random.PRNGKey(5), (12,)) + 0.3j * jax.random.normal(jax.random.PRNGKey(6), (12,))
    o = finite_difference_x(model, params, x)
    xm = centred_x(o, True)
    de = (np.asarray(e_loc) - np.asarray(e_loc).mean()) / np.sqrt(12)
    force = np.real(np.conj((o - o.mean(0)) / np.sqrt(12)).T @ de)
    ref = numpy_sr(xm, force, 1e-2)
    grad, outs = geometry_sr_outputs(model, None, [(solver, 1e-2, None) for solver in SOLVERS])(params, x, e_loc)
    # the force itself: psiloom's gradient / 2 equals the finite-difference covariance
    # (real parameters: ravel order = leaf order, each leaf row-major, as in finite_difference_x)
    np.testing.assert_allclose(np.asarray(ravel_real(grad)[0]) / 2, force, rtol=1e-6, atol=1e-9)
    for (solver, _, _), out in outs.items():
        np.testing.assert_allclose(np.asarray(ravel_real(out)[0]), ref, rtol=1e-5,
                                   atol=1e-7 * np.abs(ref).max(), err_msg=solver)


def test_matrix_free_products_match_jacobian(rbm_batches):
    # X v and Xᵀu without forming X agree with the explicit X (closed form, numpy), chunked or not
    x, e_loc = rbm_batches
    model = pl.states.RBM(alpha=1, complex_params=True, init_scale=0.4)
    params = model.init(jax.random.PRNGKey(1), x)
    o, layout = rbm_log_derivatives(params, x)
    rng = np.random.default_rng(0)
    n_rows, n_par = 2 * x.shape[0], o.shape[1]
    v = rng.normal(size=n_par)
    u = rng.normal(size=n_rows)

    @jax.jit
    def products(params, v, u):
        out = {}
        for chunk in (None, 5):
            geom = SampleGeometry(model.apply, params, x, e_loc, chunk=chunk)
            out[f"chunk={chunk}"] = (geom.jacobian(), geom.jvp(v), geom.vjp(u), geom.s_matvec(v), geom.s_operator()(v))
        return out

    for chunk, (xm, xv, xtu, sv, sv_op) in products(params, v, u).items():
        xm = np.asarray(xm)
        np.testing.assert_allclose(np.asarray(xv), xm @ v, atol=1e-12, err_msg=str(chunk))
        np.testing.assert_allclose(np.asarray(xtu), xm.T @ u, atol=1e-12, err_msg=str(chunk))
        np.testing.assert_allclose(np.asarray(sv), xm.T @ (xm @ v), atol=1e-12, err_msg=str(chunk))
        np.testing.assert_allclose(np.asarray(sv_op), xm.T @ (xm @ v), atol=1e-12, err_msg=str(chunk))
    # and the explicit X itself equals the closed form up to column order (compare S spectra)
    s_ref = np.linalg.eigvalsh(centred_x(o, True).T @ centred_x(o, True))
    np.testing.assert_allclose(np.linalg.eigvalsh(xm.T @ xm), s_ref, atol=1e-12)


# ----------------------------------------------------------------------------- input validation
@given(bad=st.sampled_from(["lu", "", "Dense", "svd"]))
def test_unknown_solver_rejected(bad):
    with pytest.raises(ValueError, match=repr(bad).replace("(", r"\(")):
        stochastic_reconfiguration(1e-3, bad)


@given(shift=st.one_of(st.floats(max_value=-1e-12), st.just(float("nan"))))
def test_negative_or_nan_shift_rejected(shift):
    with pytest.raises(ValueError, match="shift"):
        stochastic_reconfiguration(shift)
    with pytest.raises(ValueError, match="relative_shift"):
        stochastic_reconfiguration(1e-3, relative_shift=shift)


def test_other_bad_options_rejected():
    with pytest.raises(ValueError, match="cg"):
        stochastic_reconfiguration(1e-3, "cg", relative_shift=0.1)
    with pytest.raises(ValueError, match="maxiter"):
        stochastic_reconfiguration(1e-3, "cg", maxiter=0)
    with pytest.raises(ValueError, match="tol"):
        stochastic_reconfiguration(1e-3, "cg", tol=-1.0)
    with pytest.raises(ValueError, match="shift"):
        stochastic_reconfiguration("big")
    tx = stochastic_reconfiguration(1e-3)
    params = {"w": jnp.zeros(3)}
    with pytest.raises(ValueError, match="geometry"):
        tx.update(params, tx.init(params), params)


# ----------------------------------------------------------------------------- trust radius
@pytest.mark.parametrize("solver", ["dense", "sample_space", "cg"])
def test_metric_trust_radius_shortens_long_steps_only(solver):
    """δ ← δ·min(1, r/‖δ‖_S), ‖δ‖_S = (δᵀSδ)^{1/2}, against the NumPy solve: a radius below
    the step's length shortens it to exactly r in the metric (same direction); a radius above
    it changes nothing."""
    rng = np.random.default_rng(12)
    x = rng.normal(size=(9, 6))
    res = rng.normal(size=9)
    shift = 1e-2
    delta = numpy_sr(x, x.T @ res, shift)
    length = np.sqrt(delta @ (x.T @ (x @ delta)))
    kw = {"tol": 1e-14} if solver == "cg" else {}
    for radius in (0.25 * length, 4.0 * length):
        got, _ = apply_sr(solver, x, res, shift=shift, max_metric_norm=float(radius), **kw)
        expected = delta * min(1.0, radius / length)
        np.testing.assert_allclose(got, expected, rtol=1e-7 if solver == "cg" else 1e-10)
    got_length = np.sqrt(got @ (x.T @ (x @ got)))
    assert got_length == pytest.approx(length, rel=1e-7)  # the larger radius left it alone


@given(bad=st.sampled_from([0.0, -1.0, float("nan"), "1", True]))
def test_bad_trust_radius_rejected(bad):
    with pytest.raises(ValueError, match="max_metric_norm"):
        stochastic_reconfiguration(1e-3, max_metric_norm=bad)


# ----------------------------------------------------------------------------- memory guard
def abstract_update(solver, rows, n_params, complex_output=False, **kw):
    """Trace one SR update on abstract arrays of the given size (nothing is allocated)."""
    tx = stochastic_reconfiguration(1e-2, solver, **kw)

    def update(x, residual, g):
        geom = MatrixGeometry(x, residual, complex_output=complex_output)
        params = {"w": g}
        return tx.update({"w": g}, tx.init(params), params, geometry=geom)

    spec = lambda *shape: jax.ShapeDtypeStruct(shape, jnp.float64)
    return jax.eval_shape(update, spec(rows, n_params), spec(rows), spec(n_params))


def test_dense_sr_above_the_default_memory_limit_is_refused_before_compiling():
    # 2^20 samples × 10^6 parameters: X alone is 8 TiB, far above half of any machine's memory
    with pytest.raises(ValueError, match=r"would need about .* GiB.*solver='cg'"):
        abstract_update("dense", 2**20, 10**6)
    with pytest.raises(ValueError, match="sample_space"):
        abstract_update("sample_space", 2**20, 10**6)
    out, _ = abstract_update("cg", 2**20, 10**6)  # matrix-free: traces without complaint
    assert out["w"].shape == (10**6,)


@pytest.mark.parametrize("rows, n_params, fits", [(64, 8, "dense"), (8, 64, "sample_space")])
def test_auto_solver_falls_back_by_memory(rows, n_params, fits):
    from psiloom.optimize.sr import solver_memory_bytes

    need = {k: solver_memory_bytes(k, rows, n_params) for k in ("dense", "sample_space", "cg")}
    other = "sample_space" if fits == "dense" else "dense"
    assert need[fits] < need[other]  # the shape rule's choice is also the smaller one here
    # limit between the two: the explicit larger solver is refused, naming the one that fits
    limit = 0.5 * (need[fits] + need[other])
    with pytest.raises(ValueError, match=f"use solver='{fits}'"):
        abstract_update(other, rows, n_params, memory_limit=limit)
    # limit below both matrix solvers: "auto" takes CG and still solves (S + εI)δ = F (numpy reference)
    rng = np.random.default_rng(3)
    x = rng.normal(size=(rows, n_params)) / np.sqrt(rows)
    residual = rng.normal(size=rows)
    delta, _ = apply_sr("auto", x, residual, shift=1e-1, memory_limit=need["cg"] + 1, tol=1e-12)
    np.testing.assert_allclose(delta, numpy_sr(x, x.T @ residual, 1e-1), rtol=1e-7, atol=1e-9)
    with pytest.raises(ValueError, match="relative_shift"):  # no matrix-free fallback with ε_rel
        apply_sr("auto", x, residual, rel=1e-2, memory_limit=need["cg"] + 1)


@given(bad=st.sampled_from([0, -1.0, float("nan"), "1e9", True, [1e9], 1e9j]))
def test_bad_memory_limit_rejected(bad):
    with pytest.raises(ValueError, match="memory_limit"):
        stochastic_reconfiguration(1e-3, "dense", memory_limit=bad)


@pytest.mark.parametrize("solver", ["dense", "sample_space", "cg"])
def test_sign_only_phase_drops_zero_rows_and_keeps_the_step(solver):
    # a determinant of real orbitals: log ψ = log|ψ| + iπ[ψ < 0], so Im ΔO ≡ 0 and the flagged
    # geometry (n rows) must give the same SR step as the full complex one (2n rows, half zero)
    from psiloom import fermions as fm

    space = fm.FermionSpace(4, 2, 2)
    model = fm.BackflowDeterminant(space, hidden=6)
    assert model.sign_only_phase
    x = space.random(jax.random.PRNGKey(0), 24)
    params = model.init(jax.random.PRNGKey(1), x[:1])
    logs = model.apply(params, x)
    assert np.any(np.abs(np.imag(np.asarray(logs))) > 1.0)  # some amplitudes are negative
    e_loc = jax.random.normal(jax.random.PRNGKey(2), (24,)) - 2.0

    def run(flag):
        _, grad = energy_gradient(model.apply, params, x, e_loc)
        geom = SampleGeometry(model.apply, params, x, e_loc, sign_only_phase=flag)
        tx = stochastic_reconfiguration(1e-3, solver, tol=1e-13)
        return geom.jacobian().shape[0], ravel_real(tx.update(grad, tx.init(params), params, geometry=geom)[0])[0]

    rows_flagged, step_flagged = run(True)
    rows_full, step_full = run(False)
    assert (rows_flagged, rows_full) == (24, 48)
    np.testing.assert_allclose(step_flagged, step_full, rtol=1e-8, atol=1e-10)
    # complex parameters ignore the flag (their phase can vary)
    complex_params = jax.tree_util.tree_map(lambda p: p.astype(jnp.complex128), params)
    assert SampleGeometry(model.apply, complex_params, x, e_loc, sign_only_phase=True).complex_output


# ----------------------------------------------------------------------------- carried-over direction
def momentum_updates(solver, batches, shift, momentum, forces=None, **kw):
    """Outputs of consecutive SR updates with ``momentum`` on the given (X, ε_res) batches."""
    p = np.asarray(batches[0][0]).shape[1]
    params = {"w": jnp.zeros(p)}
    tx = stochastic_reconfiguration(shift, solver, momentum=momentum, **kw)
    state = tx.init(params)
    outs = []
    for k, (x, res) in enumerate(batches):
        force = np.asarray(x).T @ np.asarray(res) if forces is None else forces[k]
        out, state = tx.update({"w": 2.0 * jnp.asarray(force)}, state, params, geometry=MatrixGeometry(x, res))
        outs.append(np.asarray(out["w"]))
        if momentum > 0:  # the state keeps the output (μ = 0 keeps nothing)
            np.testing.assert_array_equal(np.asarray(state.previous), outs[-1])
    return outs


@given(
    shape=st.sampled_from(SHAPES),
    shift=st.floats(1e-2, 1.0),
    momentum=st.floats(0.0, 0.999),
    factor=st.floats(-2.0, 2.0),
    seed=st.integers(0, 2**16),
)
def test_momentum_step_is_the_regularised_least_squares_solution(shape, shift, momentum, factor, seed):
    # Goldshlager, Abrahamsen & Lin, J. Chem. Phys. 161 (2024): δ_k = argmin ‖X_k φ − ε_k‖² + ε‖φ − μδ_{k−1}‖².
    # Reference: numpy.linalg.lstsq of the stacked system [X_k; √ε I] φ = [ε_k; √ε μ δ_{k−1}] (no
    # normal equations), over three batches; with a rescaled force F (an earlier transformation
    # changed it) the normal-equation form (S + εI) δ = F + εμδ_prev by numpy.linalg.solve.
    n, p = shape
    rng = np.random.default_rng(seed)
    batches = [(rng.normal(size=(n, p)), rng.normal(size=n)) for _ in range(3)]
    forces = [factor * (x.T @ r) + 0.1 * rng.normal(size=p) for x, r in batches]
    cond = (max(np.linalg.norm(x, 2) for x, _ in batches) ** 2 + shift) / shift
    for solver in ("dense", "sample_space", "cg", "auto"):
        kw = {"tol": 1e-14} if solver == "cg" else {}
        got = momentum_updates(solver, batches, shift, momentum, **kw)
        previous = np.zeros(p)
        for (x, res), delta in zip(batches, got):
            a = np.vstack([x, np.sqrt(shift) * np.eye(p)])
            b = np.concatenate([res, np.sqrt(shift) * momentum * previous])
            ref = np.linalg.lstsq(a, b, rcond=None)[0]
            tol = 1e-13 * cond + 1e-10 if solver == "cg" else 1e-10
            assert np.linalg.norm(delta - ref) <= tol * np.linalg.norm(ref) + 1e-12, (solver, momentum)
            previous = delta
        got = momentum_updates(solver, batches, shift, momentum, forces=forces, **kw)
        previous = np.zeros(p)
        for (x, _), force, delta in zip(batches, forces, got):
            ref = np.linalg.solve(x.T @ x + shift * np.eye(p), force + shift * momentum * previous)
            # the sample-space remainder goes through the Woodbury form: rounding ~ u·cond² (as above)
            tol = 1e-13 * cond + 1e-10 if solver == "cg" else 2.2e-16 * cond ** 2 + 1e-10
            assert np.linalg.norm(delta - ref) <= tol * np.linalg.norm(ref) + 1e-12, (solver, momentum)
            previous = delta


@pytest.mark.parametrize("solver", ["sample_space", "cg"])
def test_momentum_fits_the_direction_to_many_batches(solver):
    # Kaczmarz: block projections onto the solution sets of the batches of a consistent system
    # A θ* = b converge to θ* (Strohmer & Vershynin, J. Fourier Anal. Appl. 15, 262 (2009);
    # Needell & Tropp, Linear Algebra Appl. 441, 199 (2014)); with μ < 1 and ε → 0 the expected
    # fixed point is off by (I − μ(I − P̄))⁻¹(1 − μ)(I − P̄)θ*, P̄ the mean projection (algebra
    # from the update rule), i.e. O((1 − μ)/λ_min(P̄)). Each batch has 8 rows for 24 parameters,
    # so a single SR step (μ = 0) is the minimum-norm solution of 8 equations and misses θ* by ~80%.
    rng = np.random.default_rng(4)
    n, p, n_batches = 8, 24, 12
    a = rng.normal(size=(n * n_batches, p))
    theta = rng.normal(size=p)
    b = a @ theta
    order = rng.integers(0, n_batches, size=600)
    batches = [(a[k * n:(k + 1) * n], b[k * n:(k + 1) * n]) for k in order]
    kw = {"tol": 1e-14} if solver == "cg" else {}
    plain = momentum_updates(solver, batches[:1], 1e-9, 0.0, **kw)[-1]
    carried = momentum_updates(solver, batches, 1e-9, 0.999, **kw)[-1]
    projections = [np.linalg.pinv(a[k * n:(k + 1) * n]) @ a[k * n:(k + 1) * n] for k in range(n_batches)]
    p_mean = np.mean(projections, axis=0)
    bias = (1 - 0.999) / np.linalg.eigvalsh(p_mean).min()
    assert np.linalg.norm(plain - theta) > 0.5 * np.linalg.norm(theta)
    assert np.linalg.norm(carried - theta) < 3 * bias * np.linalg.norm(theta)


@given(bad=st.sampled_from([-0.1, 1.0, 1.5, float("nan"), float("inf"), "0.5", True]))
def test_bad_momentum_rejected(bad):
    with pytest.raises(ValueError, match="momentum"):
        stochastic_reconfiguration(1e-3, momentum=bad)


def test_momentum_with_a_relative_shift_rejected():
    with pytest.raises(ValueError, match="momentum"):
        stochastic_reconfiguration(1e-3, momentum=0.9, relative_shift=1e-3)


def test_momentum_direction_survives_a_checkpoint(tmp_path):
    # the carried-over direction lives in the optimiser state: a resumed search continues identically
    from psiloom.spaces import SpinSpace
    from psiloom.states import RBM

    lattice = pl.lattices.chain(6)
    sampler = pl.sampling.MetropolisChains(SpinSpace(6, magnetisation=0), n_chains=8, bonds=lattice.bonds, burn_in=1)
    optimizer = optax.chain(stochastic_reconfiguration(shift=1e-2, momentum=0.9), optax.sgd(0.05))
    search = pl.train.GroundStateSearch(RBM(alpha=1.0, init_scale=0.05), pl.operators.heisenberg(lattice),
                                        sampler, optimizer, n_samples=64)
    state = search.init(jax.random.PRNGKey(0))
    for _ in range(3):
        state, _ = search.step(state)
    previous = np.asarray(state.opt_state[0].previous)
    assert np.linalg.norm(previous) > 0
    path = str(tmp_path / "momentum.ckpt")
    search.save(path, state)
    restored, _ = search.resume(path)
    np.testing.assert_array_equal(np.asarray(restored.opt_state[0].previous), previous)
    a, _ = search.step(state)
    b, _ = search.step(restored)
    for x, y in zip(jax.tree_util.tree_leaves(a.params), jax.tree_util.tree_leaves(b.params)):
        np.testing.assert_array_equal(np.asarray(x), np.asarray(y))


# ----------------------------------------------------------------------------- Gram product and its precision
@given(n=st.integers(1, 23), p=st.integers(1, 9), blocks=st.integers(1, 6), seed=st.integers(0, 2**16))
def test_block_triangular_gram_equals_the_full_product(n, p, blocks, seed):
    # reference: numpy's X Xᵀ; the block form mirrors the upper blocks, so it is exactly symmetric
    from psiloom.optimize.sr import gram_matrix

    x = np.random.default_rng(seed).normal(size=(n, p))
    k = np.asarray(gram_matrix(jnp.asarray(x), blocks=min(blocks, n)))
    np.testing.assert_allclose(k, x @ x.T, rtol=0, atol=1e-12 * max(1.0, np.abs(x @ x.T).max()))
    np.testing.assert_array_equal(k, k.T)


@jax.jit
def mixed_precision_outputs(x, res, force, shift, rel):
    """δ of the sample-space solver with the Gram matrix in float32 and 0, 1, 2 refinement steps."""
    geom = MatrixGeometry(x, res)
    params = {"w": jnp.zeros(x.shape[1])}
    out = {}
    for steps in (0, 1, 2):
        for use_rel in (False, True):
            tx = stochastic_reconfiguration(lambda c: shift, "sample_space", relative_shift=(lambda c: rel) if use_rel
                                            else None, gram_dtype="float32", refinement_steps=steps)
            out[steps, use_rel] = tx.update({"w": 2.0 * force}, tx.init(params), params, geometry=geom)[0]["w"]
    return out


@given(shape=st.sampled_from([(12, 40), (30, 70), (300, 400)]), shift=st.floats(1e-2, 1.0),
       rel=st.floats(1e-2, 1.0), seed=st.integers(0, 2**16))
def test_a_float32_gram_matrix_with_refinement_gives_the_float64_step(shape, shift, rel, seed):
    # reference: numpy.linalg.solve in float64. Iterative refinement (Higham, Accuracy and Stability
    # of Numerical Algorithms, 2nd ed., ch. 12) multiplies the error by about u₃₂ tr K / ε per step
    # (u₃₂ = 6e-8): here tr K ≈ n·p·σ² ≤ 1.2 × 10², ε ≥ 10⁻², a factor ≤ 10⁻³, so one step leaves
    # ≲ 10⁻³ of the unrefined error and two reach float64 rounding. (300, 400) takes the blocked product.
    n, p = shape
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, p)) / 10
    res = rng.normal(size=n)
    force = x.T @ res + 0.01 * rng.normal(size=p)  # a remainder for the Woodbury term too
    outs = mixed_precision_outputs(x, res, force, shift, rel)
    for use_rel in (False, True):
        ref = numpy_sr(x, force, shift, rel if use_rel else 0.0)
        err = {k: np.linalg.norm(np.asarray(outs[k, use_rel]) - ref) / np.linalg.norm(ref) for k in (0, 1, 2)}
        assert err[0] < 1e-5, err  # float32 rounding of K: a few u₃₂ times the condition number
        assert err[1] <= max(1e-2 * err[0], 1e-11), err
        assert err[2] <= 1e-10, err


def test_bad_gram_precision_options_rejected():
    for bad in ("int32", "not-a-dtype", "complex64"):
        with pytest.raises(ValueError, match="gram_dtype"):
            stochastic_reconfiguration(1e-3, gram_dtype=bad)
    with pytest.raises(ValueError, match="refinement_steps"):
        stochastic_reconfiguration(1e-3, gram_dtype="float32", refinement_steps=-1)
    with pytest.raises(TypeError, match="refinement_steps"):
        stochastic_reconfiguration(1e-3, gram_dtype="float32", refinement_steps=1.5)
