"""Statistics of Monte Carlo samples: means, autocorrelation-corrected errors, R̂.

Layout: every function (except the blocking analysis) takes ``values`` of shape
``(n_time, n_chains)``: time along a Markov chain on the leading axis, independent chains on
the second. Write ``N = n_time * n_chains`` for the total number of samples and ``x`` for
the real part of ``values`` (autocorrelation times and R̂ always use the real part).

Formulas
--------
Mean and variance over all samples (``psiloom.reduce`` conventions)::

    v̄ = (1/N) Σ v,        σ² = (1/N) Σ |v − v̄|²

Autocorrelation, per chain ``k`` with its own mean ``x̄_k``, pooled over chains and estimated
by a zero-padded FFT::

    C_k(t) = (1/n_time) Σ_{s=0}^{n_time−1−t} (x_{s,k} − x̄_k)(x_{s+t,k} − x̄_k)
    ρ(t)   = Σ_k C_k(t) / Σ_k C_k(0)

Integrated autocorrelation time (τ = 1 for uncorrelated samples) with Sokal's automatic
window (Sokal 1997)::

    τ(M) = 1 + 2 Σ_{t=1}^{M} ρ(t),     τ = τ(M*),   M* = min{M : M ≥ c·τ(M)}

Windows longer than half a chain are not searched: the mean-subtracted estimator obeys
``Σ_{t=−(n−1)}^{n−1} C(t) = 0``, so ``τ(M) → 0`` as ``M → n − 1`` and a long window would
silently report a tiny τ for a chain that is far too short. If no window qualifies, the
largest searched window is used; then ``n_time < 2c·τ`` and ``Estimate.warnings`` flags it.

Standard error and effective sample size::

    error = sqrt(var(Re v) · τ / N),      ess = N / τ

Rank-normalized split-R̂ (Vehtari et al. 2021): split every chain into halves (the middle
draw of an odd chain is dropped), giving ``m`` chains of ``n`` draws; replace draws by normal
scores ``z = Φ⁻¹((r − 3/8)/(S + 1/4))`` of their average ranks ``r`` among all ``S = m·n``
draws; with ``W`` the mean within-chain variance (ddof 1) and ``B = n · var(chain means)``
(ddof 1)::

    R̂(z) = sqrt((n − 1)/n + B/(n·W))

and ``split_rhat = max(R̂(z(x)), R̂(z(|x − median x|)))`` (bulk and folded draws).

Blocking (Flyvbjerg & Petersen 1989), for a 1-D series: repeatedly average neighbouring
pairs; at each level with ``n_b`` blocks of size ``b`` the error of the mean is
``sqrt(c₀/(n_b − 1))`` with ``c₀`` the biased block variance, known only to within a
relative ``1/sqrt(2(n_b − 1))``. It grows with ``b`` until blocks are uncorrelated and then
stays on a plateau.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.special import ndtri

from psiloom.reduce import sample_mean, sample_variance

__all__ = [
    "Estimate",
    "estimate",
    "autocorrelation",
    "integrated_autocorrelation_time",
    "split_rhat",
    "effective_sample_size",
    "blocking_analysis",
    "blocking_error",
]

# Thresholds used by Estimate.warnings.
RHAT_THRESHOLD = 1.01  # Vehtari et al. 2021
MIN_CHAIN_OVER_TAU = 50.0  # chain length ≥ 50 τ for a trustworthy τ (Sokal 1997)
MIN_ESS = 100.0  # common practice

# Fewer draws per chain than this: no split-R̂ (as in Vehtari et al. 2021), τ taken as 1.
_MIN_TIME_FOR_DIAGNOSTICS = 4


class Estimate(NamedTuple):
    """A Monte Carlo estimate of a mean with its diagnostics.

    Fields may be Python numbers or 0-d arrays (also inside ``jax.jit``).

    Attributes:
        mean: sample mean over all chains and times (complex for complex input).
        error: one standard error of the real part of the mean, autocorrelation-corrected.
        variance: sample variance ``(1/N) Σ |v − v̄|²`` (real).
        tau: integrated autocorrelation time, in samples along a chain (1 = uncorrelated).
        ess: effective sample size ``N / tau``.
        rhat: rank-normalized split-R̂ (nan when it cannot be computed).
        n_time: number of samples along each chain (``None`` if unknown; used only by
            ``warnings`` to judge whether the chains are long enough for ``tau``).
    """

    mean: complex | float | jax.Array
    error: float | jax.Array
    variance: float | jax.Array
    tau: float | jax.Array
    ess: float | jax.Array
    rhat: float | jax.Array
    n_time: int | jax.Array | None = None

    def format(self) -> str:
        """Compact one-line form, e.g. ``-7.14235 ± 0.00034  [σ²=0.012 τ=1.8 R̂=1.002]``.

        The mean is printed to the decimal place of the second significant digit of the error.
        """
        mean = complex(np.asarray(self.mean))
        error = float(self.error)
        if math.isfinite(error) and error > 0.0:
            decimals = min(15, max(0, 1 - math.floor(math.log10(error))))
            real_str = f"{mean.real:.{decimals}f}"
            imag_str = f"{mean.imag:+.{decimals}f}j"
            error_str = f"{error:.{decimals}f}"
        else:
            real_str = f"{mean.real:.8g}"
            imag_str = f"{mean.imag:+.8g}j"
            error_str = f"{error:.2g}"
        mean_str = real_str + (imag_str if mean.imag != 0.0 else "")
        details = [f"σ²={float(self.variance):.2g}", f"τ={float(self.tau):.3g}"]
        rhat = float(self.rhat)
        if not math.isnan(rhat):
            details.append(f"R̂={rhat:.3f}")
        return f"{mean_str} ± {error_str}  [{' '.join(details)}]"

    def __str__(self) -> str:
        return self.format()

    def warnings(self) -> list[str]:
        """Human-readable reasons to distrust this estimate (empty list if none)."""
        messages: list[str] = []
        rhat = float(self.rhat)
        if rhat > RHAT_THRESHOLD:  # nan compares False
            messages.append(
                f"R̂ = {rhat:.3f} > {RHAT_THRESHOLD}: chains have not mixed "
                "(they disagree with each other or drift); the error bar is not trustworthy"
            )
        tau = float(self.tau)
        if self.n_time is not None and math.isfinite(tau):
            n_time = float(self.n_time)
            if n_time < MIN_CHAIN_OVER_TAU * tau:
                messages.append(
                    f"chain length {n_time:.0f} < {MIN_CHAIN_OVER_TAU:.0f} τ = "
                    f"{MIN_CHAIN_OVER_TAU * tau:.0f}: chains too short for a reliable "
                    "autocorrelation time"
                )
        ess = float(self.ess)
        if ess < MIN_ESS:  # nan compares False
            messages.append(f"effective sample size {ess:.1f} < {MIN_ESS:.0f}")
        return messages


def _check_values(values) -> jax.Array:
    """Validate a ``(n_time, n_chains)`` batch (static shape checks only) and return it."""
    values = jnp.asarray(values)
    if values.ndim != 2:
        raise ValueError(
            f"values must have shape (n_time, n_chains); got ndim={values.ndim}, "
            f"shape {values.shape}"
        )
    if values.shape[0] < 1 or values.shape[1] < 1:
        raise ValueError(
            f"values must hold at least one sample and one chain; got shape {values.shape}"
        )
    if not jnp.issubdtype(values.dtype, jnp.inexact):
        values = values.astype(jnp.result_type(float))
    return values


def _real_part(values: jax.Array) -> jax.Array:
    return jnp.real(values) if jnp.iscomplexobj(values) else values


def autocorrelation(values) -> jax.Array:
    """Normalized autocorrelation ρ(t), t = 0 … n_time−1, of the real part, pooled over chains.

    Args:
        values: array of shape ``(n_time, n_chains)``.

    Returns:
        Array of shape ``(n_time,)`` with ``ρ(0) = 1`` (all-constant input gives
        ``ρ = (1, 0, 0, …)``).
    """
    return _autocorrelation(_check_values(values))


@jax.jit
def _autocorrelation(values: jax.Array) -> jax.Array:
    x = _real_part(values)
    n_time = x.shape[0]
    n_fft = 1 << (2 * n_time - 1).bit_length()  # power of two ≥ 2 n_time: no wrap-around
    centred = x - sample_mean(x)[None, :]
    spectrum = jnp.fft.rfft(centred, n=n_fft, axis=0)
    acov = jnp.fft.irfft(spectrum * jnp.conj(spectrum), n=n_fft, axis=0)[:n_time] / n_time
    pooled = jnp.mean(acov, axis=1)
    c0 = pooled[0]
    # Constant chains leave only rounding noise of relative size eps after centring.
    resolution = 16.0 * jnp.finfo(x.dtype).eps * jnp.max(jnp.abs(x))
    varies = c0 > resolution**2
    rho = pooled / jnp.where(varies, c0, 1.0)
    unit = jnp.zeros_like(rho).at[0].set(1.0)
    return jnp.where(varies, rho, unit)


def integrated_autocorrelation_time(values, c: float = 5.0) -> jax.Array:
    """Integrated autocorrelation time τ = 1 + 2 Σ_{t=1}^{M} ρ(t) with Sokal's window.

    The window is the smallest ``M ≤ n_time // 2`` with ``M ≥ c·τ(M)`` (largest searched
    window if none qualifies). The result is floored at ``1/n_time`` so that it stays
    positive for strongly anticorrelated series.

    Args:
        values: array of shape ``(n_time, n_chains)`` (real part used).
        c: window constant (Sokal 1997 suggests 4–10).

    Returns:
        0-d array, τ in units of samples along a chain.
    """
    if isinstance(c, (int, float)) and not c > 0:
        raise ValueError(f"window constant c must be positive; got c={c}")
    return _integrated_autocorrelation_time(_check_values(values), c)


@jax.jit
def _integrated_autocorrelation_time(values: jax.Array, c: float | jax.Array) -> jax.Array:
    rho = _autocorrelation(values)
    n_time = rho.shape[0]
    n_windows = n_time // 2 + 1  # windows M = 0 … n_time // 2
    taus = 2.0 * jnp.cumsum(rho[:n_windows]) - 1.0  # τ(M), using ρ(0) = 1
    windows = jnp.arange(n_windows, dtype=taus.dtype)
    ok = windows >= c * taus
    index = jnp.where(jnp.any(ok), jnp.argmax(ok), n_windows - 1)
    return jnp.maximum(taus[index], 1.0 / n_time)


def effective_sample_size(values) -> jax.Array:
    """Effective sample size ``N / τ`` with τ from ``integrated_autocorrelation_time``.

    This is the Sokal-window estimator on the raw (real) values. It is not the bulk ESS of
    Vehtari et al. 2021 (rank-normalized split chains, Geyer's initial monotone sequence),
    although both agree for well-behaved chains.
    """
    values = _check_values(values)
    n_total = values.shape[0] * values.shape[1]
    return n_total / _integrated_autocorrelation_time(values, 5.0)


def _average_ranks(flat: jax.Array, ordered: jax.Array) -> jax.Array:
    """1-based ranks of ``flat`` (``ordered`` is its sorted copy); ties get their average rank."""
    left = jnp.searchsorted(ordered, flat, side="left")
    right = jnp.searchsorted(ordered, flat, side="right")
    return (left + right + 1).astype(flat.dtype) / 2.0


def _normal_scores(draws: jax.Array, ordered: jax.Array | None = None) -> jax.Array:
    """Rank-normalize all draws jointly: Φ⁻¹((r − 3/8)/(S + 1/4))."""
    flat = draws.reshape(-1)
    if ordered is None:
        ordered = jnp.sort(flat)
    ranks = _average_ranks(flat, ordered)
    return ndtri((ranks - 0.375) / (flat.shape[0] + 0.25)).reshape(draws.shape)


def _rhat_of_chains(draws: jax.Array) -> jax.Array:
    """Classic R̂ of draws with shape (n, m): n draws in each of m chains."""
    n = draws.shape[0]
    chain_means = sample_mean(draws)
    within = sample_mean(sample_variance(draws) * n / (n - 1))
    m = chain_means.shape[0]
    between = n * sample_variance(chain_means) * m / (m - 1)
    return jnp.sqrt((between / within + n - 1) / n)


def split_rhat(values) -> jax.Array:
    """Rank-normalized split-R̂ (Vehtari et al. 2021): max of the bulk and folded R̂.

    A single chain is split into its two halves, which then act as two chains. Returns nan
    for fewer than 4 samples per chain, and nan (0/0) for constant input.

    Args:
        values: array of shape ``(n_time, n_chains)`` (real part used).

    Returns:
        0-d array.
    """
    return _split_rhat(_check_values(values))


@jax.jit
def _split_rhat(values: jax.Array) -> jax.Array:
    x = _real_part(values)
    n_time = x.shape[0]
    if n_time < _MIN_TIME_FOR_DIAGNOSTICS:
        return jnp.asarray(jnp.nan, dtype=x.dtype)
    half = n_time // 2
    split = jnp.concatenate([x[:half], x[n_time - half :]], axis=1)
    ordered = jnp.sort(split.reshape(-1))
    size = ordered.shape[0]
    median = 0.5 * (ordered[(size - 1) // 2] + ordered[size // 2])
    bulk = _rhat_of_chains(_normal_scores(split, ordered))
    folded = _rhat_of_chains(_normal_scores(jnp.abs(split - median)))
    # fmax: chains frozen in different modes give bulk = inf and folded = 0/0 = nan; keep the inf
    return jnp.fmax(bulk, folded)


def estimate(values) -> Estimate:
    """Mean, autocorrelation-corrected error and diagnostics of ``(n_time, n_chains)`` samples.

    Works inside ``jax.jit``. For ``n_time < 4`` there is too little data for
    diagnostics: ``tau = 1`` and ``rhat = nan``.
    """
    return _estimate(_check_values(values))


@jax.jit
def _estimate(values: jax.Array) -> Estimate:
    n_time, n_chains = values.shape
    n_total = n_time * n_chains
    flat = values.reshape(-1)
    x = _real_part(values)
    real_dtype = x.dtype
    if n_time < _MIN_TIME_FOR_DIAGNOSTICS:
        tau = jnp.asarray(1.0, dtype=real_dtype)
        rhat = jnp.asarray(jnp.nan, dtype=real_dtype)
    else:
        tau = _integrated_autocorrelation_time(x, 5.0)
        rhat = _split_rhat(x)
    real_variance = sample_variance(x.reshape(-1))
    return Estimate(
        mean=sample_mean(flat),
        error=jnp.sqrt(real_variance * tau / n_total),
        variance=sample_variance(flat),
        tau=tau,
        ess=n_total / tau,
        rhat=rhat,
        n_time=n_time,
    )


def blocking_analysis(values) -> tuple[np.ndarray, np.ndarray]:
    """Flyvbjerg–Petersen blocking of a 1-D series (host-side NumPy).

    Args:
        values: 1-D series of at least 2 samples (real part used).

    Returns:
        ``(block_sizes, errors)``: block size ``2**k`` and the error of the mean
        ``sqrt(c₀/(n_b − 1))`` at each level ``k`` with ``n_b ≥ 2`` blocks.
    """
    x = np.real(np.asarray(values)).astype(float)
    if x.ndim != 1:
        raise ValueError(f"values must be a 1-D series; got ndim={x.ndim}, shape {x.shape}")
    if x.shape[0] < 2:
        raise ValueError(f"values must hold at least 2 samples; got shape {x.shape}")
    block_sizes: list[int] = []
    errors: list[float] = []
    size = 1
    while x.shape[0] >= 2:
        n_blocks = x.shape[0]
        errors.append(math.sqrt(np.var(x) / (n_blocks - 1)))
        block_sizes.append(size)
        paired = x[: 2 * (n_blocks // 2)]
        x = 0.5 * (paired[0::2] + paired[1::2])
        size *= 2
    return np.asarray(block_sizes, dtype=int), np.asarray(errors, dtype=float)


def blocking_error(values) -> float:
    """Error of the mean of a 1-D series from the plateau of the blocking analysis.

    The plateau is the first level ``k`` whose error is not exceeded by that of level
    ``k + 1`` by more than its own uncertainty ``errors[k] / sqrt(2 (n_b − 1))``
    (Flyvbjerg & Petersen 1989). If the errors never level off, the series is too short to
    resolve its correlations and the largest error found is returned.
    """
    block_sizes, errors = blocking_analysis(values)
    n_samples = int(np.asarray(values).shape[0])
    n_blocks = n_samples // block_sizes
    uncertainty = errors / np.sqrt(2.0 * (n_blocks - 1))
    for k in range(len(errors) - 1):
        if errors[k + 1] <= errors[k] + uncertainty[k]:
            return float(errors[k])
    return float(np.max(errors))
