"""Fault campaign: what psiloom does with bad inputs, diverging runs, damaged checkpoints and kills.

Question: does every fault end in a clear error (a ``ValueError``/``TypeError`` naming the bad
argument or value, a ``CheckpointError``, a ``NonFiniteError`` naming the step), never in a
dead interpreter, a hang or a silently wrong result?

Categories (one JSON line each, then a summary line; progress on stderr):

* ``inputs``: generated bad values (NaN, ±inf, negative, zero, fractional, bool, strings, wrong
  shapes, complex, ...) for the arguments of the public constructors and entry points
  (lattices, spaces, Pauli operators and model builders, trial states at init, samplers, SR,
  ``GroundStateSearch`` and its ``run``/``evaluate``, atoms and molecules, ``stats.estimate``).
* ``configurations``: configurations that are not ±1 (0/1, 0.5, NaN, wrong length) fed to
  local energies (fast and generic paths) and to ``evaluate(starts=...)``.
* ``divergence``: an optimiser whose update turns NaN at step k: ``NonFiniteError`` must name
  step k and the checkpoint (written every step) must hold exactly the state of step k − 1;
  NaN/inf parameters of an RBM on the compiled sampling path (in a child process: a death by
  signal is a crash).
* ``checkpoint``: truncations and byte flips of a real checkpoint (each load raises
  ``CheckpointError`` or gives a state identical to the original; an altered load is
  silent_wrong) and crafted files (a pickle that would create a marker file, bare or wrapped in a
  valid-looking header) that must never run.
* ``resume``: a checkpoint resumed into a search with another sector, chain count, n_sites or
  real/complex state: a clear error naming the mismatch.
* ``kills``: a child process training with ``checkpoint_every=1`` is killed with SIGKILL at a
  random moment; the checkpoint must load (``kills_survived``) and, after one more write by a new
  run, no temporary file or lock may remain beside it.

Outcomes per probe: ``clear`` (the fault was reported clearly or, for damaged files, the load
was refused or identical), ``unclear`` (an exception that does not name the argument or value,
or an error of an unexpected type), ``silent_wrong`` (no error for an invalid value, or a wrong
result), ``crashes`` (the process died or hung). Probes run in child processes so that a crash is
counted, not fatal. Every count is reported as found: this script measures, it does not pass
or fail. Fixed seed (``--seed``); ``--quick`` runs under 3 minutes on 2 cores.

Usage::

    python benchmarks/faults.py --quick            # JSON lines on stdout
    python benchmarks/faults.py --quick --verbose  # also every unclear / silent / crash probe on stderr
"""

from __future__ import annotations

import inspect
import json
import os
import signal
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import Timer, emit, parse_args, progress  # noqa: E402

HERE = os.path.abspath(__file__)
OUTCOMES = ("clear", "unclear", "silent_wrong", "crashes")

# ------------------------------------------------------------------------------ bad values
NAN, INF = float("nan"), float("inf")
BAD = {
    # positive integers (counts, sizes)
    "count": [NAN, INF, -1, 0, 2.5, True, "4", 1 + 1j, [4], None],
    # non-negative integers
    "count0": [NAN, INF, -1, 2.5, True, "4", 1 + 1j, [4]],
    # positive finite reals
    "positive": [NAN, INF, -INF, -1.0, 0.0, True, "1", 1 + 1j, [1.0]],
    # non-negative finite reals
    "nonneg": [NAN, INF, -1.0, True, "1", 1 + 1j, [1.0]],
    # finite real couplings (any sign)
    "real": [NAN, INF, -INF, True, "1", 1 + 1j, [1.0], None],
    # half-integer magnetisation of 6 spins (|S^z| ≤ 3)
    "sz6": [NAN, INF, 0.25, 4.0, -3.5, "0", 1j, True, [0]],
    # booleans
    "flag": ["yes", 0.5, NAN, 2, [True]],
    # one site index of a 6-site operator
    "site6": [-1, 6, 0.5, NAN, "0", True, 1j],
}


# words that name a configuration argument in an error message (besides the argument's name)
CONFIG_WORDS = ("configuration", "±1", "+1", "-1", "n_sites", "sites", "length", "shape")


def _named(message: str, name: str, value, extra_words=()) -> bool:
    """Does ``message`` name the argument ``name`` (as a word) or show the bad value?"""
    import re

    def has(word, flags=re.IGNORECASE):
        return bool(word) and re.search(r"(?<![A-Za-z0-9_])" + re.escape(word) + r"(?![A-Za-z0-9_])", message, flags)

    # the argument as a word (singular too: "betas" -> "beta"), or a word the probe accepts
    if any(has(w) for w in {name, name.replace("_", " "), name[:-1] if name.endswith("s") else "", *extra_words}):
        return True
    try:
        shown = {repr(value), str(value)} if not hasattr(value, "shape") else set()
    except Exception:  # noqa: BLE001
        shown = set()
    return any(has(s, 0) for s in shown)


def classify_exception(err: BaseException, name: str, value, extra_words=()) -> str:
    if isinstance(err, (ValueError, TypeError)) and _named(str(err), name, value, extra_words):
        return "clear"
    return "unclear"


# ------------------------------------------------------------------------------ child: input probes
class ProbeTimeout(Exception):
    pass


def _fixtures():
    import jax
    import jax.numpy as jnp
    import numpy as np
    import optax

    jax.config.update("jax_enable_x64", True)
    import psiloom as pl

    fx = {"pl": pl, "jax": jax, "jnp": jnp, "np": np, "optax": optax}
    fx["lat"] = pl.lattices.chain(6)
    fx["space"] = pl.spaces.SpinSpace(6, magnetisation=0)
    fx["free"] = pl.spaces.SpinSpace(6)
    fx["ham"] = pl.operators.heisenberg(fx["lat"])
    fx["x"] = jnp.array([[1.0, -1.0, 1.0, -1.0, 1.0, -1.0], [1.0, 1.0, -1.0, -1.0, 1.0, -1.0]])
    fx["key"] = jax.random.PRNGKey(0)
    return fx


def _search(fx, optimizer=None, **kw):
    pl, optax = fx["pl"], fx["optax"]
    sampler = pl.sampling.MetropolisChains(fx["space"], n_chains=4, bonds=fx["lat"].bonds)
    opt = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05)) \
        if optimizer is None else optimizer
    args = dict(n_samples=16)
    args.update(kw)
    return pl.train.GroundStateSearch(pl.states.RBM(alpha=1.0, init_scale=0.05), fx["ham"], sampler, opt, **args)


def _bind(fx, model, variables):
    """The bound log-amplitude x -> log ψ(x) of this version of psiloom (fast path on)."""
    states = fx["pl"].states
    try:
        from psiloom.states.fast import bind_amplitude  # before the BoundState merge
        return bind_amplitude(model, variables, fast=True)
    except ImportError:
        return states.BoundState(model, variables, fast=True)


def input_probes(fx):
    """[(target, argument, kind or list of bad values, call(value))]; built lazily per probe."""
    pl, jax, np = fx["pl"], fx["jax"], fx["np"]
    lat, space, ham, x, key = fx["lat"], fx["space"], fx["ham"], fx["x"], fx["key"]
    ops, st, smp = pl.operators, pl.states, pl.sampling
    el = pl.electrons

    def init_state(model, xx=x):
        return model.init(key, xx)

    search_cache = {}

    def search():
        if "s" not in search_cache:
            s = _search(fx)
            search_cache["s"] = (s, s.init(jax.random.PRNGKey(1)))
        return search_cache["s"]

    def run_with(**kw):
        s, start = search()
        args = dict(n_steps=0, state=start, progress=False)
        args.update(kw)
        return s.run(**args)

    def evaluate_with(**kw):
        s, start = search()
        args = dict(n_samples=8)
        args.update(kw)
        return s.evaluate(start, **args)

    def sampler(cls, **kw):
        return cls(fx["free"] if cls is smp.BlockGibbsSampler else space, **kw)

    shapes = [np.zeros((0,)), "abc", np.zeros((2, 3, 4)), None, [[1.0, "a"]]]
    finite_or_off = [NAN, -INF, -1.0, 0.0, True, "1", 1 + 1j, [1.0]]  # inf means "no bound" there
    P = [
        ("lattices.chain", "n_sites", "count", lambda v: pl.lattices.chain(v)),
        ("lattices.chain", "pbc", "flag", lambda v: pl.lattices.chain(6, periodic=v)),
        ("lattices.square", "lx", "count", lambda v: pl.lattices.square(v, 3)),
        ("lattices.square", "ly", [NAN, INF, -1, 0, 2.5, True, "4", 1 + 1j, [4]], lambda v: pl.lattices.square(3, v)),
        ("spaces.SpinSpace", "n_sites", "count", lambda v: pl.spaces.SpinSpace(v)),
        ("spaces.SpinSpace", "magnetisation", "sz6", lambda v: pl.spaces.SpinSpace(6, magnetisation=v)),
        ("operators.pauli", "n_sites", "count", lambda v: ops.pauli(v, "X", 0)),
        ("operators.pauli", "letters", ["Q", "XX", "", 5, None], lambda v: ops.pauli(6, v, 0)),
        ("operators.pauli", "sites", "site6", lambda v: ops.pauli(6, "X", v)),
        ("operators.pauli", "sites", [(0, 0), (1,), (0, 7)], lambda v: ops.pauli(6, "XX", v)),
        ("operators.pauli", "coefficient", [NAN, INF, "1", [1.0, 2.0], None], lambda v: ops.pauli(6, "Z", 0, v)),
        ("operators.heisenberg", "J", "real", lambda v: ops.heisenberg(lat, J=v)),
        ("operators.heisenberg", "lattice", [6, "chain", None], lambda v: ops.heisenberg(v)),
        ("operators.transverse_field_ising", "J", "real", lambda v: ops.transverse_field_ising(lat, J=v)),
        ("operators.transverse_field_ising", "h", "real", lambda v: ops.transverse_field_ising(lat, h=v)),
        ("operators.xxz", "delta", "real", lambda v: ops.xxz(lat, delta=v)),
        ("operators.j1j2", "J2", "real", lambda v: ops.j1j2(lat, J2=v)),
        ("operators.spin_correlation", "i", "site6", lambda v: ops.spin_correlation(6, v, 1)),
        ("states.RBM.init", "alpha", "positive", lambda v: init_state(st.RBM(alpha=v))),
        ("states.RBM.init", "init_scale", "nonneg", lambda v: init_state(st.RBM(init_scale=v))),
        ("states.RBM.init", "x", [x[:, :0], x[0, 0]], lambda v: init_state(st.RBM(), v), CONFIG_WORDS),
        ("states.TwoBodyJastrow.init", "init_scale", "nonneg", lambda v: init_state(st.TwoBodyJastrow(init_scale=v))),
        ("states.FeedForward.init", "hidden", [(NAN,), (-1.0,), (0.0,), ("2",), 2.0],
         lambda v: init_state(st.FeedForward(hidden=v))),
        # features = 0 is a documented, normalised state (only the direct linear term): not a fault
        ("states.ChainRuleState.init", "features", "count0", lambda v: init_state(st.ChainRuleState(features=v))),
        ("states.ChainRuleState.init", "magnetisation", "sz6", lambda v: init_state(st.ChainRuleState(magnetisation=v))),
        ("sampling.MetropolisChains", "n_chains", "count", lambda v: sampler(smp.MetropolisChains, n_chains=v)),
        ("sampling.MetropolisChains", "sweep", [NAN, INF, -1, 0, 2.5, True, "4", 1 + 1j, [4]], lambda v: sampler(smp.MetropolisChains, sweep=v)),
        ("sampling.MetropolisChains", "burn_in", "count0", lambda v: sampler(smp.MetropolisChains, burn_in=v)),
        ("sampling.MetropolisChains", "order", ["sideways", 3, None], lambda v: sampler(smp.MetropolisChains, order=v)),
        ("sampling.MetropolisChains", "bonds", [[(0, 9)], [(0, 0)], [(0, 1.5)], "01"],
         lambda v: sampler(smp.MetropolisChains, bonds=v)),
        ("sampling.BlockGibbsSampler", "n_chains", "count", lambda v: sampler(smp.BlockGibbsSampler, n_chains=v)),
        ("sampling.TemperingSampler", "betas", [(1.0, NAN), (1.0, -0.5), (0.5, 1.0), (1.0, 1.5), (), "1"],
         lambda v: sampler(smp.TemperingSampler, betas=v)),
        ("sampling.TemperingSampler", "n_chains", "count", lambda v: sampler(smp.TemperingSampler, n_chains=v)),
        ("optimize.stochastic_reconfiguration", "shift", "nonneg",
         lambda v: pl.optimize.stochastic_reconfiguration(shift=v)),
        ("optimize.stochastic_reconfiguration", "solver", ["dense ", 3, None, "DENSE"],
         lambda v: pl.optimize.stochastic_reconfiguration(solver=v)),
        ("optimize.stochastic_reconfiguration", "tol", "nonneg", lambda v: pl.optimize.stochastic_reconfiguration(tol=v)),
        ("optimize.stochastic_reconfiguration", "maxiter", [NAN, INF, -1, 0, 2.5, True, "4", 1 + 1j, [4]],
         lambda v: pl.optimize.stochastic_reconfiguration(solver="cg", maxiter=v)),
        ("optimize.stochastic_reconfiguration", "max_metric_norm", finite_or_off,
         lambda v: pl.optimize.stochastic_reconfiguration(max_metric_norm=v)),
        ("optimize.stochastic_reconfiguration", "relative_shift", "nonneg",
         lambda v: pl.optimize.stochastic_reconfiguration(relative_shift=v)),
        ("optimize.winsorize_local_energies", "width", finite_or_off,
         lambda v: pl.optimize.winsorize_local_energies(fx["jnp"].zeros(4), v)),
        ("GroundStateSearch", "n_samples", "count", lambda v: _search(fx, n_samples=v)),
        ("GroundStateSearch", "chunk", [NAN, INF, -1, 0, 2.5, True, "4", 1 + 1j, [4]], lambda v: _search(fx, chunk=v)),
        ("GroundStateSearch", "winsorize", finite_or_off, lambda v: _search(fx, winsorize=v)),
        ("GroundStateSearch.run", "n_steps", "count0", lambda v: run_with(n_steps=v)),
        ("GroundStateSearch.run", "checkpoint_every", "count", lambda v: run_with(checkpoint_every=v)),
        ("GroundStateSearch.run", "print_every", "count", lambda v: run_with(print_every=v)),
        ("GroundStateSearch.run", "steps_per_visit", [NAN, INF, -1, 0, 2.5, True, "4", [4]],
         lambda v: run_with(steps_per_visit=v)),
        ("GroundStateSearch.run", "profile_every", "count0", lambda v: run_with(profile_every=v)),
        ("GroundStateSearch.run", "checkpoint", [5, "", b"\0"], lambda v: run_with(checkpoint=v)),
        ("GroundStateSearch.run", "callback", [5, "f"], lambda v: run_with(callback=v)),
        ("GroundStateSearch.evaluate", "n_samples", "count", lambda v: evaluate_with(n_samples=v)),
        ("GroundStateSearch.evaluate", "burn_in_sweeps", "count0", lambda v: evaluate_with(burn_in_sweeps=v)),
        ("GroundStateSearch.evaluate", "target_error", "positive",
         lambda v: evaluate_with(n_samples=None, target_error=v, max_samples=8)),
        ("GroundStateSearch.evaluate", "max_samples", [NAN, INF, -1, 0, 2.5, True, "4", 1 + 1j, [4]],  # None: default
         lambda v: evaluate_with(n_samples=None, target_error=1.0, max_samples=v)),
        *([("GroundStateSearch", "mesh", [3, "samples", [1, 2]], lambda v: _search(fx, mesh=v))]
          if "mesh" in inspect.signature(pl.train.GroundStateSearch).parameters else []),
        ("electrons.atom", "symbol", ["Xx", "", 3.5, None, -1], lambda v: el.atom(v)),
        ("electrons.atom", "charge", [0.5, NAN, "1", True, 3, -INF], lambda v: el.atom("He", charge=v)),
        ("electrons.atom", "spin", [0.5, 5, "1", NAN, -3], lambda v: el.atom("Li", spin=v)),
        ("electrons.molecule", "atoms", [[], [("H", [0.0, 0.0])], [("H", [NAN, 0.0, 0.0])],
                                         [("H", [0.0, 0.0, 0.0]), ("H", [0.0, 0.0, 0.0])], [("H", [INF, 0, 0])],
                                         [(0, [0.0, 0.0, 0.0])], [(-1, [0.0, 0.0, 0.0])]],
         lambda v: el.molecule(v), ("position", "positions", "nuclei", "charges")),
        ("electrons.molecule", "units", ["furlong", 1, None], lambda v: el.molecule([("H", [0, 0, 0]), ("H", [1.4, 0, 0])],
                                                                                    units=v)),
        ("electrons.ElectronSampler", "step_size", "positive", lambda v: el.ElectronSampler(el.atom("He"), step_size=v)),
        ("electrons.ElectronSampler", "n_chains", "count", lambda v: el.ElectronSampler(el.atom("He"), n_chains=v)),
        ("stats.estimate", "values", shapes, lambda v: pl.stats.estimate(v)),
    ]
    out = []
    for target, arg, kind, call, *words in P:
        for value in BAD[kind] if isinstance(kind, str) else kind:
            out.append((target, arg, value, call, tuple(words[0]) if words else ()))
    return out


def configuration_probes(fx):
    """Configurations that are not ±1 fed to local energies and to evaluate(starts=...)."""
    pl, jax, jnp, np = fx["pl"], fx["jax"], fx["jnp"], fx["np"]
    x = np.asarray(fx["x"])
    bad = {
        "zeros_ones": (x + 1) / 2,
        "half": np.where(x > 0, 0.5, -1.0),
        "nan": np.where(np.arange(6) == 2, np.nan, x),
        "inf": np.where(np.arange(6) == 2, np.inf, x),
        "twos": 2 * x,
        "too_short": x[:, :5],
        "too_long": np.concatenate([x, x[:, :1]], axis=1),
        "one_dimensional_wrong": x[0, :4],
    }
    out = []
    models = {"rbm": pl.states.RBM(alpha=1.0, init_scale=0.1), "jastrow": pl.states.TwoBodyJastrow(init_scale=0.1)}
    for mname, model in models.items():
        variables = model.init(fx["key"], fx["x"])
        for hname, ham in (("heisenberg", fx["ham"]), ("tfim", pl.operators.transverse_field_ising(fx["lat"]))):
            for fast in (True, False):
                for cname, cfg in bad.items():
                    def call(v, model=model, variables=variables, ham=ham, fast=fast):
                        bound = _bind(fx, model, variables)
                        if not fast:
                            bound = (pl.states.BoundState(model, variables, fast=False)
                                     if "fast" in pl.states.BoundState.__init__.__code__.co_varnames
                                     else pl.states.BoundState(model, variables))
                        return np.asarray(ham.local_energy(bound, jnp.asarray(v)))
                    out.append((f"{hname}.local_energy[{mname},{'fast' if fast else 'generic'}]", "x", cfg, call,
                                CONFIG_WORDS))
    s = _search(fx)
    start = s.init(jax.random.PRNGKey(1))
    for cname, cfg in bad.items():
        out.append(("GroundStateSearch.evaluate", "starts", cfg, lambda v: s.evaluate(start, 8, starts=v)[0].mean,
                    CONFIG_WORDS))
    return out


def run_probe_child(category: str, first: int, per_probe_timeout: int) -> None:
    """Child process: run probes ``first, first+1, ...``; one JSON line before and after each."""
    fx = _fixtures()
    probes = {"inputs": input_probes, "configurations": configuration_probes,
              "nan_sampling": nan_sampling_probes}[category](fx)
    print(json.dumps({"n": len(probes)}), flush=True)

    def on_alarm(signum, frame):
        raise ProbeTimeout()

    signal.signal(signal.SIGALRM, on_alarm)
    for i in range(first, len(probes)):
        target, arg, value, call, words = probes[i]
        print(json.dumps({"start": i, "target": target, "arg": arg, "value": _show(value)}), flush=True)
        detail = ""
        signal.alarm(per_probe_timeout)
        try:
            result = call(value)
            outcome = "silent_wrong"
            if category == "nan_sampling":
                outcome, detail = result
            elif category == "configurations":
                # no exception: a NaN result at least shows the fault; finite numbers hide it
                arr = fx["np"].asarray(result)
                detail = "finite result" if fx["np"].all(fx["np"].isfinite(arr)) else "non-finite result, no error"
            else:
                detail = "accepted"
        except ProbeTimeout:
            outcome, detail = "crashes", f"hang (> {per_probe_timeout} s)"
        except Exception as err:  # noqa: BLE001
            if category == "nan_sampling":  # any error that says what is wrong (a callback's error arrives wrapped)
                outcome = "clear" if _named(str(err), "", None, words) else "unclear"
            else:
                outcome = classify_exception(err, arg, value, words)
            lines = [ln for ln in str(err).splitlines() if ln.strip()]
            # a wrapped host-callback error ends with the original exception's line
            detail = f"{type(err).__name__}: {(lines[-1] if len(lines) > 3 else str(err))[:200]}"
        finally:
            signal.alarm(0)
        print(json.dumps({"done": i, "target": target, "arg": arg, "value": _show(value), "outcome": outcome,
                          "detail": detail}), flush=True)


def _show(value) -> str:
    if hasattr(value, "shape") and getattr(value, "size", 0) > 4:
        return f"array{tuple(value.shape)}"
    text = repr(value)
    return text if len(text) < 60 else text[:57] + "..."


def run_probes(category: str, args) -> dict:
    """Run a probe category in child processes, restarting after a crash; count outcomes."""
    counts = {k: 0 for k in OUTCOMES}
    findings, first, n = [], 0, None
    while n is None or first < n:
        cmd = [sys.executable, HERE, "--child", category, "--first", str(first)]
        try:
            proc = subprocess.run(cmd, capture_output=True, text=True, timeout=args.child_timeout)
            out, rc = proc.stdout, proc.returncode
        except subprocess.TimeoutExpired as err:
            out = err.stdout.decode() if isinstance(err.stdout, bytes) else (err.stdout or "")
            rc = "timeout"
        started, started_rec, done = None, {}, first - 1
        for line in out.splitlines():
            try:
                rec = json.loads(line)
            except ValueError:
                continue
            if "n" in rec:
                n = rec["n"]
            elif "start" in rec:
                started, started_rec = rec["start"], rec
            elif "done" in rec:
                done = rec["done"]
                counts[rec["outcome"]] += 1
                if rec["outcome"] != "clear":
                    findings.append(rec)
        if n is None:
            raise RuntimeError(f"probe child for {category} failed to start (rc={rc}): {proc.stderr[-2000:]}")
        if started is not None and started > done:  # died (or hung) inside probe `started`
            counts["crashes"] += 1
            how = f"signal {signal.Signals(-rc).name}" if isinstance(rc, int) and rc < 0 else f"exit {rc}"
            findings.append({**started_rec, "done": started, "outcome": "crashes", "detail": f"child died ({how})"})
            first = started + 1
        else:
            first = max(first, done + 1)
            if first < n and rc != 0:
                raise RuntimeError(f"probe child for {category} stopped at {first}/{n} (rc={rc})")
    for rec in findings:
        if args.verbose:
            progress(f"  {category}: {rec.get('outcome')}: {rec.get('target')}({rec.get('arg')}={rec.get('value')}) "
                     f"-> {rec.get('detail')}")
    return {"tried": n, **counts, "findings": findings}


# ------------------------------------------------------------------------------ divergence
def leaves_equal(jax, np, a, b) -> bool:
    la, lb = jax.tree_util.tree_leaves(a), jax.tree_util.tree_leaves(b)
    return len(la) == len(lb) and all(
        np.asarray(p).shape == np.asarray(q).shape and np.array_equal(np.asarray(p), np.asarray(q), equal_nan=True)
        for p, q in zip(la, lb))


def divergence(args, tmp) -> dict:
    fx = _fixtures()
    jax, jnp, np, optax, pl = fx["jax"], fx["jnp"], fx["np"], fx["optax"], fx["pl"]
    from psiloom.testing import fail_at_step, sgd_failing_at

    counts, findings = {k: 0 for k in OUTCOMES}, []
    steps = [2, 5] if args.quick else [2, 3, 4, 5, 7, 8, 11]
    sampler = pl.sampling.MetropolisChains(fx["space"], n_chains=4, bonds=fx["lat"].bonds)
    search = pl.train.GroundStateSearch(pl.states.RBM(alpha=1.0, init_scale=0.05), fx["ham"], sampler,
                                        sgd_failing_at(), n_samples=16)
    for k in steps:
        for spv in (1, 3):
            start = search.init(jax.random.PRNGKey(k))
            start = fail_at_step(start, k)
            good, _ = search.run(k - 1, state=start, progress=False, steps_per_visit=spv)
            path = os.path.join(tmp, f"nan-{k}-{spv}.ckpt")
            what = f"NaN update at step {k} (steps_per_visit={spv})"
            try:
                search.run(k + 3, state=start, progress=False, checkpoint=path, checkpoint_every=1, steps_per_visit=spv)
            except pl.train.NonFiniteError as err:
                named = getattr(err, "step", None) == k and f"step {k}" in str(err)
                try:
                    saved, hist = search.resume(path)
                    kept = int(saved.step) == k - 1 and leaves_equal(jax, np, saved, good) and len(hist) == k - 1
                except Exception as load_err:  # noqa: BLE001
                    kept = False
                    findings.append({"what": what, "detail": f"checkpoint did not load: {load_err}"})
                outcome = "clear" if named and kept else "silent_wrong" if not kept else "unclear"
                if outcome != "clear":
                    findings.append({"what": what, "outcome": outcome, "detail": f"named={named} kept={kept}: {err}"})
            except Exception as err:  # noqa: BLE001
                outcome = "unclear"
                findings.append({"what": what, "outcome": outcome, "detail": f"{type(err).__name__}: {err}"})
            else:
                outcome = "silent_wrong"
                findings.append({"what": what, "outcome": outcome, "detail": "no error"})
            counts[outcome] += 1
    # NaN / inf parameters on the (compiled, where available) sampling path, in child processes
    res = run_probes("nan_sampling", args)
    for k in OUTCOMES:
        counts[k] += res[k]
    findings += [{"what": f"sampling with {f.get('value', '?')} parameters", "outcome": f["outcome"],
                  "detail": f["detail"]} for f in res["findings"]]
    return {"tried": sum(counts.values()), **counts, "findings": findings}


NAN_SAMPLING_CASES = ("kernel:nan", "hidden_bias:nan", "visible_bias:inf", "kernel:huge")


def nan_sampling_probes(fx):
    """Sampling an RBM whose parameters hold NaN / inf (or a huge finite weight): the call returns
    its own outcome; a death by signal is counted by the parent."""
    return [("MetropolisChains.sample", "params", case, lambda v: nan_sampling(fx, v),
             ("nan", "non-finite", "not finite", "inf", "overflow", "underflow", "bound"))
            for case in NAN_SAMPLING_CASES]


def nan_sampling(fx, case: str):
    jax, jnp, np, pl = fx["jax"], fx["jnp"], fx["np"], fx["pl"]
    leaf, kind = case.split(":")
    model = pl.states.RBM(alpha=2.0, init_scale=0.1)
    variables = model.init(fx["key"], fx["x"])
    value = {"nan": jnp.nan, "inf": jnp.inf, "huge": 1e6}[kind]
    params = dict(variables["params"])
    params[leaf] = params[leaf].at[(0,) * params[leaf].ndim].set(value)
    sampler = pl.sampling.MetropolisChains(fx["free"], n_chains=8)
    state = sampler.init(jax.random.PRNGKey(3), _bind(fx, model, variables))  # finite state first
    bad = _bind(fx, model, {"params": params})
    state = sampler.refresh(state, bad)
    xs, logs, state, acc = sampler.sample(jax.random.PRNGKey(4), state, bad, 8)
    xs, logs = np.asarray(xs), np.asarray(logs)
    if kind == "huge":  # finite weights: a valid (if extreme) state, so ±1 output without NaN is right
        ok = bool(np.all(np.abs(xs) == 1) and not np.any(np.isnan(logs)))
        return ("clear" if ok else "silent_wrong"), f"finite weights; output ok={ok}"
    if np.all(np.isfinite(logs)) and np.all(np.abs(xs) == 1):
        return "silent_wrong", "finite output from non-finite parameters"
    return "unclear", "non-finite output, no error"


# ------------------------------------------------------------------------------ checkpoints
def _saved_checkpoint(fx, tmp, **kw):
    search = _search(fx, **kw)
    state, history = search.run(2, key=fx["jax"].random.PRNGKey(5), progress=False)
    path = os.path.join(tmp, "good.ckpt")
    search.save(path, state, history)
    with open(path, "rb") as f:
        data = f.read()
    return search, path, data, state, history


def checkpoint_damage(args, tmp, rng) -> dict:
    import pickle
    import hashlib

    fx = _fixtures()
    jax, np, pl = fx["jax"], fx["np"], fx["pl"]
    CheckpointError = pl.checkpoint.CheckpointError
    search, path, data, state, history = _saved_checkpoint(fx, tmp)
    counts, findings = {k: 0 for k in OUTCOMES}, []
    n_cut, n_flip = (40, 120) if args.quick else (300, 1500)
    bad = os.path.join(tmp, "damaged.ckpt")

    def try_load(blob: bytes, what: str):
        with open(bad, "wb") as f:
            f.write(blob)
        try:
            back, hist = search.resume(bad)
        except CheckpointError as err:
            outcome = "clear" if "damaged.ckpt" in str(err) else "unclear"
            detail = str(err)[:160]
        except Exception as err:  # noqa: BLE001
            outcome, detail = "unclear", f"{type(err).__name__}: {str(err)[:160]}"
        else:
            same = leaves_equal(jax, np, back, state) and hist.columns == history.columns
            outcome, detail = ("clear", "identical") if same else ("silent_wrong", "altered state loaded")
        counts[outcome] += 1
        if outcome != "clear":
            findings.append({"what": what, "outcome": outcome, "detail": detail})

    cuts = sorted(set(int(c) for c in rng.integers(0, len(data), n_cut)) | {0, 1, len(data) - 1})
    for cut in cuts:
        try_load(data[:cut], f"truncated at {cut}/{len(data)}")
    for _ in range(n_flip):
        pos, bit = int(rng.integers(0, len(data))), int(rng.integers(0, 8))
        blob = bytearray(data)
        blob[pos] ^= 1 << bit
        try_load(bytes(blob), f"bit {bit} of byte {pos} flipped")
    # crafted files: a pickle that would create a marker file, bare and behind a valid header
    marker = os.path.join(tmp, "exploit-ran")

    class Exploit:
        def __reduce__(self):
            return (os.system, (f"touch {marker}",))

    payloads = [pickle.dumps({"version": 1, "state": Exploit()})]
    first, rest = data.split(b"\n", 1)
    header = json.loads(rest[: int(first.split(b" ")[1])])
    for payload in (pickle.dumps(Exploit()), pickle.dumps({"params": Exploit()}, protocol=0)):
        h = dict(header, payload_bytes=len(payload), payload_sha256=hashlib.sha256(payload).hexdigest())
        head = json.dumps(h).encode()
        payloads.append(b"%s %d %s\n" % (first.split(b" ")[0], len(head), hashlib.sha256(head).hexdigest().encode())
                        + head + payload)
    for i, blob in enumerate(payloads):
        with open(bad, "wb") as f:
            f.write(blob)
        try:
            search.resume(bad)
            outcome, detail = "silent_wrong", "crafted file loaded"
        except CheckpointError:
            outcome, detail = "clear", ""
        except Exception as err:  # noqa: BLE001
            outcome, detail = "unclear", f"{type(err).__name__}: {err}"
        try:  # and through the module's loader with the search's template
            pl.checkpoint.load_checkpoint(bad, search.template())
            outcome, detail = "silent_wrong", "crafted file loaded by load_checkpoint"
        except CheckpointError:
            pass
        except Exception as err:  # noqa: BLE001
            outcome, detail = "unclear", f"load_checkpoint: {type(err).__name__}: {err}"
        if os.path.exists(marker):
            outcome, detail = "silent_wrong", "the crafted pickle ran (marker file created)"
            os.unlink(marker)
        counts[outcome] += 1
        if outcome != "clear":
            findings.append({"what": f"crafted file {i}", "outcome": outcome, "detail": detail})
    return {"tried": sum(counts.values()), **counts, "findings": findings,
            "file_bytes": len(data), "truncations": len(cuts), "byte_flips": n_flip}


def resume_mismatch(args, tmp) -> dict:
    fx = _fixtures()
    pl, optax = fx["pl"], fx["optax"]
    search, path, data, state, history = _saved_checkpoint(fx, tmp)
    counts, findings = {k: 0 for k in OUTCOMES}, []

    def other(n_sites=6, magnetisation=0, n_chains=4, complex_params=False, alpha=1.0, n_samples=16):
        lat = pl.lattices.chain(n_sites)
        space = pl.spaces.SpinSpace(n_sites, magnetisation=magnetisation)
        sampler = pl.sampling.MetropolisChains(space, n_chains=n_chains,
                                                bonds=lat.bonds if magnetisation is not None else None)
        opt = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05))
        return pl.train.GroundStateSearch(pl.states.RBM(alpha=alpha, init_scale=0.05, complex_params=complex_params),
                                          pl.operators.heisenberg(lat), sampler, opt, n_samples=n_samples)

    cases = [
        ("sector", dict(magnetisation=1), ("magnetisation", "sector")),
        ("free sector", dict(magnetisation=None), ("magnetisation", "sector")),
        ("chain count", dict(n_chains=8), ("chain",)),
        ("n_sites", dict(n_sites=8), ("n_sites", "sites")),
        ("complex", dict(complex_params=True), ("complex",)),
        ("hidden units", dict(alpha=2.0), ("shape",)),
    ]
    for name, kw, words in cases:
        try:
            other(**kw).resume(path)
            outcome, detail = "silent_wrong", "resumed without error"
        except (ValueError, TypeError) as err:
            outcome = "clear" if any(w in str(err) for w in words) else "unclear"
            detail = str(err)[:200]
        except Exception as err:  # noqa: BLE001
            outcome, detail = "unclear", f"{type(err).__name__}: {str(err)[:200]}"
        counts[outcome] += 1
        if outcome != "clear":
            findings.append({"what": name, "outcome": outcome, "detail": detail})
    return {"tried": sum(counts.values()), **counts, "findings": findings}


# ------------------------------------------------------------------------------ kills
def _kill_search(fx):
    """The search the killed trainers run: plain SGD (a cheaper compilation than SR)."""
    return _search(fx, optimizer=fx["optax"].sgd(0.05))


def train_child(path: str) -> None:
    """Child: train a tiny search with a checkpoint every step, until killed."""
    fx = _fixtures()
    _kill_search(fx).run(10**6, key=fx["jax"].random.PRNGKey(9), progress=False, checkpoint=path,
                         checkpoint_every=1)


def litter(path: str) -> list[str]:
    """Files beside ``path`` that belong to it: temporary files of writes, the lock."""
    folder, base = os.path.dirname(path), os.path.basename(path)
    return sorted(f for f in os.listdir(folder) if f != base and f.startswith(("." + base, base)))


def kills(args, tmp, rng) -> dict:
    """Trainers started together (start-up dominates), each killed at its own random moment after
    its first checkpoint; then every checkpoint is loaded and written once more by a new run."""
    fx = _fixtures()
    counts, findings = {k: 0 for k in OUTCOMES}, []
    n_kills = 3 if args.quick else 12
    batch = 3
    survived = 0
    for first in range(0, n_kills, batch):
        paths, procs, unwritten = [], [], set()
        try:
            for i in range(first, min(first + batch, n_kills)):
                paths.append(os.path.join(tmp, f"kill-{i}", "run.ckpt"))
                os.makedirs(os.path.dirname(paths[-1]))
                procs.append(subprocess.Popen([sys.executable, HERE, "--child", "train", "--path", paths[-1]],
                                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
            for path, proc in zip(paths, procs):
                deadline = time.time() + args.child_timeout
                while not os.path.exists(path) and time.time() < deadline and proc.poll() is None:
                    time.sleep(0.02)
                if not os.path.exists(path):
                    unwritten.add(path)
                time.sleep(float(rng.uniform(0.0, 1.0)))
                if proc.poll() is None:
                    os.kill(proc.pid, signal.SIGKILL)
                proc.wait()
        finally:
            for proc in procs:
                if proc.poll() is None:
                    os.kill(proc.pid, signal.SIGKILL)
                    proc.wait()
        search = _kill_search(fx)
        for i, (path, proc) in enumerate(zip(paths, procs), start=first):
            what = f"kill {i}"
            if path in unwritten:
                counts["unclear"] += 1
                findings.append({"what": what, "outcome": "unclear", "detail": "no checkpoint written before the kill"})
                continue
            if proc.returncode != -signal.SIGKILL:
                counts["unclear"] += 1
                findings.append({"what": what, "outcome": "unclear",
                                 "detail": f"trainer ended by itself: {proc.returncode}"})
                continue
            try:
                state, history = search.resume(path)
            except Exception as err:  # noqa: BLE001
                counts["silent_wrong"] += 1  # a checkpoint lost to one kill: the atomic write failed
                findings.append({"what": what, "outcome": "silent_wrong", "detail": f"no loadable checkpoint: {err}"})
                continue
            survived += 1
            step = int(state.step)
            search.run(step + 1, state=state, history=history, progress=False, checkpoint=path, checkpoint_every=1)
            left = litter(path)
            back, _ = search.resume(path)
            if left or int(back.step) != step + 1:
                counts["silent_wrong"] += 1
                findings.append({"what": what, "outcome": "silent_wrong",
                                 "detail": f"after the next write: litter {left}, step {int(back.step)} (want {step + 1})"})
            else:
                counts["clear"] += 1
            progress(f"  kill {i}: checkpoint at step {step} loaded; litter after the next write: {left}")
    return {"tried": n_kills, **counts, "findings": findings, "kills": n_kills, "kills_survived": survived}


# ------------------------------------------------------------------------------ main
def main() -> None:
    def extra(p):
        p.add_argument("--seed", type=int, default=20261203)
        p.add_argument("--verbose", action="store_true", help="print every non-clear probe on stderr")
        p.add_argument("--child", default=None, help=argparse_hidden)
        p.add_argument("--first", type=int, default=0, help=argparse_hidden)
        p.add_argument("--path", default="", help=argparse_hidden)
        p.add_argument("--child-timeout", type=float, default=240.0, help="seconds before a child counts as hung")

    import argparse

    argparse_hidden = argparse.SUPPRESS
    args = parse_args("faults", "fault campaign", extra=extra)
    if args.child in ("inputs", "configurations", "nan_sampling"):
        return run_probe_child(args.child, args.first, per_probe_timeout=60)
    if args.child == "train":
        return train_child(args.path)

    import numpy as np

    rng = np.random.default_rng(args.seed)
    records = []
    total = {k: 0 for k in ("tried", *OUTCOMES)}
    kill_counts = {"kills": 0, "kills_survived": 0}
    with tempfile.TemporaryDirectory(prefix="psiloom-faults-") as tmp:
        steps = [
            ("inputs", lambda: run_probes("inputs", args)),
            ("configurations", lambda: run_probes("configurations", args)),
            ("divergence", lambda: divergence(args, tmp)),
            ("checkpoint", lambda: checkpoint_damage(args, tmp, rng)),
            ("resume", lambda: resume_mismatch(args, tmp)),
            ("kills", lambda: kills(args, tmp, rng)),
        ]
        for category, fn in steps:
            progress(f"{category} ...")
            with Timer() as t:
                res = fn()
            findings = res.pop("findings")
            if args.verbose and category not in ("inputs", "configurations"):
                for f in findings:
                    progress(f"  {category}: {f}")
            rec = {"benchmark": "faults", "category": category, "tried": res.pop("tried")}
            for k in OUTCOMES:
                rec[k] = res.pop(k)
            rec.update(res)
            rec["examples"] = [_example(f) for f in findings[:5]]
            rec["seconds"] = t.seconds
            records.append(emit(rec))
            for k in total:
                total[k] += rec[k]
            for k in kill_counts:
                kill_counts[k] += rec.get(k, 0)
            progress(f"{category}: " + ", ".join(f"{k}={rec[k]}" for k in ("tried", *OUTCOMES)) +
                     f" ({t.seconds:.1f} s)")
    out = {"summary": True, "benchmark": "faults", "quick": bool(args.quick), "seed": args.seed,
           "tried": total["tried"], "clear": total["clear"], "unclear": total["unclear"],
           "crashes": total["crashes"], "silent_wrong": total["silent_wrong"], **kill_counts,
           "total_seconds": float(sum(r["seconds"] for r in records))}
    emit(out)


def _example(f: dict) -> str:
    if "target" in f:
        return f"{f['outcome']}: {f['target']}({f['arg']}={f['value']}) -> {f['detail']}"
    return f"{f.get('outcome', '')}: {f.get('what', '')} -> {f.get('detail', '')}"


if __name__ == "__main__":
    main()
