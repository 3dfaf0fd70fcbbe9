"""Tests for psiloom.stats against exact AR(1) results and outside references."""

import jax

jax.config.update("jax_enable_x64", True)

import math
import re
import warnings

import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy.signal import lfilter

from psiloom import stats
from psiloom.stats import (
    parenthesis_notation,
    Estimate,
    autocorrelation,
    blocking_analysis,
    blocking_error,
    effective_sample_size,
    estimate,
    integrated_autocorrelation_time,
    split_rhat,
)

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # arviz announces a refactor on import
    import arviz as az
import emcee


def ar1(seed: int, rho: float, n_time: int, n_chains: int) -> np.ndarray:
    """Stationary unit-variance AR(1) chains, shape (n_time, n_chains).

    x_t = ρ x_{t−1} + sqrt(1 − ρ²) ξ_t with x_0 ~ N(0, 1).
    """
    noise = np.random.default_rng(seed).standard_normal((n_time, n_chains))
    drive = math.sqrt(1.0 - rho**2) * noise
    drive[0] = noise[0]  # x_0 ~ N(0, 1): start in the stationary distribution
    return lfilter([1.0], [1.0, -rho], drive, axis=0)


def ar1_tau(rho: float) -> float:
    """τ_int = 1 + 2 Σ_{t≥1} ρ^t = (1 + ρ)/(1 − ρ) for AR(1) (textbook)."""
    return (1.0 + rho) / (1.0 - rho)


def tau_relative_sigma(tau: float, n_total: int, c: float = 5.0) -> float:
    """Relative standard deviation of τ̂ for window M ≈ cτ.

    var(τ̂) ≈ 2(2M+1)/N · τ² (Sokal 1997).
    """
    window = c * tau
    return math.sqrt(2.0 * (2.0 * window + 1.0) / n_total)


# --------------------------------------------------------------------------- autocorrelation


def test_autocorrelation_of_ar1_is_geometric():
    rho, n_time, n_chains = 0.8, 20_000, 8
    values = ar1(1, rho, n_time, n_chains)
    acf = np.asarray(autocorrelation(values))
    assert acf.shape == (n_time,)
    assert acf[0] == pytest.approx(1.0)
    lags = np.arange(1, 6)
    # ρ(t) = ρ^t for AR(1) (textbook); the estimate of each ρ(t) has standard deviation
    # ≲ sqrt(τ/N) (Bartlett's formula, textbook), so 5 of those is a safe tolerance.
    tol = 5.0 * math.sqrt(ar1_tau(rho) / (n_time * n_chains))
    np.testing.assert_allclose(acf[lags], rho**lags, atol=tol)


def test_autocorrelation_matches_direct_sum():
    # The FFT result must equal the direct definition C(t) = (1/n) Σ_s δx_s δx_{s+t} (textbook).
    values = np.random.default_rng(2).standard_normal((37, 3))
    centred = values - values.mean(axis=0)
    n = values.shape[0]
    acov = np.array([np.sum(centred[: n - t] * centred[t:]) / n for t in range(n)])
    np.testing.assert_allclose(autocorrelation(values), acov / acov[0], atol=1e-12)


def test_autocorrelation_of_constant_chain_is_unit_impulse():
    acf = np.asarray(autocorrelation(np.full((10, 2), 3.0)))
    np.testing.assert_array_equal(acf, np.eye(10)[0])


# --------------------------------------------------------------------------- τ_int


@pytest.mark.parametrize("rho", [0.5, 0.8, 0.9])
def test_tau_of_ar1_matches_exact(rho):
    n_time, n_chains = 20_000, 8
    values = ar1(10 + int(100 * rho), rho, n_time, n_chains)
    tau_exact = ar1_tau(rho)  # textbook
    tau = float(integrated_autocorrelation_time(values))
    # 5 sigma of the statistical error of τ̂ (Sokal 1997).
    tol = 5.0 * tau_relative_sigma(tau_exact, n_time * n_chains) * tau_exact
    assert abs(tau - tau_exact) < tol


@pytest.mark.parametrize("rho", [0.5, 0.9])
def test_tau_agrees_with_emcee(rho):
    # emcee implements the same Sokal windowing (Sokal 1997) on a single chain, so the two
    # must agree on the same data far better than the ~10% statistical error of τ̂.
    chain = ar1(20, rho, 50_000, 1)
    ours = float(integrated_autocorrelation_time(chain))
    theirs = float(emcee.autocorr.integrated_time(chain[:, 0], c=5, quiet=True)[0])
    assert ours == pytest.approx(theirs, rel=1e-6)


def test_tau_of_iid_chains_is_one():
    values = np.random.default_rng(3).standard_normal((20_000, 8))
    n_total = values.size
    tau = float(integrated_autocorrelation_time(values))
    # τ = 1 for independent samples (textbook), 5 sigma of Sokal 1997's error of τ̂.
    assert abs(tau - 1.0) < 5.0 * tau_relative_sigma(1.0, n_total)


def test_tau_of_too_short_chain_is_flagged():
    # A chain much shorter than its correlation time: the Sokal window search fails and the
    # chain-length rule (n_time ≥ 50 τ, Sokal 1997) must fire instead of a tiny τ.
    values = ar1(4, 0.999, 200, 2)
    result = estimate(values)
    assert float(result.tau) > 200 / 50
    assert any("chain length" in message for message in result.warnings())


def test_tau_rejects_bad_window_constant():
    with pytest.raises(ValueError, match="c=-1"):
        integrated_autocorrelation_time(np.ones((10, 2)), c=-1.0)


# --------------------------------------------------------------------------- errors


def test_error_of_ar1_mean_matches_exact():
    rho, n_time, n_chains = 0.8, 20_000, 8
    n_total = n_time * n_chains
    values = ar1(5, rho, n_time, n_chains)
    exact = math.sqrt(ar1_tau(rho) / n_total)  # unit variance: σ_mean² = τ/N (textbook)
    result = estimate(values)
    # The error is sqrt(σ² τ̂ / N): its relative uncertainty is ~½ that of τ̂ (Sokal 1997);
    # allow 5 sigma.
    tol = 5.0 * 0.5 * tau_relative_sigma(ar1_tau(rho), n_total)
    assert float(result.error) == pytest.approx(exact, rel=tol)
    # var(σ̂²) ≈ 2 τ₂ / N for a Gaussian AR(1), with τ₂ = (1 + ρ²)/(1 − ρ²) the integrated
    # autocorrelation time of x² (textbook); 5 sigma.
    tau_squares = (1.0 + rho**2) / (1.0 - rho**2)
    variance_tol = 5.0 * math.sqrt(2 * tau_squares / n_total)
    assert float(result.variance) == pytest.approx(1.0, rel=variance_tol)


def test_error_bars_are_calibrated_over_replicas():
    # Over independent replicas the z-scores mean/error of a zero-mean process must have unit
    # spread (definition of a standard error); the sample std of n z-scores has relative
    # standard deviation ≈ 1/sqrt(2n) (textbook); allow 5 of those.
    n_rep, n_time, n_chains = 200, 1000, 4
    values = ar1(6, 0.8, n_time, n_chains * n_rep).reshape(n_time, n_rep, n_chains)
    results = jax.vmap(estimate, in_axes=1)(values)
    z = np.asarray(results.mean) / np.asarray(results.error)
    assert np.std(z) == pytest.approx(1.0, abs=5.0 / math.sqrt(2 * n_rep))


def ar1_block_error(rho: float, block: int, n_total: int) -> float:
    """Expected blocked error at block size b for unit-variance AR(1) (textbook sum):
    Var(block mean)·b = τ − 2ρ(1 − ρ^b)/(b(1 − ρ)²), and σ² ≈ Var(block mean)/n_blocks."""
    deficit = 2.0 * rho * (1.0 - rho**block) / (block * (1.0 - rho) ** 2)
    return math.sqrt((ar1_tau(rho) - deficit) / n_total)


@pytest.mark.parametrize("rho", [0.5, 0.8])
def test_blocking_error_of_ar1(rho):
    n_total = 2**16
    series = ar1(7 + int(10 * rho), rho, n_total, 1)[:, 0]
    error = blocking_error(series)
    sizes, errors = blocking_analysis(series)
    level = int(np.flatnonzero(errors == error)[0])
    n_blocks = n_total // int(sizes[level])
    # Flyvbjerg & Petersen 1989: the blocked error is known to a relative 1/sqrt(2(n_b−1));
    # compare with the exact AR(1) value at the chosen block size within 5 of those.
    expected = ar1_block_error(rho, int(sizes[level]), n_total)
    assert error == pytest.approx(expected, rel=5.0 / math.sqrt(2 * (n_blocks - 1)))
    # ... and the plateau must sit close to the asymptotic sqrt(τ/N) (textbook), with the
    # ≤ 5% shortfall of a block size a few times τ allowed on top of the statistical error.
    exact = math.sqrt(ar1_tau(rho) / n_total)
    assert error == pytest.approx(exact, rel=0.05 + 5.0 / math.sqrt(2 * (n_blocks - 1)))
    # ... and with the autocorrelation-based error of the same series: each is known to
    # ≲ 4% here (Sokal 1997 / Flyvbjerg & Petersen 1989), so 15% is > 3 combined sigma.
    assert error == pytest.approx(float(estimate(series[:, None]).error), rel=0.15)


def test_blocking_levels():
    series = np.arange(10.0)
    sizes, errors = blocking_analysis(series)
    # 10 → 5 → 2 blocks (an odd leftover is dropped); a single block has no error.
    np.testing.assert_array_equal(sizes, [1, 2, 4])
    # each level: sqrt(c₀/(n_b − 1)) with c₀ the biased variance (Flyvbjerg & Petersen 1989)
    level2 = np.array([1.5, 5.5])  # means of 0..3 and 4..7
    expected = [
        math.sqrt(np.var(series) / 9),
        math.sqrt(np.var(series.reshape(5, 2).mean(axis=1)) / 4),
        math.sqrt(np.var(level2) / 1),
    ]
    np.testing.assert_allclose(errors, expected)


def test_blocking_rejects_bad_input():
    with pytest.raises(ValueError, match=r"shape \(3, 2, 2\)"):
        blocking_analysis(np.ones((3, 2, 2)))
    with pytest.raises(ValueError, match=r"shape \(1,\)"):
        blocking_error(np.ones(1))
    with pytest.raises(ValueError, match=r"shape \(1, 4\)"):
        blocking_error(np.ones((1, 4)))


def test_blocking_of_chains_combines_independent_chains():
    # (n_time, n_chains) input, as everywhere else: chains are blocked along time and are
    # independent, so the error of the overall mean is sqrt(Σ_k err_k²)/m at every level, and
    # one chain reproduces the 1-D analysis (Flyvbjerg & Petersen 1989).
    chains = ar1(21, 0.5, 2**12, 4)
    sizes, errors = blocking_analysis(chains)
    per_chain = [blocking_analysis(chains[:, k])[1] for k in range(4)]
    np.testing.assert_allclose(errors, np.sqrt(np.sum(np.square(per_chain), axis=0)) / 4, rtol=1e-12)
    np.testing.assert_allclose(blocking_analysis(chains[:, :1])[1], per_chain[0], rtol=1e-12)
    # the plateau agrees with the exact AR(1) error sqrt(τ/N) (textbook) within its uncertainty
    # (relative 1/sqrt(2 m (n_b − 1)) at a plateau of ≥ 8 samples per block: ≤ 2%) plus the
    # ≤ 5% shortfall of a block a few times τ
    error = blocking_error(chains)
    assert error == pytest.approx(math.sqrt(ar1_tau(0.5) / chains.size), rel=0.05 + 5 * 0.02)


# --------------------------------------------------------------------------- R̂ and ESS


def arviz_rhat(values: np.ndarray) -> float:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # 0/0 for constant draws
        return float(az.rhat(np.asarray(values).T, method="rank"))  # arviz wants (chain, draw)


def test_split_rhat_matches_arviz_well_mixed():
    values = np.random.default_rng(8).standard_normal((1000, 4))
    # Same definition as arviz's rank-normalized split-R̂ (Vehtari et al. 2021).
    assert float(split_rhat(values)) == pytest.approx(arviz_rhat(values), abs=1e-6)


def test_split_rhat_matches_arviz_shifted_means_odd_length():
    values = ar1(9, 0.7, 501, 4) + np.array([0.0, 0.0, 0.4, 0.4])
    ours = float(split_rhat(values))
    assert ours == pytest.approx(arviz_rhat(values), abs=1e-6)  # Vehtari et al. 2021
    assert ours > 1.01


def test_split_rhat_matches_arviz_with_ties():
    # Discrete draws: ties get average ranks (Vehtari et al. 2021, as in arviz).
    values = np.random.default_rng(10).integers(0, 4, size=(501, 4)).astype(float)
    assert float(split_rhat(values)) == pytest.approx(arviz_rhat(values), abs=1e-6)


def test_split_rhat_detects_scale_difference_through_folding():
    # Same mean, different spread: only the folded R̂ sees it (Vehtari et al. 2021).
    rng = np.random.default_rng(11)
    values = rng.standard_normal((1000, 4)) * np.array([1.0, 1.0, 3.0, 3.0])
    ours = float(split_rhat(values))
    assert ours == pytest.approx(arviz_rhat(values), abs=1e-6)
    assert ours > 1.01


@given(
    draws=st.lists(
        # floats on a 1e-3 grid: distinct draws differ by far more than the tie tolerance
        # (TIE_RTOL · max|x|, under which psiloom, unlike arviz, ranks draws as ties)
        st.integers(-3, 3) | st.floats(-10.0, 10.0, allow_subnormal=False).map(lambda v: round(v, 3)),
        min_size=27,
        max_size=27,
    ),
)
@settings(max_examples=25, deadline=None)
def test_split_rhat_matches_arviz_random(draws):
    # One fixed odd shape (one compilation); small integers provoke ties. Subnormals are
    # excluded because XLA on CPU flushes them to zero. Reference: arviz's rank-normalized
    # split-R̂ (Vehtari et al. 2021).
    values = np.asarray(draws, dtype=float).reshape(9, 3)
    # psiloom ranks draws equal within TIE_RTOL · max|x| as ties, arviz only exact ties: skip
    # draws whose folded values |x − median| are equal in exact arithmetic but not in floating
    # point (e.g. |1 − 0.594| and |0.188 − 0.594|)
    split = np.concatenate([values[:4], values[5:]], axis=1)
    folded = np.sort(np.abs(split - np.median(split)).reshape(-1))
    gaps = np.diff(folded)
    assume(not np.any((gaps > 0) & (gaps <= 1e-9)))
    ours = float(split_rhat(values))
    theirs = arviz_rhat(values)
    if math.isnan(theirs):  # constant input: 0/0 in both
        assert math.isnan(ours)
    else:
        assert ours == pytest.approx(theirs, abs=1e-6)


def test_split_rhat_short_chains_is_nan():
    # Fewer than 4 draws per chain: no split-R̂ (Vehtari et al. 2021 / arviz min_draws=4).
    assert math.isnan(float(split_rhat(np.ones((3, 4)))))


def test_stuck_chains_are_flagged():
    # Two groups of chains stuck in well-separated modes with no moves between them.
    rng = np.random.default_rng(12)
    modes = np.array([-5.0, -5.0, 5.0, 5.0])
    values = modes + rng.standard_normal((2000, 4))
    result = estimate(values)
    assert float(result.rhat) > 1.5  # ≫ 1.01 (Vehtari et al. 2021 threshold)
    assert float(result.rhat) == pytest.approx(arviz_rhat(values), abs=1e-6)
    messages = result.warnings()
    assert messages and any("R̂" in message for message in messages)


def test_well_mixed_chains_pass():
    values = np.random.default_rng(13).standard_normal((2000, 4))
    result = estimate(values)
    assert float(result.rhat) < 1.01  # Vehtari et al. 2021 threshold
    assert result.warnings() == []


@pytest.mark.parametrize("rho", [0.5, 0.9])
def test_ess_close_to_arviz_bulk(rho):
    # The estimators differ (ours: Sokal window on raw values; arviz bulk: rank-normalized
    # split chains with Geyer's initial monotone sequence, Vehtari et al. 2021), so only
    # rough agreement (factor 1.5, common practice) is expected.
    values = ar1(14, rho, 5000, 4)
    ours = float(effective_sample_size(values))
    theirs = float(az.ess(values.T, method="bulk"))
    assert theirs / 1.5 < ours < theirs * 1.5
    # ... and both near the exact N/τ (textbook) within 5 sigma (Sokal 1997)
    exact = values.size / ar1_tau(rho)
    assert ours == pytest.approx(exact, rel=5.0 * tau_relative_sigma(ar1_tau(rho), values.size))


# --------------------------------------------------------------------------- estimate


def test_estimate_fields_for_complex_input():
    rng = np.random.default_rng(15)
    real = rng.standard_normal((25, 4))
    imag = rng.standard_normal((25, 4))
    values = real + 1j * imag
    result = estimate(values)
    assert complex(result.mean) == pytest.approx(values.mean())
    # variance E|v − v̄|² (definition) is the sum of the two parts' variances
    assert float(result.variance) == pytest.approx(np.var(real) + np.var(imag))
    # error and τ from the real part only
    real_result = estimate(real)
    assert float(result.tau) == pytest.approx(float(real_result.tau))
    assert float(result.error) == pytest.approx(float(real_result.error))
    assert float(result.ess) == pytest.approx(values.size / float(result.tau))
    assert float(result.error) == pytest.approx(
        math.sqrt(np.var(real) * float(result.tau) / values.size)
    )


def test_estimate_short_chains():
    values = np.random.default_rng(16).standard_normal((3, 5))
    result = estimate(values)
    assert float(result.tau) == 1.0
    assert math.isnan(float(result.rhat))
    assert float(result.error) == pytest.approx(math.sqrt(np.var(values) / values.size))


def test_estimate_without_rhat_keeps_every_other_field():
    values = np.random.default_rng(17).standard_normal((25, 4))
    full, skipped = estimate(values), estimate(values, rhat=False)
    assert math.isfinite(float(full.rhat)) and math.isnan(float(skipped.rhat))
    for field in ("mean", "error", "variance", "tau", "ess", "n_time", "tau_reliable"):
        assert np.array_equal(np.asarray(getattr(full, field)), np.asarray(getattr(skipped, field))), field
    with pytest.raises(ValueError, match="rhat"):
        estimate(values, rhat="no")


@given(
    case=st.sampled_from([((3, 5), False), ((25, 4), True)]),
    seed=st.integers(0, 2**31 - 1),
)
@settings(max_examples=6, deadline=None)
def test_estimate_same_under_jit(case, seed):
    shape, complex_values = case
    rng = np.random.default_rng(seed)
    values = rng.standard_normal(shape)
    if complex_values:
        values = values + 1j * rng.standard_normal(shape)
    eager = estimate(values)
    jitted = jax.jit(estimate)(jnp.asarray(values))
    for name, a, b in zip(Estimate._fields, eager, jitted):
        np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-10, err_msg=name)


bad_shapes = st.one_of(
    st.lists(st.integers(1, 4), min_size=0, max_size=1),  # ndim 0 or 1
    st.lists(st.integers(1, 3), min_size=3, max_size=4),  # ndim 3 or 4
    st.tuples(st.just(0), st.integers(0, 3)).map(list),  # no samples
    st.tuples(st.integers(1, 3), st.just(0)).map(list),  # no chains
)


@given(shape=bad_shapes)
@settings(max_examples=30, deadline=None)
def test_bad_shapes_raise(shape):
    values = np.zeros(tuple(shape))
    for function in (
        estimate,
        autocorrelation,
        integrated_autocorrelation_time,
        split_rhat,
        effective_sample_size,
    ):
        with pytest.raises(ValueError, match="shape") as info:
            function(values)
        assert str(tuple(shape)) in str(info.value)
    with pytest.raises(ValueError, match="shape"):
        jax.jit(estimate)(values)


# --------------------------------------------------------------------------- formatting


def test_format_uses_parenthesis_notation():
    # parenthesis notation as in the CODATA tables: 1.23456(34) means 1.23456 ± 0.00034
    result = Estimate(mean=-7.142351, error=0.00034, variance=0.012, tau=1.8, ess=5000.0, rhat=1.002)
    text = str(result)
    assert text.startswith("-7.14235(34)  | ")
    assert "var 0.012" in text and "τ 1.8" in text and "R̂ 1.002" in text
    assert "±" not in text and text == result.format()


@pytest.mark.parametrize("value, error, expected", [
    (1.23456, 0.00034, "1.23456(34)"),    # the example of the notation itself
    (-7.142351, 0.000341, "-7.14235(34)"),
    (0.5, 0.05, "0.500(50)"),
    (1.0, 0.000996, "1.0000(10)"),        # 0.000996 rounds up to 0.0010: one decimal fewer
    (12.34, 3.4, "12.3(3.4)"),            # an error ≥ 1 keeps its decimal point
    (1234.0, 56.0, "1234(56)"),
    (123456.0, 3400.0, "123500(3400)"),
    (1e-18, 3e-19, "1.00(30)e-18"),
    (1.0, 3e-15, "1.0000000000000000(30)"),  # tiny error on an ordinary value: fixed point
    (1e-12, 1e-30, "1e-12(0)"),              # no digit of the error to show
    (2.5, 0.0, "2.5(0)"),
])
def test_parenthesis_notation_examples(value, error, expected):
    assert parenthesis_notation(value, error) == expected


@settings(max_examples=200, deadline=None)
@given(value=st.floats(-1e6, 1e6, allow_nan=False), error=st.floats(1e-9, 1e4))
def test_parenthesis_notation_reads_back_within_rounding(value, error):
    # read the string back as a physicist would: value to its last digit, error in those units
    text = parenthesis_notation(value, error)
    match = re.fullmatch(r"([+-]?\d+)(?:\.(\d+))?\(([\d.]+)\)", text)
    assert match, text
    digits_after_point = len(match.group(2) or "")
    shown = float(match.group(1) + "." + (match.group(2) or "0"))
    if digits_after_point:
        unit = 10.0 ** -digits_after_point
        err = float(match.group(3)) if "." in match.group(3) else int(match.group(3)) * unit
    else:  # errors of 10 and more: the value is rounded to the error's second digit
        err = float(match.group(3))
        unit = 10.0 ** (math.floor(math.log10(err)) - 1)
    assert abs(shown - value) <= 0.5 * unit * (1 + 1e-9) + 1e-12 * abs(value)
    assert abs(err - error) <= 0.5 * unit * (1 + 1e-9)
    assert 10 <= round(err / unit) <= 99  # two significant digits


def test_format_of_jax_estimate_contains_mean_and_error():
    values = ar1(17, 0.5, 2000, 4) + 3.0
    result = estimate(values)  # fields are 0-d jax arrays
    assert str(result).startswith(parenthesis_notation(float(result.mean), float(result.error)) + "  | ")


def test_format_complex_and_degenerate():
    text = Estimate(1.0 + 0.5j, 0.01, 1.0, 1.0, 1000.0, float("nan")).format()
    assert text.startswith("1.000(10)+0.500(10)j") and "R̂" not in text
    text = Estimate(2.5, 0.0, 0.0, 1.0, 10.0, float("nan")).format()
    assert text.startswith("2.5(0)")


def test_warnings_with_plain_floats():
    short = Estimate(1.0, 0.1, 1.0, tau=10.0, ess=60.0, rhat=1.2, n_time=100)
    messages = short.warnings()
    assert len(messages) == 3  # R̂ > 1.01, 100 < 50·10 (Sokal 1997), ESS < 100
    fine = Estimate(1.0, 0.1, 1.0, tau=2.0, ess=1000.0, rhat=1.001, n_time=1000)
    assert fine.warnings() == []
    unknown_length = Estimate(1.0, 0.1, 1.0, tau=2.0, ess=1000.0, rhat=float("nan"))
    assert unknown_length.warnings() == []


def test_module_exports():
    assert set(stats.__all__) >= {"Estimate", "estimate", "split_rhat", "blocking_error"}


# --------------------------------------------------------------------------- ties, short chains, arrays


def _discrete_chains(seed: int, n_time: int = 200, n_chains: int = 4) -> np.ndarray:
    """Draws of a discrete observable (values k/16, k = 0..4) along independent chains."""
    return np.random.default_rng(seed).integers(0, 5, size=(n_time, n_chains)) / 16.0


def test_rounding_noise_does_not_break_ties_in_rhat():
    # A discrete observable computed as a sum of terms carries ~1e-16 configuration-dependent
    # rounding noise; R̂ must equal that of the exact values (ties get average ranks, Vehtari
    # et al. 2021, as arviz does for the exact values) instead of ranking the noise.
    clean = _discrete_chains(30)
    noise = 1e-16 * np.random.default_rng(31).standard_normal(clean.shape)
    # make the noise drift with the chain so that ranking it would split chains apart
    noise += 2e-16 * np.arange(4)[None, :]
    noisy = clean + noise
    reference = arviz_rhat(clean)
    assert float(split_rhat(noisy)) == pytest.approx(reference, abs=1e-10)
    assert float(split_rhat(noisy)) == pytest.approx(float(split_rhat(clean)), abs=1e-12)
    # exactly what ranking the noise gives (arviz on the noisy draws): far from the truth
    assert arviz_rhat(noisy) > reference + 0.01


def test_constant_observable_with_rounding_noise_has_no_rhat_warning():
    # m² ≡ 0 in the Sz = 0 sector, computed from terms of size ~1/4 with rounding noise ~1e-17:
    # given the scale of its terms, it is constant: no R̂ (0/0), τ = 1, no R̂ warning
    noise = 1e-17 * np.random.default_rng(32).standard_normal((400, 4)) + 3e-17 * np.arange(4)
    result = estimate(noise, scale=0.25)
    assert math.isnan(float(result.rhat))
    assert float(result.tau) == 1.0
    assert not any("R̂" in message for message in result.warnings())
    assert math.isnan(float(split_rhat(np.zeros((100, 4)))))


def test_unreliable_small_tau_never_shrinks_the_error_bar():
    # 4 and 16 draws per chain: the mean-subtracted autocorrelation is biased low, and the raw
    # Sokal-window τ comes out well below 1 (0.25 at 4 draws); such a τ is flagged unreliable
    # (chain shorter than 50 τ, Sokal 1997 / common practice) and the error uses τ = 1 at least
    rng = np.random.default_rng(33)
    for n_time in (4, 16):
        values = rng.standard_normal((n_time, 64))
        raw = float(integrated_autocorrelation_time(values))
        result = estimate(values)
        naive = math.sqrt(np.var(values) / values.size)
        assert not bool(result.tau_reliable)
        assert float(result.tau) >= 1.0 and float(result.tau) >= raw
        assert float(result.error) >= naive * (1 - 1e-12)
        assert any("chain length" in m for m in result.warnings())
        assert "τ " in str(result) and "?" in str(result)
    # a long iid chain keeps its (reliable) estimate
    long = estimate(rng.standard_normal((4000, 4)))
    assert bool(long.tau_reliable)


def test_warnings_work_elementwise_on_array_estimates():
    # a vmapped estimate (correlations, structure factors) has array fields; warnings must
    # name the offending components instead of raising TypeError
    rng = np.random.default_rng(34)
    good = rng.standard_normal((2000, 4))
    stuck = np.array([-5.0, -5.0, 5.0, 5.0]) + rng.standard_normal((2000, 4))
    drifting = np.array([-1.0, -1.0, 1.0, 1.0]) + rng.standard_normal((2000, 4))
    table = np.stack([good, stuck, good, drifting], axis=2)
    est = jax.vmap(estimate, in_axes=2)(table)._replace(n_time=2000)
    messages = est.warnings()
    assert len(messages) == 1 and "R̂" in messages[0]
    assert "2 of 4 components [1, 3]" in messages[0]
    lines = str(est).splitlines()
    assert len(lines) == 4 and lines[1].startswith("1: ")
    assert est.component(1).warnings() == stuck_warnings(stuck)


def stuck_warnings(values):
    return estimate(values).warnings()


def test_format_of_zero_and_rounding_noise():
    # an exactly-zero observable must not print as 0.000000000000000 ± 0.000000000000000
    text = str(Estimate(1e-18, 3e-19, 1e-34, 1.0, 1000.0, float("nan")))
    assert text.startswith("1.00(30)e-18")
    assert str(Estimate(0.0, 0.0, 0.0, 1.0, 1000.0, float("nan"))).startswith("0(0)")
    assert "0.000000000000000" not in str(estimate(np.zeros((8, 4))))
