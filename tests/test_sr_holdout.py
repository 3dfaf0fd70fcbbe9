"""Held-out check of the SR step (psiloom.optimize.held_out_check).

References are independent of the code under test: δ from ``numpy.linalg.solve`` of
(XᵀX + εI) δ = Xᵀε_E, the descent ∇E·δ from :func:`energy_gradient` (automatic differentiation
of the covariance-form surrogate, not X), and the statistics of a correlation between
independent vectors (standard deviation 1/√n, textbook).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import psiloom as pl
from psiloom.optimize import SampleGeometry, energy_gradient, held_out_check, held_out_scan, ravel_real


class Batch:
    """An explicit real X and residual ε_E: what the check reads from a SampleGeometry."""

    def __init__(self, x, residual, complex_output=False):
        self.x, self.eps, self.complex_output = jnp.asarray(x), jnp.asarray(residual), complex_output

    def jacobian(self):
        return self.x

    def residual(self):
        return self.eps


def random_batch(seed, n, p):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, p))
    x = (x - x.mean(0)) / np.sqrt(n)
    r = rng.normal(size=n)
    return Batch(x, (r - r.mean()) / np.sqrt(n))


@pytest.mark.parametrize("n,p", [(12, 30), (40, 9)])  # sample-space and parameter-space solves
def test_step_and_lengths_match_a_numpy_solve(n, p):
    fit, held = random_batch(0, n, p), random_batch(1, n + 3, p)
    shift = 3e-2
    check = held_out_check(fit, held, shift)
    x, r = np.asarray(fit.x), np.asarray(fit.eps)
    delta = np.linalg.solve(x.T @ x + shift * np.eye(p), x.T @ r)
    np.testing.assert_allclose(np.asarray(check.delta), delta, rtol=1e-9, atol=1e-12)
    xh, rh = np.asarray(held.x), np.asarray(held.eps)
    assert check.euclidean_length == pytest.approx(np.linalg.norm(delta), rel=1e-9)
    assert check.metric_length == pytest.approx(np.sqrt(delta @ x.T @ x @ delta), rel=1e-9)
    assert check.held_out_metric_length == pytest.approx(np.linalg.norm(xh @ delta), rel=1e-9)
    assert check.fit_descent == pytest.approx(2 * (x @ delta) @ r, rel=1e-9)
    assert check.held_out_descent == pytest.approx(2 * (xh @ delta) @ rh, rel=1e-9)
    assert check.held_out_correlation == pytest.approx(np.corrcoef(xh @ delta, rh)[0, 1], rel=1e-9)
    assert check.generalisation == pytest.approx(check.held_out_descent / check.fit_descent)


def test_the_same_batch_twice_generalises_fully():
    fit = random_batch(2, 20, 50)
    check = held_out_check(fit, fit, 1e-2)
    assert check.generalisation == pytest.approx(1.0)
    assert check.held_out_correlation == pytest.approx(check.fit_correlation)
    assert check.fit_descent > 0  # δ = (S + ε)⁻¹F with F = Xᵀε_E: F·δ > 0 for a positive definite S + ε


def test_descent_is_the_energy_gradient_along_the_step_for_a_trial_state():
    # ∇E from automatic differentiation of the covariance surrogate (energy_gradient), not from X
    model = pl.states.RBM(alpha=2, init_scale=0.3)
    space = pl.spaces.SpinSpace(8)
    x = space.random(jax.random.PRNGKey(0), 24)
    x_held = space.random(jax.random.PRNGKey(1), 24)
    params = model.init(jax.random.PRNGKey(2), x)
    e_loc = jax.random.normal(jax.random.PRNGKey(3), (24,)) - 4.0
    e_held = jax.random.normal(jax.random.PRNGKey(4), (24,)) - 4.0
    check = held_out_check(SampleGeometry(model.apply, params, x, e_loc),
                           SampleGeometry(model.apply, params, x_held, e_held), 1e-2)
    grad = ravel_real(energy_gradient(model.apply, params, x, e_loc)[1])[0]
    grad_held = ravel_real(energy_gradient(model.apply, params, x_held, e_held)[1])[0]
    assert check.fit_descent == pytest.approx(float(grad @ check.delta), rel=1e-8)
    assert check.held_out_descent == pytest.approx(float(grad_held @ check.delta), rel=1e-8)


def test_a_step_fitted_to_pure_noise_does_not_generalise():
    # local energies independent of the log-derivatives: with n < P and a tiny shift the step
    # interpolates the fit batch (correlation → 1), while on an independent batch the
    # correlation of two independent vectors has standard deviation 1/√n (5σ bound)
    n, p = 64, 400
    fit, held = random_batch(5, n, p), random_batch(6, 4096, p)
    check = held_out_check(fit, held, 1e-8)
    assert check.fit_correlation > 0.999
    assert abs(check.held_out_correlation) < 5 / np.sqrt(4096)


def test_a_step_fitted_to_signal_generalises():
    # ε_E = X θ* + small noise on both batches (same θ*): the held-out correlation is high
    rng = np.random.default_rng(7)
    p, theta = 30, rng.normal(size=30)

    def batch(n):
        x = rng.normal(size=(n, p))
        x = (x - x.mean(0)) / np.sqrt(n)
        r = x @ theta + 0.01 * rng.normal(size=n) / np.sqrt(n)
        return Batch(x, r - r.mean())

    n = 1000
    check = held_out_check(batch(n), batch(n), 1e-4)
    assert check.held_out_correlation > 0.99
    # the descents are quadratic forms δᵀSδ of two independent Gaussian batches, each with a
    # relative spread √(2/n) (chi-square with n degrees of freedom): their ratio spreads by 2/√n
    assert check.generalisation == pytest.approx(1.0, abs=4 * 2 / np.sqrt(n))


@settings(max_examples=25, deadline=None)
@given(st.floats(1e-6, 1.0), st.floats(1.01, 100.0), st.integers(0, 10_000))
def test_lengths_shrink_as_the_shift_grows(shift, factor, seed):
    # ‖δ‖² = Σ λ r²/(λ+ε)² and ‖Xδ‖² = Σ λ² r²/(λ+ε)² (eigenbasis of XᵀX) both fall with ε
    fit = random_batch(seed, 10, 25)
    small, large = held_out_check(fit, fit, shift), held_out_check(fit, fit, shift * factor)
    assert large.euclidean_length <= small.euclidean_length * (1 + 1e-9)
    assert large.metric_length <= small.metric_length * (1 + 1e-9)


@pytest.mark.parametrize("shift", [-1e-3, float("nan"), float("inf"), "0.01", True])
def test_bad_shift_is_refused_by_name(shift):
    fit = random_batch(0, 8, 5)
    with pytest.raises((ValueError, TypeError), match="shift"):
        held_out_check(fit, fit, shift)


def test_mismatched_or_degenerate_batches_are_refused():
    fit = random_batch(0, 8, 5)
    with pytest.raises(ValueError, match="parameters"):
        held_out_check(fit, random_batch(1, 8, 6))
    with pytest.raises(ValueError, match="held_out has 1 sample"):
        held_out_check(fit, Batch(np.zeros((1, 5)), np.zeros(1)))
    with pytest.raises(ValueError, match="complex_output"):
        held_out_check(fit, Batch(np.zeros((16, 5)), np.zeros(16), complex_output=True))
    for n, p in ((4, 9), (12, 3)):  # fewer and more samples than parameters
        with pytest.raises(ValueError, match="shift=0"):
            held_out_check(random_batch(2, n, p), random_batch(3, n, p), 0.0)


def test_a_scan_over_shifts_equals_one_check_per_shift():
    fit, held = random_batch(8, 10, 25), random_batch(9, 12, 25)
    shifts = [1e-3, 1e-2, 1e-1]
    for scanned, shift in zip(held_out_scan(fit, held, shifts), shifts):
        single = held_out_check(fit, held, shift)
        assert scanned.shift == shift
        np.testing.assert_allclose(np.asarray(scanned.delta), np.asarray(single.delta), rtol=1e-12)
        assert scanned.held_out_correlation == pytest.approx(single.held_out_correlation, rel=1e-12)


@pytest.mark.parametrize("shifts", [[], 0.01, "0.01", [1e-2, -1.0], [1e-2, 0.0]])
def test_a_bad_scan_is_refused(shifts):
    fit = random_batch(0, 8, 5)
    with pytest.raises((ValueError, TypeError), match="shift"):
        held_out_scan(fit, fit, shifts)
