"""Benchmark: how fast do the samplers decorrelate on a state with two well-separated modes?

The state (our own construction) lives on an open chain of N spins:

    |ψ(x)|² ∝ exp(−K Σ_{i=0}^{N−2} x_i x_{i+1}),

an antiferromagnetically ordered chain whose two Néel patterns are the two modes. A single
flip in a Néel pattern costs a factor e^{−2K} at an end of the chain (e^{−4K} inside) and a
mode change needs a domain wall to cross the whole chain, so local Markov chains switch modes
rarely. The same |ψ|² is written exactly in two trial states:

* an RBM with one hidden unit per bond, W_{i,b} = w, W_{i+1,b} = −w, cosh 2w = e^{K}
  (then ψ ∝ Π_b e^{−(K/2) x_i x_{i+1}}), used by single-flip Metropolis, the exchange mixture,
  parallel tempering and block Gibbs;
* a :class:`~psiloom.states.ChainRuleState` whose only non-zero weights are the direct terms
  D_{i,i−1} = −2K, so p(x_i | x_<i) = σ(−2K x_i x_{i−1}) — the exact Markov-chain
  factorisation of the open Ising chain — used for direct sampling.

The script checks that both give the same normalised |ψ|² (exact enumeration) before timing.

Observable: the staggered magnetisation m_s = (1/N) Σ_i (−1)^i x_i (≈ ±1 in the two modes; its
sign is the slow variable). For every sampler we report τ_int of m_s (Sokal window, in stored
samples; one stored sample per sweep of N proposals, per Gibbs update, per tempering step
(one sweep of every replica plus one exchange round) or per direct draw) and the effective
sample size per second ESS/s = n_chains · n_time / (τ · seconds), where seconds is the
sampling time after compilation (all samplers start from exact draws, so no burn-in is
needed; the hotter tempering replicas start there too). As a correctness check we also report
⟨m_s²⟩ against its exact value (1/N²) Σ_{ij} tanh(K)^{|i−j|} (open Ising chain, textbook).
Estimates of τ from chains shorter than 50 τ are flagged ``tau_reliable: false``.

``--quick``: N = 12, K = 2, 16 chains × 12 000 stored samples (< 90 s on two cores).
Full: N = 20, K = 2.5, 32 chains × 60 000 stored samples.
"""

from __future__ import annotations

import jax

jax.config.update("jax_enable_x64", True)

import math  # noqa: E402
import time  # noqa: E402

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402

import psiloom as pl  # noqa: E402
from _common import Timer, emit, parse_args, progress, summary  # noqa: E402
from psiloom.states import BoundState  # noqa: E402


def rbm_state(n: int, coupling: float) -> BoundState:
    """RBM with |ψ|² ∝ exp(−K Σ x_i x_{i+1}) on the open chain (one hidden unit per bond)."""
    model = pl.states.RBM(alpha=1.0)
    w = 0.5 * math.acosh(math.exp(coupling))
    kernel = np.zeros((n, n))
    for b in range(n - 1):
        kernel[b, b], kernel[b + 1, b] = w, -w
    params = {"kernel": jnp.asarray(kernel), "hidden_bias": jnp.zeros(n), "visible_bias": jnp.zeros(n)}
    return BoundState(model, {"params": params})


def chain_rule_state(n: int, coupling: float) -> BoundState:
    """ChainRuleState with p(x_i | x_<i) = σ(−2K x_i x_{i−1}): the same |ψ|², exactly normalised."""
    model = pl.states.ChainRuleState(features=1)
    shapes = jax.eval_shape(model.init, jax.random.PRNGKey(0), jnp.ones((1, n)))
    params = jax.tree_util.tree_map(lambda s: jnp.zeros(s.shape), shapes)["params"]
    direct = np.zeros((n, n))
    direct[np.arange(1, n), np.arange(n - 1)] = -2.0 * coupling
    params = dict(params, direct=jnp.asarray(direct))
    return BoundState(model, {"params": params})


def exact_ms2(n: int, coupling: float) -> float:
    t = math.tanh(coupling)
    i = np.arange(n)
    return float(np.sum(t ** np.abs(i[:, None] - i[None, :])) / n**2)


def check_same_target(rbm: BoundState, ar: BoundState, n: int) -> float:
    """max |p_RBM − p_AR| over all 2^N configurations (both normalised by enumeration)."""
    x = pl.spaces.SpinSpace(n).configurations()
    log_w = 2.0 * np.asarray(jax.jit(rbm)(x))
    p_rbm = np.exp(log_w - log_w.max())
    p_rbm /= p_rbm.sum()
    p_ar = np.exp(2.0 * np.real(np.asarray(jax.jit(ar)(x))))
    return float(np.max(np.abs(p_rbm - p_ar)))


def measure(name: str, sampler, log_amp: BoundState, start: jax.Array, n_time: int, n_sites: int, key) -> dict:
    """Compile ahead of time, then time one sampling run; τ and ESS/s of the staggered magnetisation."""
    with Timer() as total:
        if isinstance(sampler, pl.sampling.TemperingSampler):
            state = sampler.init(key, log_amp)
            x = jnp.broadcast_to(start, state.x.shape)
            state = sampler.refresh(state._replace(x=x), log_amp)
        else:
            state = pl.sampling.ChainState(start, log_amp(start))
        run = jax.jit(sampler.sample, static_argnums=3)
        compiled = run.lower(key, state, log_amp, n_time).compile()
        t0 = time.perf_counter()
        xs, _, state, acc = compiled(key, state, log_amp)
        xs.block_until_ready()
        seconds = time.perf_counter() - t0
    stagger = jnp.asarray((-1.0) ** np.arange(n_sites))
    ms = np.asarray(jnp.mean(xs * stagger, axis=-1))  # (T, C)
    est = pl.stats.estimate(ms)
    est2 = pl.stats.estimate(ms**2)
    tau = float(est.tau)
    n_total = ms.size
    record = {
        "name": name, "tau": tau, "ess": n_total / tau, "ess_per_second": n_total / tau / seconds,
        "sampling_seconds": seconds, "seconds": total.seconds, "rhat": float(est.rhat),
        "tau_reliable": bool(n_time >= 50 * tau), "acceptance": float(acc),
        "ms_mean": float(est.mean), "ms2": float(est2.mean), "ms2_error": float(est2.error),
    }
    if isinstance(sampler, pl.sampling.TemperingSampler):
        record["swap_rate"] = np.asarray(state.swap_rate).tolist()
        record["replica_acceptance"] = np.asarray(state.acceptance).tolist()
    progress(f"{name}: tau={tau:.3g} ess/s={record['ess_per_second']:.4g} sampling {seconds:.2f}s "
             f"(total {total.seconds:.1f}s) <m_s^2>={record['ms2']:.4f}±{record['ms2_error']:.4f}")
    return record


def main() -> None:
    args = parse_args("mixing", "autocorrelation time and ESS per second of the samplers on a two-mode state")
    if args.quick:
        n, coupling, n_chains, n_time, betas = 12, 2.0, 16, 12_000, pl.sampling.geometric_betas(4, 0.25)
    else:
        n, coupling, n_chains, n_time, betas = 20, 2.5, 32, 60_000, pl.sampling.geometric_betas(6, 0.15)
    rbm = rbm_state(n, coupling)
    ar = chain_rule_state(n, coupling)
    mismatch = check_same_target(rbm, ar, n)
    progress(f"N={n} K={coupling}: max |p_RBM - p_AR| = {mismatch:.2e}")
    if mismatch > 1e-10:
        raise RuntimeError(f"the RBM and chain-rule states differ (max |Δp| = {mismatch:.2e})")
    space = pl.spaces.SpinSpace(n)
    lattice = pl.lattices.chain(n, periodic=False)
    key = jax.random.PRNGKey(0)
    # exact draws: every chain starts in equilibrium
    start = jax.jit(lambda v, k: ar.model.apply(v, k, n_chains, method="sample"))(ar.variables, jax.random.PRNGKey(1))
    exchange = pl.sampling.Mixture((pl.sampling.BondExchange(lattice.bonds), pl.sampling.single_flip), (0.5, 0.5))
    methods = [
        ("single_flip", "Metropolis, single flips, one sweep (N proposals) per sample",
         pl.sampling.MetropolisChains(space, n_chains), rbm),
        ("exchange", "Metropolis, mixture of nn exchange (p=0.5) and single flips (p=0.5), one sweep per sample",
         pl.sampling.MetropolisChains(space, n_chains, move=exchange), rbm),
        ("tempering", f"parallel tempering, {len(betas)} replicas, geometric betas down to {betas[-1]:.2f}, "
         "single flips, one sweep of every replica + one exchange round per sample",
         pl.sampling.TemperingSampler(space, n_chains, betas=betas), rbm),
        ("gibbs", "block Gibbs (h, h' | v), (v | h, h'), one update per sample",
         pl.sampling.BlockGibbsSampler(space, n_chains), rbm),
        ("direct", "exact autoregressive draws (ChainRuleState)", pl.sampling.ChainRuleSampler(space, n_chains), ar),
    ]
    system = {"model": "two_mode_state", "lattice": "chain", "extent": [n], "pbc": False, "K": coupling,
              "state": "|psi|^2 ~ exp(-K sum x_i x_i+1), own construction", "observable": "staggered magnetisation"}
    results = []
    for name, description, sampler, log_amp in methods:
        results.append((description, measure(name, sampler, log_amp, start, n_time, n, jax.random.fold_in(key, len(results)))))
    baseline = results[0][1]["ess_per_second"]
    exact = exact_ms2(n, coupling)
    records = []
    for description, r in results:
        method = {"sampler": r["name"], "description": description, "n_chains": n_chains, "n_time": n_time,
                  "trial_state": "ChainRuleState" if r["name"] == "direct" else f"RBM alpha=1 ({n} hidden)"}
        record = {
            "benchmark": "mixing", "system": system, "method": method,
            "metric": "ess_per_second", "value": r["ess_per_second"], "unit": "1/s",
            "ratio": r["ess_per_second"] / baseline, "baseline": "single_flip",
            "tau": r["tau"], "ess_per_second": r["ess_per_second"], "ess": r["ess"],
            "tau_reliable": r["tau_reliable"], "rhat": r["rhat"], "acceptance": r["acceptance"],
            "ms2": r["ms2"], "ms2_error": r["ms2_error"], "ms2_exact": exact,
            "ms2_within_4_sigma": bool(abs(r["ms2"] - exact) < 4 * r["ms2_error"]),
            "sampling_seconds": r["sampling_seconds"], "seconds": r["seconds"],
            "samples": n_chains * n_time,
        }
        for extra in ("swap_rate", "replica_acceptance"):
            if extra in r:
                record[extra] = r[extra]
        records.append(emit(record))
    summary(records, benchmark="mixing", quick=args.quick,
            best=max(records, key=lambda r: r["value"])["method"]["sampler"], same_target_max_dp=mismatch)


if __name__ == "__main__":
    main()
