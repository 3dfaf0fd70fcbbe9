"""An autoregressive trial state: |ψ|² is a product of normalised conditionals.

By the chain rule of probability any distribution over ``x ∈ {±1}^N`` factorises as
p(x) = Π_i p(x_i | x_<i). :class:`ChainRuleState` models each conditional directly,

    p(x_i = +1 | x_<i) = σ(ℓ_i(x_<i)),        σ(z) = 1 / (1 + e^{−z}),
    log ψ(x) = ½ log p(x)  (+ i φ(x) with the optional phase),

so Σ_x |ψ(x)|² = 1 holds by construction and configurations can be drawn exactly, one site
after the other, without a Markov chain (autoregressive trial states for VMC: Sharir, Levine,
Wies, Carleo & Shashua, PRL 124, 020503 (2020), from memory).

The logit of site i reads only the sites before it, through a strictly lower-triangular
("causal") summary of our own design with ``d = features`` hidden units per site:

    ℓ_i = c_i + Σ_{j<i} D_ij x_j + Σ_{a=1}^{d} r_ia tanh(g_ia + Σ_{j<i} V_ija x_j)

(a direct linear term D plus a one-layer network per site). Drawing x_k adds x_k·D_{·k} and
x_k·V_{·k·} to the pre-activations of all later sites, so a draw of all N sites costs
O(N² d) per sample.

Fixed magnetisation (``magnetisation``, with ``n_up = N/2 + magnetisation``): with u_i up spins among
x_<i and N − i sites left (site i included), site i is forced down when u_i = n_up and forced
up when n_up − u_i = N − i; otherwise the network's conditional is used. Every conditional
stays normalised and p vanishes outside the sector (log ψ = −∞ there), so Σ_{x ∈ sector} p = 1.

Optional phase (``phase_features = P > 0``): φ(x) = Σ_{b=1}^{P} w_b tanh(e_b + Σ_i U_ib x_i),
a function of the whole configuration; it does not affect p.
"""

from __future__ import annotations

from typing import Any

import flax.linen as nn
import jax
import jax.numpy as jnp

from psiloom._validation import finite_real, nonnegative_int, positive_int
from psiloom.states.base import TrialState, normal_init, default_real_dtype


def _causal_mask(n: int, dtype) -> jax.Array:
    """M_ij = 1 for j < i (site i may read site j), else 0."""
    return jnp.tril(jnp.ones((n, n), dtype), k=-1)


def conditional_logits(params, x: jax.Array) -> jax.Array:
    """ℓ_i(x_<i) for a batch ``x`` (B, N): ``(B, N)``; column i never depends on x_j, j ≥ i."""
    n = params["site_bias"].shape[0]
    dtype = params["site_bias"].dtype
    mask = _causal_mask(n, dtype)
    xc = x.astype(dtype)
    linear = xc @ (params["direct"] * mask).T  # (B, N)
    pre = jnp.einsum("bj,ija->bia", xc, params["mix"] * mask[:, :, None]) + params["hidden_bias"]
    return params["site_bias"] + linear + jnp.einsum("bia,ia->bi", jnp.tanh(pre), params["readout"])


def _check_n_up(n: int, magnetisation) -> int | None:
    if magnetisation is None:
        return None
    magnetisation = finite_real("magnetisation", magnetisation)
    n_up = n / 2 + magnetisation
    if abs(n_up - round(n_up)) > 1e-12 or not 0 <= round(n_up) <= n:
        raise ValueError(f"magnetisation={magnetisation!r} is impossible for {n} sites")
    return int(round(n_up))


def log_conditionals(logits: jax.Array, x: jax.Array, n_up: int | None) -> jax.Array:
    """log p(x_i | x_<i) for every site, ``(B, N)``, with the sector masking when ``n_up`` is set."""
    s = jnp.where(x > 0, 1.0, -1.0).astype(logits.dtype)
    free = jax.nn.log_sigmoid(s * logits)
    if n_up is None:
        return free
    n = x.shape[-1]
    up = (x > 0).astype(jnp.int32)
    ups_before = jnp.cumsum(up, axis=-1) - up
    need = n_up - ups_before
    remaining = n - jnp.arange(n)
    forced_down = need <= 0
    forced_up = need >= remaining
    log_zero = jnp.asarray(-jnp.inf, logits.dtype)
    out = jnp.where(forced_down, jnp.where(s < 0, 0.0, log_zero), free)
    return jnp.where(forced_up & ~forced_down, jnp.where(s > 0, 0.0, log_zero), out)


def draw(params, key: jax.Array, n_samples: int, n_up: int | None, dtype) -> jax.Array:
    """Exact samples ``(n_samples, N)`` of p(x) = Π_i p(x_i | x_<i), site by site."""
    n = params["site_bias"].shape[0]
    pdt = params["site_bias"].dtype
    mask = _causal_mask(n, pdt)
    direct = params["direct"] * mask  # D_ij, j < i
    mix = params["mix"] * mask[:, :, None]  # V_ija, j < i
    d = mix.shape[-1]

    def body(k, carry):
        x, linear, pre, ups = carry
        logit = params["site_bias"][k] + linear[:, k] + jnp.tanh(pre[:, k, :] + params["hidden_bias"][k]) @ params["readout"][k]
        p_up = jax.nn.sigmoid(logit)
        if n_up is not None:
            need = n_up - ups
            p_up = jnp.where(need <= 0, 0.0, jnp.where(need >= n - k, 1.0, p_up))
        u = jax.random.uniform(jax.random.fold_in(key, k), (n_samples,), dtype=pdt)
        up = u < p_up
        s = jnp.where(up, 1.0, -1.0).astype(pdt)
        x = x.at[:, k].set(s.astype(dtype))
        linear = linear + s[:, None] * direct[:, k][None, :]
        pre = pre + s[:, None, None] * mix[:, k, :][None, :, :]
        return x, linear, pre, ups + up.astype(jnp.int32)

    init = (jnp.zeros((n_samples, n), dtype), jnp.zeros((n_samples, n), pdt), jnp.zeros((n_samples, n, d), pdt),
            jnp.zeros((n_samples,), jnp.int32))
    return jax.lax.fori_loop(0, n, body, init)[0]


class ChainRuleState(TrialState):
    """Autoregressive trial state with exactly normalised conditionals (see module docstring).

    Attributes:
        features: hidden units per site in the causal summary (d ≥ 0; 0 leaves only the
            direct linear term).
        magnetisation: restrict to the sector of fixed Sᶻ_tot = ½ Σ x_i (None: all 2^N states).
        phase_features: width P of the phase network (0: ψ real and positive).
        init_scale: standard deviation of the Gaussian initial weights (small values start
            close to the uniform distribution).
        param_dtype: parameter dtype (default float64 with x64 enabled, else float32).

    Besides ``log ψ``, bound instances offer ``sample(key, n_samples)`` (exact draws, used by
    :class:`psiloom.sampling.ChainRuleSampler`), ``log_probability(x)`` and ``logits(x)``.
    """

    features: int = 4
    magnetisation: float | None = None
    phase_features: int = 0
    init_scale: float = 0.1
    param_dtype: Any = None

    def _check(self):
        for name in ("features", "phase_features"):
            nonnegative_int(name, getattr(self, name))
        finite_real("init_scale", self.init_scale, minimum=0.0)

    @nn.compact
    def log_amplitude(self, x):
        self._check()
        n = x.shape[-1]
        n_up = _check_n_up(n, self.magnetisation)
        dtype = self.param_dtype or default_real_dtype()
        init = normal_init(self.init_scale)
        d = int(self.features)
        params = {
            "site_bias": self.param("site_bias", init, (n,), dtype),
            "direct": self.param("direct", init, (n, n), dtype),
            "mix": self.param("mix", init, (n, n, d), dtype),
            "hidden_bias": self.param("hidden_bias", init, (n, d), dtype),
            "readout": self.param("readout", init, (n, d), dtype),
        }
        log_p = jnp.sum(log_conditionals(conditional_logits(params, x), x, n_up), axis=-1)
        out = 0.5 * log_p
        if self.phase_features:
            p = int(self.phase_features)
            u = self.param("phase_kernel", init, (n, p), dtype)
            e = self.param("phase_bias", init, (p,), dtype)
            w = self.param("phase_readout", init, (p,), dtype)
            phase = jnp.tanh(x.astype(dtype) @ u + e) @ w
            out = out + 1j * phase
        return out

    # ---- methods for bound instances (model.apply(variables, ..., method="sample"))
    def _params(self):
        try:
            return self.variables["params"]
        except KeyError as err:
            raise ValueError("ChainRuleState has no parameters yet: initialise it with model.init first") from err

    def n_sites(self) -> int:
        """Number of sites of the bound parameters."""
        return int(self._params()["site_bias"].shape[0])

    def logits(self, x):
        """Conditional logits ℓ_i(x_<i), shape ``(..., N)``."""
        x = jnp.asarray(x)
        lead = x.shape[:-1]
        return conditional_logits(self._params(), x.reshape(-1, x.shape[-1])).reshape(*lead, x.shape[-1])

    def log_probability(self, x):
        """log p(x) = 2 Re log ψ(x), shape ``x.shape[:-1]``."""
        x = jnp.asarray(x)
        lead, n = x.shape[:-1], x.shape[-1]
        flat = x.reshape(-1, n)
        n_up = _check_n_up(n, self.magnetisation)
        return jnp.sum(log_conditionals(conditional_logits(self._params(), flat), flat, n_up), axis=-1).reshape(lead)

    def sample(self, key: jax.Array, n_samples: int):
        """``n_samples`` exact, independent draws from |ψ|², shape ``(n_samples, N)``."""
        self._check()
        n_samples = positive_int("n_samples", n_samples)
        params = self._params()
        n = int(params["site_bias"].shape[0])
        dtype = jnp.result_type(float)
        return draw(params, key, int(n_samples), _check_n_up(n, self.magnetisation), dtype)
