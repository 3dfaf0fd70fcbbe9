"""Statistics of Monte Carlo samples: means, autocorrelation-corrected errors, R̂.

Layout: every function takes ``values`` of shape ``(n_time, n_chains)`` (the blocking
analysis also a 1-D series): time along a Markov chain on the leading axis, independent chains on
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

Ties within a tolerance. Local values of discrete observables (m², a staggered magnetisation,
a correlation) carry configuration-dependent rounding noise of ~1e-16 relative size; ranking
would break ties with that noise and report a spurious R̂ (e.g. 1.07 for values that are
exactly tied). Draws are therefore ranked after merging values that differ by at most
``TIE_RTOL · scale`` (``TIE_RTOL = 1e-12``; ``scale = max(|x|)``, or a larger ``scale``
passed by the caller, e.g. the size of an operator's terms; a chain of such small gaps forms
one tie group) and all members of a group get its average rank. The folded draws use the same
merged values. A series whose spread is below that tolerance is constant: ρ = (1, 0, …),
τ = 1 and R̂ = nan (0/0), which ``Estimate.warnings`` does not flag.

Reliability of τ. τ is estimated reliably only when Sokal's window condition ``M ≥ c·τ(M)``
is met within half a chain *and* the chain holds at least ``MIN_CHAIN_OVER_TAU · max(τ, 1)``
draws (Sokal 1997; 50 τ is common practice). Otherwise ``Estimate.tau_reliable`` is False and
the error bar never uses a τ below 1 (an unreliable small τ, e.g. 0.25 from 4 draws per chain,
would shrink the error bar below the naive one): ``τ_used = max(τ, 1)``.

Blocking (Flyvbjerg & Petersen 1989), for a 1-D series or ``(n_time, n_chains)`` chains
(blocked along time, each chain separately): repeatedly average neighbouring pairs; at each
level with ``n_b`` blocks of size ``b`` the error of one chain's mean is
``sqrt(c₀/(n_b − 1))`` with ``c₀`` its biased block variance, and the error of the mean over
``m`` independent chains is ``sqrt(Σ_k err_k²)/m``, known only to within a relative
``1/sqrt(2 m (n_b − 1))``. It grows with ``b`` until blocks are uncorrelated and then stays on
a plateau.
"""

from __future__ import annotations

import functools
import math
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.special import ndtri

from psiloom._validation import boolean
from psiloom.reduce import sample_mean, sample_variance

__all__ = [
    "Estimate",
    "estimate",
    "weighted_estimate",
    "autocorrelation",
    "integrated_autocorrelation_time",
    "split_rhat",
    "effective_sample_size",
    "blocking_analysis",
    "blocking_error",
    "combine_batches",
    "TIE_RTOL",
]

# Thresholds used by Estimate.warnings.
RHAT_THRESHOLD = 1.01  # Vehtari et al. 2021
MIN_CHAIN_OVER_TAU = 50.0  # chain length ≥ 50 τ for a trustworthy τ (Sokal 1997)
MIN_ESS = 100.0  # common practice

#: Draws closer than TIE_RTOL · scale count as equal (ties in ranks; constant series).
TIE_RTOL = 1e-12

# Fewer draws per chain than this: no split-R̂ (as in Vehtari et al. 2021), τ taken as 1.
_MIN_TIME_FOR_DIAGNOSTICS = 4


def parenthesis_notation(value: float, error: float, sign: bool = False) -> str:
    """``value`` with its standard ``error`` in parenthesis notation, e.g. ``1.23456(34)``.

    The error is rounded to two significant digits and ``value`` to the same decimal place;
    the digits in parentheses count units of the last printed digit of ``value``. Errors of 1
    or more are written with their decimal point when ``value`` has one (``12.3(3.4)``).
    ``sign=True`` always prints the sign (for the imaginary part of a complex number).
    Tiny numbers (error below 1e-14 and ``|value|`` below 1e-6) switch to scientific notation
    (``1.00(30)e-18``); an error below 1e-14 of the value's leading digit prints ``(0)``, as
    does a zero error; a non-finite error prints ``(nan)`` or ``(inf)``.
    """
    plus = "+" if sign else ""
    if not math.isfinite(error) or not math.isfinite(value):
        return f"{value:{plus}.10g}({error})"
    if error == 0.0:
        return f"{value:{plus}.10g}(0)"
    if error < 1e-14 and max(abs(value), error) < 1e-6:  # tiny numbers: scientific, not buried in zeros
        exponent = math.floor(math.log10(max(abs(value), error)))
        scale = 10.0 ** exponent
        if error / scale < 1e-14:  # negligible against the value (e.g. 1e-12 ± 1e-30): no digits to show
            return f"{value:{plus}.10g}(0)"
        return f"{parenthesis_notation(value / scale, error / scale, sign)}e{exponent}"
    decimals = 1 - math.floor(math.log10(error))
    digits = round(error * 10.0 ** decimals)
    if digits >= 100:  # 0.000996 rounds to 0.0010: one decimal fewer
        decimals -= 1
        digits = round(error * 10.0 ** decimals)
    if decimals > 0:
        text = f"{value:{plus}.{decimals}f}"
        err = str(digits) if error < 1.0 else f"{digits / 10 ** decimals:.{decimals}f}"
        return f"{text}({err})"
    scale = 10.0 ** (-decimals)  # error >= 10: round value to tens, hundreds, ...
    text = f"{round(value / scale) * scale:{plus}.0f}"
    return f"{text}({round(error / scale) * scale:.0f})"


class Estimate(NamedTuple):
    """A Monte Carlo estimate of a mean with its diagnostics.

    Fields may be Python numbers or 0-d arrays (also inside ``jax.jit``), or arrays of equal
    shape for several observables at once (then ``format`` and ``warnings`` work per component).

    Attributes:
        mean: sample mean over all chains and times (complex for complex input).
        error: one standard error of the real part of the mean, autocorrelation-corrected:
            ``sqrt(var(Re v) · tau / N)``.
        variance: sample variance ``(1/N) Σ |v − v̄|²`` (real).
        tau: integrated autocorrelation time used for the error, in samples along a chain
            (1 = uncorrelated); never below 1 unless ``tau_reliable``.
        ess: effective sample size ``N / tau``.
        rhat: rank-normalized split-R̂ (nan when it cannot be computed, the series is constant,
            or it was not asked for: ``estimate(..., rhat=False)``).
        n_time: number of samples along each chain (``None`` if unknown; used only by
            ``warnings`` to judge whether the chains are long enough for ``tau``).
        tau_reliable: whether ``tau`` passed the reliability rule of the module docstring
            (Sokal's window condition and a chain of ≥ 50 τ); ``None`` if unknown.
    """

    mean: complex | float | jax.Array
    error: float | jax.Array
    variance: float | jax.Array
    tau: float | jax.Array
    ess: float | jax.Array
    rhat: float | jax.Array
    n_time: int | jax.Array | None = None
    tau_reliable: bool | jax.Array | None = None

    @property
    def shape(self) -> tuple[int, ...]:
        """Shape of the estimated quantity (``()`` for a scalar observable)."""
        return tuple(np.shape(np.asarray(self.mean)))

    def component(self, index) -> "Estimate":
        """The estimate of one component of an array estimate (``index`` into ``shape``)."""
        def pick(a):
            return a if a is None or np.ndim(a) == 0 else np.asarray(a)[index]
        return Estimate(*(pick(a) for a in self))

    def format(self) -> str:
        """One line: the value in parenthesis notation, then the diagnostics after a bar.

        E.g. ``-7.14235(34)  | var 0.012 · τ 1.8 · R̂ 1.002``. The digits in parentheses are the
        standard error in units of the last printed digit: ``1.23456(34)`` means 1.23456 ± 0.00034
        (the usual convention of the trade, e.g. CODATA tables). The error is rounded to two
        significant digits and the mean to the same decimal place; an error of 1 or more keeps
        its decimal point where the mean has none (``1234(56)``, ``12.3(3.4)``). A complex mean
        prints both parts with the same error, ``-1.2345(12)+0.0031(12)j``. Tiny numbers
        (rounding noise, e.g. of an observable that is exactly zero) switch to scientific
        notation, ``1.00(30)e-18``; a non-finite one prints ``(nan)``/``(inf)``. ``τ`` carries a ``?`` when the
        chains were too short to trust it; ``R̂`` is omitted when undefined (one chain). An
        array estimate gives one line per component, prefixed by its index.
        """
        if self.shape:
            return "\n".join(
                f"{list(i) if len(i) > 1 else i[0]}: {self.component(i).format()}"
                for i in np.ndindex(*self.shape)
            )
        mean = complex(np.asarray(self.mean))
        value = parenthesis_notation(mean.real, float(self.error))
        if mean.imag != 0.0:
            value += parenthesis_notation(mean.imag, float(self.error), sign=True) + "j"
        tau = f"τ {float(self.tau):.3g}"
        if self.tau_reliable is not None and not bool(self.tau_reliable):
            tau += "?"  # too short a chain for τ (module docstring)
        details = [f"var {float(self.variance):.2g}", tau]
        rhat = float(self.rhat)
        if not math.isnan(rhat):
            details.append(f"R̂ {rhat:.3f}")
        return f"{value}  | {' · '.join(details)}"

    def __str__(self) -> str:
        return self.format()

    def warnings(self) -> list[str]:
        """Human-readable reasons to distrust this estimate (empty list if none).

        For an array estimate each kind of problem is reported once, naming the components
        concerned (``2 of 4 components [1, 3]``, or ``(0, 1)``-style indices in 2-D) and the
        message of the first of them.
        """
        if not self.shape:
            return [message for _, message in self._scalar_warnings()]
        found: dict[str, list] = {}
        for index in np.ndindex(*self.shape):
            for kind, message in self.component(index)._scalar_warnings():
                found.setdefault(kind, []).append((index, message))
        out = []
        for entries in found.values():
            labels = [i[0] if len(i) == 1 else i for i, _ in entries]
            shown = ", ".join(str(v) for v in labels[:8]) + (", …" if len(labels) > 8 else "")
            out.append(f"{len(labels)} of {int(np.prod(self.shape))} components [{shown}]: "
                       f"{entries[0][1]} (component {labels[0]})")
        return out

    def _scalar_warnings(self) -> list[tuple[str, str]]:
        """``(kind, message)`` pairs of a scalar estimate."""
        messages: list[tuple[str, str]] = []
        rhat = float(self.rhat)
        if rhat > RHAT_THRESHOLD:  # nan compares False
            messages.append(("rhat",
                f"R̂ = {rhat:.3f} > {RHAT_THRESHOLD}: chains have not mixed "
                "(they disagree with each other or drift); the error bar is not trustworthy"
            ))
        tau = float(self.tau)
        if self.n_time is not None and math.isfinite(tau):
            n_time = float(self.n_time)
            if n_time < MIN_CHAIN_OVER_TAU * max(tau, 1.0):
                messages.append(("tau",
                    f"chain length {n_time:.0f} < {MIN_CHAIN_OVER_TAU:.0f} τ = "
                    f"{MIN_CHAIN_OVER_TAU * max(tau, 1.0):.0f}: chains too short for a reliable "
                    "autocorrelation time (the error bar uses τ ≥ 1)"
                ))
            elif self.tau_reliable is not None and not bool(self.tau_reliable):
                messages.append(("tau",
                    "autocorrelation time unreliable: Sokal's window condition M ≥ 5 τ(M) was "
                    "not met within half a chain (the error bar uses τ ≥ 1)"
                ))
        ess = float(self.ess)
        if ess < MIN_ESS:  # nan compares False
            messages.append(("ess", f"effective sample size {ess:.1f} < {MIN_ESS:.0f}"))
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


def _check_scale(scale):
    """``None`` or a non-negative scale (number or 0-d array; traced values are not checked)."""
    if scale is None or isinstance(scale, jax.core.Tracer):
        return scale
    if np.ndim(scale) != 0:
        raise ValueError(f"scale must be a single non-negative number, got shape {np.shape(scale)}")
    value = float(np.asarray(scale))
    if not value >= 0 or not math.isfinite(value):
        raise ValueError(f"scale must be a finite number >= 0, got {scale!r}")
    return scale


def _tie_tolerance(x: jax.Array, scale) -> jax.Array:
    """``TIE_RTOL · max(scale, max|x|)``: draws closer than this are treated as equal."""
    size = jnp.max(jnp.abs(x))
    if scale is not None:
        size = jnp.maximum(size, jnp.asarray(scale, dtype=x.dtype))
    return TIE_RTOL * size


def autocorrelation(values, scale=None) -> jax.Array:
    """Normalized autocorrelation ρ(t), t = 0 … n_time−1, of the real part, pooled over chains.

    Args:
        values: array of shape ``(n_time, n_chains)``.
        scale: optional size of the values' terms (module docstring, "Ties within a
            tolerance"); a series whose per-chain spread is below ``TIE_RTOL · scale`` (or
            below rounding of its largest value) counts as constant.

    Returns:
        Array of shape ``(n_time,)`` with ``ρ(0) = 1`` (all-constant input gives
        ``ρ = (1, 0, 0, …)``).
    """
    return _autocorrelation(_check_values(values), _check_scale(scale))


@jax.jit
def _autocorrelation(values: jax.Array, scale=None) -> jax.Array:
    x = _real_part(values)
    n_time = x.shape[0]
    n_fft = 1 << (2 * n_time - 1).bit_length()  # power of two ≥ 2 n_time: no wrap-around
    centred = x - sample_mean(x)[None, :]
    spectrum = jnp.fft.rfft(centred, n=n_fft, axis=0)
    acov = jnp.fft.irfft(spectrum * jnp.conj(spectrum), n=n_fft, axis=0)[:n_time] / n_time
    pooled = jnp.mean(acov, axis=1)
    c0 = pooled[0]
    # Constant chains leave only rounding noise of relative size eps after centring; values
    # equal within the tie tolerance are constant too.
    resolution = jnp.maximum(16.0 * jnp.finfo(x.dtype).eps * jnp.max(jnp.abs(x)), _tie_tolerance(x, scale))
    varies = c0 > resolution**2
    rho = pooled / jnp.where(varies, c0, 1.0)
    unit = jnp.zeros_like(rho).at[0].set(1.0)
    return jnp.where(varies, rho, unit)


def integrated_autocorrelation_time(values, c: float = 5.0, scale=None) -> jax.Array:
    """Integrated autocorrelation time τ = 1 + 2 Σ_{t=1}^{M} ρ(t) with Sokal's window.

    The window is the smallest ``M ≤ n_time // 2`` with ``M ≥ c·τ(M)`` (largest searched
    window if none qualifies). The result is floored at ``1/n_time`` so that it stays
    positive for strongly anticorrelated series. This is the raw estimate; :func:`estimate`
    also judges whether it is reliable (module docstring) before using it for an error bar.

    Args:
        values: array of shape ``(n_time, n_chains)`` (real part used).
        c: window constant (Sokal 1997 suggests 4–10).
        scale: see :func:`autocorrelation`.

    Returns:
        0-d array, τ in units of samples along a chain.
    """
    if isinstance(c, (int, float)) and not c > 0:
        raise ValueError(f"window constant c must be positive; got c={c}")
    return _integrated_autocorrelation_time(_check_values(values), c, _check_scale(scale))[0]


@jax.jit
def _integrated_autocorrelation_time(values: jax.Array, c: float | jax.Array, scale=None):
    """``(τ, window_found)``: Sokal-window τ and whether the window condition was met."""
    rho = _autocorrelation(values, scale)
    n_time = rho.shape[0]
    n_windows = n_time // 2 + 1  # windows M = 0 … n_time // 2
    taus = 2.0 * jnp.cumsum(rho[:n_windows]) - 1.0  # τ(M), using ρ(0) = 1
    windows = jnp.arange(n_windows, dtype=taus.dtype)
    ok = windows >= c * taus
    found = jnp.any(ok)
    index = jnp.where(found, jnp.argmax(ok), n_windows - 1)
    return jnp.maximum(taus[index], 1.0 / n_time), found


def effective_sample_size(values, scale=None) -> jax.Array:
    """Effective sample size ``N / τ`` with τ from ``integrated_autocorrelation_time``.

    This is the Sokal-window estimator on the raw (real) values. It is not the bulk ESS of
    Vehtari et al. 2021 (rank-normalized split chains, Geyer's initial monotone sequence),
    although both agree for well-behaved chains.
    """
    values = _check_values(values)
    n_total = values.shape[0] * values.shape[1]
    return n_total / _integrated_autocorrelation_time(values, 5.0, _check_scale(scale))[0]


def _tie_groups(flat: jax.Array, tol: jax.Array) -> tuple[jax.Array, jax.Array]:
    """``(ranks, merged)``: 1-based average ranks of ``flat`` with values whose sorted gaps are
    ≤ ``tol`` merged into one tie group, and every value replaced by its group's smallest.

    A group spans sorted positions ``first … last − 1``; ``first`` is the running maximum of
    the group starts and ``last`` the running minimum (from the right) of the group ends, so
    the average rank is ``(first + last + 1) / 2`` (two cumulative passes instead of two
    binary searches, which cost far more to compile)."""
    n = flat.shape[0]
    order = jnp.argsort(flat)
    ordered = flat[order]
    gap = jnp.diff(ordered) > tol
    starts = jnp.concatenate([jnp.ones(1, bool), gap])
    ends = jnp.concatenate([gap, jnp.ones(1, bool)])
    index = jnp.arange(n)
    first = jax.lax.cummax(jnp.where(starts, index, 0))
    last = jax.lax.cummin(jnp.where(ends, index + 1, n), reverse=True)
    avg = (first + last + 1).astype(flat.dtype) / 2.0
    ranks = jnp.zeros_like(flat).at[order].set(avg)
    merged = jnp.zeros_like(flat).at[order].set(ordered[first])
    return ranks, merged


def _normal_scores(draws: jax.Array, tol: jax.Array) -> tuple[jax.Array, jax.Array]:
    """Rank-normalize all draws jointly, Φ⁻¹((r − 3/8)/(S + 1/4)), with ties within ``tol``;
    also return the draws with tie groups merged."""
    flat = draws.reshape(-1)
    ranks, merged = _tie_groups(flat, tol)
    scores = ndtri((ranks - 0.375) / (flat.shape[0] + 0.25))
    return scores.reshape(draws.shape), merged.reshape(draws.shape)


def _rhat_of_chains(draws: jax.Array) -> jax.Array:
    """Classic R̂ of draws with shape (n, m): n draws in each of m chains."""
    n = draws.shape[0]
    chain_means = sample_mean(draws)
    within = sample_mean(sample_variance(draws) * n / (n - 1))
    m = chain_means.shape[0]
    between = n * sample_variance(chain_means) * m / (m - 1)
    # identical draws give variances of pure rounding (the mean of equal numbers is not always
    # exactly that number): count them as zero, so that constant input is 0/0 = nan and chains
    # frozen at different values are b/0 = inf
    resolution = (64.0 * jnp.finfo(draws.dtype).eps * jnp.max(jnp.abs(draws))) ** 2
    within = jnp.where(within > resolution, within, 0.0)
    between = jnp.where(between > n * resolution, between, 0.0)
    return jnp.sqrt((between / within + n - 1) / n)


def split_rhat(values, scale=None) -> jax.Array:
    """Rank-normalized split-R̂ (Vehtari et al. 2021): max of the bulk and folded R̂.

    A single chain is split into its two halves, which then act as two chains. Draws equal
    within ``TIE_RTOL · max(scale, max|x|)`` rank as ties (module docstring). Returns nan for
    fewer than 4 samples per chain, and nan (0/0) for constant input.

    Args:
        values: array of shape ``(n_time, n_chains)`` (real part used).
        scale: optional size of the values' terms (see module docstring).

    Returns:
        0-d array.
    """
    return _split_rhat(_check_values(values), _check_scale(scale))


@jax.jit
def _split_rhat(values: jax.Array, scale=None) -> jax.Array:
    x = _real_part(values)
    n_time = x.shape[0]
    if n_time < _MIN_TIME_FOR_DIAGNOSTICS:
        return jnp.asarray(jnp.nan, dtype=x.dtype)
    tol = _tie_tolerance(x, scale)
    half = n_time // 2
    split = jnp.concatenate([x[:half], x[n_time - half :]], axis=1)
    bulk_scores, merged = _normal_scores(split, tol)
    ordered = jnp.sort(merged.reshape(-1))
    size = ordered.shape[0]
    median = 0.5 * (ordered[(size - 1) // 2] + ordered[size // 2])
    bulk = _rhat_of_chains(bulk_scores)
    folded = _rhat_of_chains(_normal_scores(jnp.abs(merged - median), tol)[0])
    # fmax: chains frozen in different modes give bulk = inf and folded = 0/0 = nan; keep the inf
    return jnp.fmax(bulk, folded)


def estimate(values, scale=None, rhat: bool = True) -> Estimate:
    """Mean, autocorrelation-corrected error and diagnostics of ``(n_time, n_chains)`` samples.

    Works inside ``jax.jit``. For ``n_time < 4`` there is too little data for
    diagnostics: ``tau = 1`` (flagged unreliable) and ``rhat = nan``. An unreliable τ below 1
    is raised to 1 (module docstring), so the error bar is never smaller than the naive
    ``sqrt(var/N)`` unless the chains are long enough to trust the anticorrelation.

    Args:
        values: ``(n_time, n_chains)`` samples.
        scale: optional size of the terms the values were summed from (e.g. Σ|c_t| of an
            operator): values equal within ``TIE_RTOL · max(scale, max|x|)`` are ties for R̂
            and a series varying less than that is constant (module docstring).
        rhat: ``False`` skips split-R̂ (``rhat = nan``). Its two rank normalizations (sorts and
            Φ⁻¹) are most of this function's compile time (~1 s of ~1.2 s on a 2-core CPU).
    """
    return _estimate(_check_values(values), _check_scale(scale), boolean("rhat", rhat))


@functools.partial(jax.jit, static_argnames=("rhat",))
def _estimate(values: jax.Array, scale=None, rhat: bool = True) -> Estimate:
    n_time, n_chains = values.shape
    n_total = n_time * n_chains
    flat = values.reshape(-1)
    x = _real_part(values)
    real_dtype = x.dtype
    if n_time < _MIN_TIME_FOR_DIAGNOSTICS:
        tau = jnp.asarray(1.0, dtype=real_dtype)
        r_hat = jnp.asarray(jnp.nan, dtype=real_dtype)
        reliable = jnp.asarray(False)
    else:
        raw_tau, found = _integrated_autocorrelation_time(x, 5.0, scale)
        reliable = found & (n_time >= MIN_CHAIN_OVER_TAU * jnp.maximum(raw_tau, 1.0))
        tau = jnp.where(reliable, raw_tau, jnp.maximum(raw_tau, 1.0))
        r_hat = _split_rhat(x, scale) if rhat else jnp.asarray(jnp.nan, dtype=real_dtype)
    real_variance = sample_variance(x.reshape(-1))
    return Estimate(
        mean=sample_mean(flat),
        error=jnp.sqrt(real_variance * tau / n_total),
        variance=sample_variance(flat),
        tau=tau,
        ess=n_total / tau,
        rhat=r_hat,
        n_time=n_time,
        tau_reliable=reliable,
    )


def weighted_estimate(values, weights) -> Estimate:
    """The exact average Σ_k w_k v_k of values ``v`` with probabilities ``w`` (same shape, summing
    to 1), e.g. Born weights over an enumerated space (:mod:`psiloom.sampling.enumeration`).

    No sampling noise: ``error = 0``, ``tau = 1``, ``ess = inf``, ``rhat = nan``; ``variance`` is
    Σ_k w_k |v_k − v̄|². Works inside ``jax.jit``.
    """
    v = jnp.asarray(values).reshape(-1)
    w = jnp.asarray(weights).reshape(-1)
    mean = jnp.sum(w * v)
    real_dtype = jnp.real(v).dtype
    return Estimate(mean=mean, error=jnp.zeros((), real_dtype),
                    variance=jnp.sum(w * jnp.abs(v - mean) ** 2), tau=jnp.ones((), real_dtype),
                    ess=jnp.asarray(jnp.inf, real_dtype), rhat=jnp.asarray(jnp.nan, real_dtype),
                    n_time=v.shape[0], tau_reliable=jnp.asarray(True))


def combine_batches(estimates: Estimate) -> Estimate:
    """One estimate from the estimates of ``K`` consecutive, independent batches (host NumPy).

    ``estimates`` holds ``K`` batch estimates stacked along a leading axis (e.g. the energies of
    the steps of an evaluation pass, each over ``n_time`` sweeps of every chain). With
    ``N_k = ess_k · τ_k`` samples in batch k and ``N = Σ N_k``:

        mean = Σ N_k m_k / N,      variance = Σ N_k (s²_k + |m_k − mean|²) / N,
        error = sqrt(Σ N_k² σ_k²) / N      (σ_k the batch's τ-corrected error),

    the error of a weighted mean of independent batches. Batches that continue the same chains
    are correlated only across their boundaries, by O(τ / n_time): negligible for batches many
    τ long. ``tau = error² N / variance`` (so ``ess = N / tau``), ``n_time = Σ n_time_k``;
    ``tau_reliable`` holds when every batch is at least 10 τ long and all of them together 50 τ
    (common practice, as ``MIN_CHAIN_OVER_TAU``). ``rhat`` is nan: the batches' own split-R̂
    compare chains over one short batch each and are biased upwards by autocorrelation
    (≈ 1 + τ/n_time; measured 1.02 on mixed chains of 32-sample batches), and the chains' means over
    the whole pass, which R̂ needs, are not in the batch estimates.
    """
    means = np.asarray(estimates.mean)
    if means.ndim != 1 or means.size == 0:
        raise ValueError(f"combine_batches needs estimates stacked along one leading axis, got mean of shape "
                         f"{means.shape}")
    errors = np.asarray(estimates.error, dtype=float)
    variances = np.asarray(estimates.variance, dtype=float)
    counts = np.asarray(estimates.ess, dtype=float) * np.asarray(estimates.tau, dtype=float)
    total = float(np.sum(counts))
    mean = np.sum(counts * means) / total
    variance = float(np.sum(counts * (variances + np.abs(means - mean) ** 2)) / total)
    error = float(np.sqrt(np.sum(counts ** 2 * errors ** 2)) / total)
    tau = error ** 2 * total / variance if variance > 0 else 1.0
    n_time = np.asarray(estimates.n_time if estimates.n_time is not None else np.zeros_like(errors))
    reliable = bool(np.all(n_time >= 10.0 * tau) and np.sum(n_time) >= MIN_CHAIN_OVER_TAU * tau)
    mean = complex(mean) if np.iscomplexobj(mean) else float(np.real(mean))
    return Estimate(mean=mean, error=error, variance=variance, tau=float(tau), ess=total / tau, rhat=float("nan"),
                    n_time=int(np.sum(n_time)), tau_reliable=reliable)


def blocking_analysis(values) -> tuple[np.ndarray, np.ndarray]:
    """Flyvbjerg–Petersen blocking of a 1-D series or ``(n_time, n_chains)`` chains (host NumPy).

    Args:
        values: 1-D series, or chains with time on the leading axis (blocked along time, each
            chain separately; chains are independent), with at least 2 samples per chain
            (real part used).

    Returns:
        ``(block_sizes, errors)``: block size ``2**k`` and the error of the overall mean at
        each level ``k`` with ``n_b ≥ 2`` blocks per chain: ``sqrt(c₀/(n_b − 1))`` for one
        series, ``sqrt(Σ_k c₀_k/(n_b − 1))/m`` for ``m`` chains.
    """
    x = _blocking_input(values)
    block_sizes: list[int] = []
    errors: list[float] = []
    size = 1
    m = x.shape[1]
    while x.shape[0] >= 2:
        n_blocks = x.shape[0]
        errors.append(math.sqrt(float(np.sum(np.var(x, axis=0))) / (n_blocks - 1)) / m)
        block_sizes.append(size)
        paired = x[: 2 * (n_blocks // 2)]
        x = 0.5 * (paired[0::2] + paired[1::2])
        size *= 2
    return np.asarray(block_sizes, dtype=int), np.asarray(errors, dtype=float)


def _blocking_input(values) -> np.ndarray:
    x = np.real(np.asarray(values)).astype(float)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise ValueError(
            f"values must be a 1-D series or have shape (n_time, n_chains); got ndim={x.ndim}, "
            f"shape {np.shape(values)}"
        )
    if x.shape[0] < 2 or x.shape[1] < 1:
        raise ValueError(f"values must hold at least 2 samples per chain; got shape {np.shape(values)}")
    return x


def blocking_error(values) -> float:
    """Error of the mean from the plateau of the blocking analysis (1-D or ``(n_time, n_chains)``).

    The plateau is the first level ``k`` whose error is not exceeded by that of level
    ``k + 1`` by more than its own uncertainty ``errors[k] / sqrt(2 m (n_b − 1))``
    (Flyvbjerg & Petersen 1989; ``m`` chains). If the errors never level off, the series is
    too short to resolve its correlations and the largest error found is returned.
    """
    block_sizes, errors = blocking_analysis(values)
    x = _blocking_input(values)
    n_samples, m = x.shape
    n_blocks = n_samples // block_sizes
    uncertainty = errors / np.sqrt(2.0 * m * (n_blocks - 1))
    for k in range(len(errors) - 1):
        if errors[k + 1] <= errors[k] + uncertainty[k]:
            return float(errors[k])
    return float(np.max(errors))
