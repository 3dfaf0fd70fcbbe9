"""Benchmark: ground-state energies of small atoms and molecules by VMC with determinant trial states.

Systems (fixed nuclei, bohr, hartree): He, H₂ (R = 1.4), Li, LiH (R = 3.015), Be, compared with
the published exact non-relativistic energies named in ``SYSTEMS`` below (from memory).

``--quick``: Slater–Jastrow states (Slater-type orbitals, cusp + neural Jastrow), short runs;
the He line is the headline (target: within 5 mHa in under 2 minutes on two CPU cores).
Full mode: backflow multi-determinant states (``neural_slater_jastrow``), Hartree-Fock
pretraining when PySCF is installed, long runs (first targets: He ≤ 0.1 mHa in ≤ 10 min;
H₂ ≤ 0.3, Li ≤ 1, LiH ≤ 1.6 mHa in ≤ 60 min; Be ≤ 3 mHa; then He ≤ 0.02 mHa with an error bar
≤ 0.007 mHa, LiH ≤ 0.3 and Be ≤ 0.5 mHa with bars ≤ a third, each ≤ 60 min). He: 7500 steps
and 2²⁵ evaluation samples, 0.012 ± 0.005 mHa in 57 min (2026-12-05; 30 min of it the
evaluation at 19k samples/s; every target met; 5000 steps and 2²⁴ samples gave 0.015 ± 0.007
and 0.022 ± 0.008 mHa in two runs). Be and LiH use backflow and Jastrow widths 32 (channels 16) and
the additive enveloped orbital term: Be 0.40 ± 0.16 mHa in 56 min (2200 steps, 1.5 × 2²⁰
samples: every target met; 3000 steps and 2²⁰ samples gave 0.18 ± 0.18 in 68 min; without the
term and with the former pretraining 0.96 ± 0.19 in 38 min, the default widths with 4000 steps
1.21 ± 0.19, 16 determinants 1.16 ± 0.20); LiH, as configured (2200 steps, the SR Gram matrix in
float32 refined once, 1434 × 1024 samples), 0.88 ± 0.15 and 0.36 ± 0.10 mHa in two runs of 53 min
(independent draws before the pretraining fix), 0.36 ± 0.11 in 56 min with ``--seed 1`` after it;
0.40 ± 0.12 mHa in 57 min (2000 steps, 2²⁰ samples; without the term and with the former
pretraining, 2500 steps: 0.75 ± 0.17; with the nuclear cusp map, ``cusp_map=True``, and 1.5 × 2²⁰
samples 0.73 ± 0.16 in 53 min; 1700 steps evaluated at the lowest-variance window,
``select_window=(100, 700)``, 0.65 ± 0.26 in 55 min).
LiH misses its 0.3 mHa target.

For every system one energy line (energy from a separate evaluation pass) and one throughput line
(walker-steps per second of the full optimisation step: sampling, local energy, gradient and SR);
then throughput lines comparing the Laplacian implementations (own forward Laplacian, jvp of the
gradient, and the optional ``folx`` package) on one system; a summary line last. JSON on stdout,
progress on stderr (benchmarks/README.md).

Options: ``--systems He,Li`` to run a subset; ``--laplacian`` to choose the Laplacian used in
training (default: forward); ``--scale`` to shorten runs for a smoke test; ``--checkpoints DIR``
to keep each trained state (``DIR/<system>.ckpt``, read back with ``search.resume``) for later
diagnosis.

``--case`` chooses the question (default ``energies``, the above):

* ``scan`` — H₂ bond curve, geometries run in order with warm starts (parameters and walkers
  from the previous geometry, :func:`psiloom.electrons.geometry_scan`), one energy line per
  geometry against Kołos & Wolniewicz (from memory) or, at R = 0.8 and 5.0 bohr, PySCF full CI at
  the basis-set limit (``baselines/h2_basis_limit.py``). Full mode also scans LiH at 5 bond
  lengths (``LIH_SCAN``: 512 walkers, no pretraining) against PySCF CCSD(T) at the basis-set
  limit (``baselines/lih_curve_basis_limit.py``, 0.04 mHa above the exact energy at R = 3.015),
  plus one line for the curve's shape, E(R) − E(3.015) against the reference's.
* ``ionisation`` — first ionisation energies of Li and Be as differences of total energies
  (neutral and cation run independently, so errors add in quadrature), one line per species
  and one per ionisation energy (``abs_error_mha`` of the difference).
* ``properties`` — He radial density and LiH axial density with error bars and the LiH dipole
  moment (one line each; the density lines hold the profiles).
* ``cost`` — seconds per optimisation step for He, Li, Be, B, C, N (one line each) and the
  fitted exponent p of seconds ∝ N^p (no energies: its summary's error fields are empty).
* ``laplacian`` — local-energy throughput of the Laplacian implementations (``hessian``,
  ``forward``, ``folx`` when installed) on the full-mode states of ``--systems`` at their initial
  parameters, timed in turn and each the best of 7 rounds (summary: ``forward_to_folx``).

Every case's summary line carries ``max_abs_error_mha`` and ``errors_mha``.
"""

from __future__ import annotations

import importlib.util
import os
import time

import jax

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402
import optax  # noqa: E402

import psiloom as pl  # noqa: E402
from psiloom import electrons as el  # noqa: E402
from _common import Timer, emit, parse_args, progress, relative_error, summary  # noqa: E402

# name: (system, exact energy, source)
SYSTEMS = {
    "He": (el.atom("He"), -2.903724377, "Pekeris 1959 / Drake (from memory)"),
    "H2": (el.molecule([("H", (0, 0, 0)), ("H", (1.4, 0, 0))]), -1.1744757, "Kolos & Wolniewicz 1968 (from memory)"),
    "Li": (el.atom("Li"), -7.47806032, "Puchalski & Pachucki (from memory)"),
    "LiH": (el.molecule([("Li", (0, 0, 0)), ("H", (3.015, 0, 0))]), -8.070548, "Cencek & Rychlewski (from memory)"),
    "Be": (el.atom("Be"), -14.667356, "Komasa et al. (from memory)"),
}
HF_LIMIT = {"He": -2.8616800, "H2": -1.1336296, "Li": -7.4327257, "LiH": -7.987352, "Be": -14.5730230}

QUICK = {
    "He": dict(state="slater_jastrow", n_det=1, steps=120, n_samples=512, lr=0.05, eval_samples=8192),
    "H2": dict(state="slater_jastrow", n_det=1, steps=150, n_samples=512, lr=0.05, eval_samples=8192),
    "Li": dict(state="slater_jastrow", n_det=1, steps=150, n_samples=512, lr=0.05, eval_samples=8192),
    "LiH": dict(state="slater_jastrow", n_det=1, steps=150, n_samples=512, lr=0.05, eval_samples=8192),
    "Be": dict(state="slater_jastrow", n_det=2, steps=150, n_samples=512, lr=0.05, eval_samples=8192),
}
# full mode: 1024 walkers, one stored sample each per step (a 5-move sweep apart), the learning
# rate decaying after the warm-up; the evaluation pass continues the same walkers
FULL = {
    "He": dict(state="neural", n_det=1, steps=7500, n_samples=1024, chains=1024, burn_in=0, lr=0.05, decay=1000,
               eval_samples=33554432),
    "H2": dict(state="neural", n_det=2, steps=2500, n_samples=1024, chains=1024, burn_in=0, lr=0.05, decay=1000,
               eval_samples=131072),
    "Li": dict(state="neural", n_det=2, steps=2500, n_samples=1024, chains=1024, burn_in=0, lr=0.05, decay=1000,
               eval_samples=131072),
    "LiH": dict(state="neural", n_det=4, steps=2200, n_samples=1024, chains=1024, burn_in=0, lr=0.05, decay=1000,
                eval_samples=1468416, width=32, channels=16, jastrow_width=32, envelope_term=True,
                gram_dtype="float32", refinement_steps=1),
    "Be": dict(state="neural", n_det=4, steps=2200, n_samples=1024, chains=1024, burn_in=0, lr=0.05, decay=1000,
               eval_samples=1572864, width=32, channels=16, jastrow_width=32, envelope_term=True),
}
N_CHAINS = 64
PROPERTY_SAMPLES = 2 ** 19  # evaluation samples the density profiles and the dipole use, at most


# optional sizes and options of the neural state in a config (defaults: those of el.neural_slater_jastrow)
SIZE_KEYS = ("width", "channels", "layers", "jastrow_width", "envelope_term", "cusp_map", "radial_terms")


def build_state(system, cfg):
    if cfg["state"] == "neural":
        sizes = {k: cfg[k] for k in SIZE_KEYS if k in cfg}
        return el.neural_slater_jastrow(system, n_det=cfg["n_det"], **sizes)
    return el.slater_jastrow(system, n_det=cfg["n_det"], neural_jastrow=True)


def state_text(cfg):
    """The trial state as written in the JSON lines, e.g. ``neural n_det=4 width=32``."""
    sizes = "".join(f" {k}={cfg[k]}" for k in SIZE_KEYS if k in cfg)
    return f"{cfg['state']} n_det={cfg['n_det']}{sizes}"


def maybe_pretrain(name, model, system, key, quick):
    """Hartree-Fock pretraining of the orbitals (full mode, PySCF present)."""
    if quick or importlib.util.find_spec("pyscf") is None:
        return None, "none"
    from psiloom.electrons import pretrain

    hf = pretrain.hartree_fock(system, basis="cc-pvdz")
    params = jax.jit(model.init)(key, system.random(key, 1))
    params, losses = pretrain.pretrain_orbitals(model, params, hf, key, n_steps=500, n_walkers=512, learning_rate=1e-2)
    progress(f"{name}: HF (cc-pVDZ) {hf.energy:.6f}; pretraining loss {losses[0]:.3g} -> {losses[-1]:.3g}")
    return params, (f"PySCF UHF/RHF cc-pVDZ, 500 Adam steps (backflow held) and 3 least-squares refits "
                    f"(E_HF = {hf.energy:.6f})")


def run_system(name, cfg, laplacian, quick, seed=0, checkpoints=None):
    system, exact, source = SYSTEMS[name]
    key = jax.random.PRNGKey(seed)
    with Timer() as timer:
        model = build_state(system, cfg)
        params, pretrained = maybe_pretrain(name, model, system, key, quick)
        search = _search(system, cfg, laplacian, model=model)
        state = search.init(key, params=params)
        state, history = search.run(cfg["steps"], state=state, progress=progress, print_every=50)
        if cfg.get("late_steps"):  # a last stretch with more samples per step (same walkers)
            search = _search(system, dict(cfg, n_samples=cfg["late_samples"]), laplacian, model=model)
            state, history = search.run(cfg["steps"] + cfg["late_steps"], state=state, history=history,
                                        progress=progress, print_every=50)
        if checkpoints:
            os.makedirs(checkpoints, exist_ok=True)
            search.save(os.path.join(checkpoints, f"{name}.ckpt"), state, history)
        if cfg.get("average_from") is not None:
            state = state._replace(params=pl.optimize.averaged_parameters(state.opt_state))
        selection = {}
        if cfg.get("select_window") is not None:
            chosen = pl.optimize.selection.find_selection_state(state.opt_state)
            selection = {"selected_window_end": int(chosen.best_end),
                         "selected_window_variance": float(chosen.best_variance)}
            progress(f"{name}: evaluating the window ending at update {int(chosen.best_end)} "
                     f"(its mean winsorised training variance {float(chosen.best_variance):.5f})")
            state = state._replace(params=pl.optimize.selected_parameters(state.opt_state))
        evaluation = el.evaluation_pass(search, state, cfg["eval_samples"], burn_in_sweeps=10)
    parts, acceptance = evaluation.components, evaluation.acceptance
    estimate = parts.total
    energy, error = float(np.real(estimate.mean)), float(estimate.error)
    step_seconds = np.median(history["seconds"][1:cfg["steps"]]) if len(history) > 1 else float("nan")
    progress(f"{name}: E = {energy:.6f} ± {error:.6f} (exact {exact}, error {1e3 * (energy - exact):+.2f} mHa) "
             f"in {timer.seconds:.0f} s")
    n_params = search.n_parameters(state)
    method = {
        "trial_state": state_text(cfg),
        "sampler": f"Metropolis all-electron Gaussian, {_chains(cfg)} walkers, sweep 5, adaptive step",
        "optimizer": f"SR (auto solver, shift {cfg.get('shift', 1e-3):g}) + sgd {_schedule_text(cfg)}, energy clip 5",
        "laplacian": laplacian, "pretraining": pretrained, "tau": float(estimate.tau),
        "rhat": float(estimate.rhat), "acceptance": acceptance, "variance": float(estimate.variance),
        "kinetic": float(parts.kinetic.mean), "kinetic_error": float(parts.kinetic.error),
        "potential": float(parts.potential.mean), "potential_error": float(parts.potential.error),
        "virial_ratio": float(parts.virial_ratio),
        "hartree_fock_limit": HF_LIMIT[name], "seed": seed, **selection,
    }
    record = emit({
        "benchmark": "molecules", "system": system.describe(), "method": method,
        "energy": energy, "error_bar": error, "reference": exact, "reference_source": source,
        "rel_error": relative_error(energy, exact), "abs_error_mha": abs(energy - exact) * 1e3,
        "seconds": timer.seconds, "steps": cfg["steps"], "samples_per_step": cfg["n_samples"],
        "walkers": _chains(cfg), "n_params": n_params,
        **({"late_steps": cfg["late_steps"], "late_samples_per_step": cfg["late_samples"]}
           if cfg.get("late_steps") else {}),
    })
    throughput = emit({
        "benchmark": "molecules", "system": system.describe(), "method": {"trial_state": method["trial_state"],
                                                                         "laplacian": laplacian},
        "metric": "walker_steps_per_second", "value": cfg["n_samples"] / step_seconds,
        "unit": "walker-steps/s (one optimisation step per walker: 5 Metropolis moves, local energy, gradient, SR)",
        "seconds": float(step_seconds) * len(history), "n_params": n_params,
    })
    # densities (and the dipole of a molecule) from the same evaluation samples (full mode)
    properties = [] if quick or name not in ("He", "LiH") else _property_lines(system, np.asarray(evaluation.samples))
    if not quick and system.n_electrons > 1:
        properties += _spread_lines(system, np.asarray(evaluation.samples), np.asarray(evaluation.local_energies))
    return record, throughput, model, state.params, properties


def laplacian_comparison(name, model, params, n_walkers=256, repeats=7, label="final trained state"):
    """Local-energy throughput of each Laplacian implementation (compilation excluded).

    The implementations are timed in turn, one call each per round, and each keeps its fastest
    of ``repeats`` rounds, so a load that changes during the measurement hits all of them alike.
    """
    system = SYSTEMS[name][0]
    x = system.random(jax.random.PRNGKey(3), n_walkers, width=0.7)
    methods = ["hessian", "forward"] + (["folx"] if importlib.util.find_spec("folx") else [])
    functions, values, best = {}, {}, {}
    for m in methods:
        h = el.CoulombHamiltonian(system, laplacian=m)
        functions[m] = jax.jit(lambda p, y, h=h: h.local_energy(lambda z: model.apply(p, z), y))
        values[m] = np.asarray(functions[m](params, x))
        best[m] = float("inf")
    for _ in range(repeats):
        for m in methods:
            start = time.perf_counter()
            functions[m](params, x).block_until_ready()
            best[m] = min(best[m], time.perf_counter() - start)
    rates = {m: n_walkers / best[m] for m in methods}
    for m in methods:
        progress(f"{name}: local energy via {m}: {rates[m]:.0f} configurations/s")
    records = []
    for m in methods:
        agree = float(np.max(np.abs(values[m] - values["hessian"])))
        records.append(emit({
            "benchmark": "molecules", "system": system.describe(),
            "method": {"trial_state": label, "laplacian": m, "max_abs_diff_vs_hessian": agree},
            "metric": "local_energy_throughput", "value": rates[m], "unit": "configurations/s",
            "ratio": rates[m] / rates["hessian"], "baseline": "hessian (jvp of the gradient)",
            "ratio_to_folx": rates[m] / rates["folx"] if "folx" in rates else None,
            "seconds": best[m], "repeats": repeats, "walkers": n_walkers,
        }))
    return records


def case_laplacian(configs, laplacian, quick, seed=0, names=("LiH", "Be")):
    """Local-energy throughput of the Laplacian implementations on each system's trial state at
    its initial parameters (the cost does not depend on the parameter values), one run."""
    records = []
    for name in names:
        system = SYSTEMS[name][0]
        model = build_state(system, configs[name])
        key = jax.random.PRNGKey(seed)
        params = jax.jit(model.init)(key, system.random(key, 1))
        records += laplacian_comparison(name, model, params, label=f"{state_text(configs[name])}, initial parameters")
    return records


# H₂ Born-Oppenheimer energies (hartree) and their sources. Kołos & Wolniewicz 1965/1968 (from
# memory) where a value is known to 0.01 mHa; at R = 0.8 and 5.0 bohr, PySCF full CI extrapolated
# to the basis-set limit from aug-cc-pVQZ/5Z (baselines/h2_basis_limit.py,
# results/h2_basis_limit.json). That extrapolation lies 0.013-0.054 mHa below Kołos & Wolniewicz
# at R = 1.0-3.0 (most at short R), which bounds its uncertainty.
KW = "Kolos & Wolniewicz (from memory)"
BASIS_LIMIT = "PySCF FCI aug-cc-pVQZ/5Z, X^-3 limit (about 0.05 mHa low at R <= 1.4)"
H2_CURVE = {0.8: (-1.0201267, BASIS_LIMIT), 1.0: (-1.1245385, KW), 1.4: (-1.1744757, KW), 2.0: (-1.1381329, KW),
            3.0: (-1.0573262, KW), 5.0: (-1.0037873, BASIS_LIMIT)}
# LiH energies along the bond: PySCF CCSD(T), all electrons, cc-pCVTZ/QZ with the correlation
# energy extrapolated as X^-3 (baselines/lih_curve_basis_limit.py, results/lih_curve_basis_limit.json).
# At R = 3.015 bohr it lies 0.04 mHa above the exact −8.070548 (Cencek & Rychlewski, from memory).
LIH_LIMIT = "PySCF CCSD(T) cc-pCVTZ/QZ, X^-3 limit (0.04 mHa above exact at R = 3.015)"
LIH_CURVE = {2.6: (-8.0630769, LIH_LIMIT), 2.8: (-8.0687774, LIH_LIMIT), 3.015: (-8.0705108, LIH_LIMIT),
             3.4: (-8.066613, LIH_LIMIT), 4.0: (-8.0521832, LIH_LIMIT)}
# the LiH curve's run: 512 walkers and samples per step (0.45 s per step against 1.15 s with
# 1024), the first geometry `steps` (no pretraining), each later one a third of them from the
# previous geometry's state, and 2^18 evaluation samples each (bars ~0.25 mHa)
# (the Gram matrix in float64, as when results/molecules_scan_lih.json was made)
LIH_SCAN = dict(steps=1500, eval_samples=262144, n_samples=512, chains=512, gram_dtype=None)
# non-relativistic exact total energies (from memory): neutral atoms as in SYSTEMS, cations
# Li⁺ −7.279913 Ha and Be⁺ −14.324763 Ha (Pekeris-type Hylleraas values).
CATIONS = {"Li": -7.279913, "Be": -14.324763}
# LiH dipole moment: 5.88 D = 2.314 e·bohr (experiment, Wharton, Gold & Klemperer 1962, from memory).
LIH_DIPOLE_AU = 2.314


def _chains(cfg):
    return cfg.get("chains", N_CHAINS)


def _learning_rate(cfg):
    """Linear warm-up over 50 steps from lr/5 to lr; with ``decay`` = t₀ the rate then falls as
    lr / (1 + t/t₀) (common practice for the last stretch of a noisy natural-gradient descent)."""
    warm = optax.linear_schedule(cfg["lr"] / 5, cfg["lr"], 50)
    if not cfg.get("decay"):
        return warm
    t0 = float(cfg["decay"])
    return optax.join_schedules([warm, lambda t: cfg["lr"] / (1.0 + t / t0)], [50])


def _schedule_text(cfg):
    text = f"{cfg['lr'] / 5}->{cfg['lr']}"
    text += f" then lr/(1+t/{cfg['decay']})" if cfg.get("decay") else ""
    if cfg.get("gram_dtype"):
        text += f", Gram matrix in {cfg['gram_dtype']} refined {cfg.get('refinement_steps', 2)}x"
    if cfg.get("average_from") is not None:
        text += f", evaluated at the mean of the iterates after step {cfg['average_from']} (Polyak-Ruppert)"
    if cfg.get("select_window") is not None:
        w, s0 = cfg["select_window"]
        text += (f", evaluated at the mean of the {w}-step window after step {s0} with the lowest mean local-energy "
                 "variance")
    return text


def _search(system, cfg, laplacian, params=None, key=None, model=None):
    model = build_state(system, cfg) if model is None else model
    # one stored sample per walker and step when the walkers are many (burn_in 0): consecutive
    # steps are then one 5-move sweep apart; with few walkers, 1 discarded sweep per step
    chains = _chains(cfg)
    sampler = el.ElectronSampler(system, n_chains=chains, sweep=5, burn_in=cfg.get("burn_in", 1), equilibrate=100)
    lr = _learning_rate(cfg)
    # ``average_from`` = s: the evaluation uses the mean of the iterates after update s (Polyak-Ruppert)
    averaging = [pl.optimize.iterate_average(cfg["average_from"])] if cfg.get("average_from") is not None else []
    # ``select_window`` = (w, s): the evaluation uses the mean of the w-update window after update s
    # with the lowest mean local-energy variance (psiloom.optimize.lowest_variance_window)
    if cfg.get("select_window") is not None:
        averaging.append(pl.optimize.lowest_variance_window(*cfg["select_window"]))
    # ``gram_dtype`` (e.g. "float32"): the SR Gram product in that precision, each solve refined
    # ``refinement_steps`` times against the float64 operator (psiloom.optimize.sr module docstring)
    solve = {k: cfg[k] for k in ("gram_dtype", "refinement_steps") if k in cfg}
    optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=cfg.get("shift", 1e-3), solver="auto", **solve),
                            optax.sgd(lr), *averaging)
    return pl.train.GroundStateSearch(model, el.CoulombHamiltonian(system, laplacian=laplacian), sampler,
                                      optimizer, n_samples=cfg["n_samples"], winsorize=5.0)


def _energy_line(system, cfg, evaluation, reference, source, seconds, extra=None):
    total = evaluation.components.total
    energy, error = float(np.real(total.mean)), float(total.error)
    record = {
        "benchmark": "molecules", "system": system.describe(),
        "method": {"trial_state": state_text(cfg), "tau": float(total.tau),
                   "acceptance": evaluation.acceptance, "charge": system.charge, **(extra or {})},
        "energy": energy, "error_bar": error, "reference": reference, "reference_source": source,
        "rel_error": relative_error(energy, reference),
        "abs_error_mha": None if reference is None else abs(energy - reference) * 1e3,
        "seconds": seconds, "steps": cfg["steps"], "samples_per_step": cfg["n_samples"], "walkers": _chains(cfg),
    }
    progress(f"{system.formula}: E = {total.format()} (reference {reference})")
    return emit(record)


def case_scan(configs, laplacian, quick, seed=0, names=("H2", "LiH")):
    base = dict(configs["H2"], n_det=1) if quick else configs["H2"]
    lengths = (1.0, 1.4, 2.0) if quick else tuple(H2_CURVE)
    records = []
    curves = [("H2", [el.molecule([("H", (0, 0, 0)), ("H", (0, 0, r))]) for r in lengths], base,
               [H2_CURVE[r] for r in lengths])]
    curves = [c for c in curves if c[0] in names]
    if not quick and "LiH" in names:
        curves.append(("LiH", [el.molecule([("Li", (0, 0, 0)), ("H", (0, 0, r))]) for r in LIH_CURVE],
                       dict(configs["LiH"], **LIH_SCAN), list(LIH_CURVE.values())))
    for name, geometries, cfg, references in curves:
        warm_steps = max(2, cfg["steps"] // 3)
        points = el.geometry_scan(geometries, lambda system: _search(system, cfg, laplacian), steps=warm_steps,
                                  first_steps=cfg["steps"], key=jax.random.PRNGKey(seed),
                                  eval_samples=cfg["eval_samples"])
        for point, (reference, source) in zip(points, references):
            r = float(np.linalg.norm(point.system.positions[1] - point.system.positions[0]))
            line_cfg = dict(cfg, steps=cfg["steps"] if point.geometry == 0 else warm_steps)
            records.append(_energy_line(point.system, line_cfg, point.evaluation, reference, source,
                                        point.seconds, {"bond_length_bohr": r, "warm_start": point.warm_start}))
        if name == "LiH":
            records.append(_curve_shape_line(points, tuple(LIH_CURVE)))
    return records


def _curve_shape_line(points, lengths, centre=3.015):
    """The LiH curve's shape: E(R) − E(centre) against the reference's (``LIH_CURVE``) at the bond
    ``lengths`` of ``points``, each difference of two independent evaluation passes (errors in
    quadrature; at the centre itself exactly 0 ± 0)."""
    at = dict(zip(lengths, (p.evaluation.components.total for p in points)))
    differences, errors = {centre: 0.0}, {centre: 0.0}
    for r in lengths:
        if r != centre:
            d = el.energy_difference(at[r], at[centre])
            differences[r], errors[r] = d.value, d.error
    references = {r: LIH_CURVE[r][0] - LIH_CURVE[centre][0] for r in lengths}
    deviations = {r: 1e3 * (differences[r] - references[r]) for r in lengths}
    worst = max((r for r in lengths if r != centre), key=lambda r: abs(deviations[r]) / errors[r])
    progress(f"LiH curve E(R) − E({centre}) minus the reference's (mHa): "
             + ", ".join(f"{r}: {deviations[r]:+.2f} ± {1e3 * errors[r]:.2f}" for r in lengths))
    return emit({
        "benchmark": "molecules", "metric": f"LiH curve shape E(R) − E({centre}) (hartree)",
        "value": {"bond_lengths_bohr": list(lengths), "differences": [differences[r] for r in lengths],
                  "error_bars": [errors[r] for r in lengths],
                  "reference_differences": [references[r] for r in lengths],
                  "deviations_mha": [deviations[r] for r in lengths]},
        "reference_source": LIH_LIMIT, "largest_deviation_in_bars": abs(deviations[worst]) / (1e3 * errors[worst]),
        "unit": "hartree (deviations in mHa)", "seconds": 0.0,
    })


def case_ionisation(configs, laplacian, quick, seed=0, names=tuple(CATIONS)):
    records = []
    for name, cation_ref in CATIONS.items():
        if name not in names:
            continue
        neutral, neutral_ref, _ = SYSTEMS[name]
        cation = el.atom(name, charge=1)
        runs = {}
        for system, reference in ((neutral, neutral_ref), (cation, cation_ref)):
            cfg = configs[name]
            with Timer() as timer:
                search = _search(system, cfg, laplacian)
                state, _ = search.run(cfg["steps"], key=jax.random.PRNGKey(seed), progress=False)
                evaluation = el.evaluation_pass(search, state, cfg["eval_samples"], burn_in_sweeps=10)
            runs[system is cation] = evaluation
            records.append(_energy_line(system, cfg, evaluation, reference, "exact non-relativistic (from memory)",
                                        timer.seconds))
        difference = el.energy_difference(runs[True].components.total, runs[False].components.total)
        reference = cation_ref - SYSTEMS[name][1]
        progress(f"{name}: ionisation energy {difference.format()} Ha (reference {reference:.6f})")
        records.append(emit({
            "benchmark": "molecules", "system": neutral.describe(),
            "method": {"quantity": "first ionisation energy E(cation) − E(neutral)",
                       "error": "independent runs, errors in quadrature"},
            "energy": difference.value, "error_bar": difference.error, "reference": reference,
            "reference_source": "difference of exact non-relativistic energies (from memory)",
            "rel_error": relative_error(difference.value, reference),
            "abs_error_mha": abs(difference.value - reference) * 1e3, "seconds": 0.0,
            "steps": configs[name]["steps"], "samples_per_step": configs[name]["n_samples"], "walkers": _chains(configs[name]),
        }))
    return records


def case_properties(configs, laplacian, quick, seed=0):
    records = []
    for name in ("He", "LiH"):
        system, exact, source = SYSTEMS[name]
        cfg = configs[name]
        with Timer() as timer:
            search = _search(system, cfg, laplacian)
            state, _ = search.run(cfg["steps"], key=jax.random.PRNGKey(seed), progress=False)
            evaluation = el.evaluation_pass(search, state, cfg["eval_samples"], burn_in_sweeps=10)
        records.append(_energy_line(system, cfg, evaluation, exact, source, timer.seconds))
        records += _property_lines(system, np.asarray(evaluation.samples))
    return records


def _property_lines(system, samples):
    """Density profile line (radial for an atom, axial for a diatomic) and, for a diatomic, the
    dipole moment along the bond, from evaluation samples of shape (n_time, n_chains, N, 3); at most
    the last 2¹⁹ of them (the profile of He's 2²⁴ ran out of memory on the 24 GB machine)."""
    samples = samples[-max(1, PROPERTY_SAMPLES // samples.shape[1]):]
    records = []
    if system.n_nuclei == 1:
        profile = el.radial_density(samples, np.linspace(0.0, 4.0, 21))
        kind = "radial density ρ(r) (electrons/bohr³)"
    else:
        length = float(np.linalg.norm(system.positions[1] - system.positions[0]))
        profile = el.axial_density(samples, system, np.linspace(-3.0, length + 3.0, 25))
        kind = "axial density λ(s) from Li (s = 0) toward H (electrons/bohr)"
    records.append(emit({
        "benchmark": "molecules", "system": system.describe(), "metric": kind,
        "value": {"centres_bohr": profile.centres, "density": profile.values, "error": profile.errors},
        "unit": "electrons/bohr³" if system.n_nuclei == 1 else "electrons/bohr", "seconds": 0.0,
    }))
    if system.n_nuclei > 1:
        mu = el.dipole_moment(samples, system)
        axis = (system.positions[1] - system.positions[0]) / length
        along = float(np.dot(np.asarray(mu.mean), axis))
        error = float(np.sqrt(np.dot(np.asarray(mu.error) ** 2, axis**2)))
        progress(f"LiH dipole along Li→H: {pl.stats.parenthesis_notation(along, error)} e·bohr "
                 f"(published |μ| {LIH_DIPOLE_AU})")
        records.append(emit({
            "benchmark": "molecules", "system": system.describe(), "metric": "dipole_moment_along_Li_to_H",
            "value": along, "error_bar": error, "unit": "e·bohr (negative: Li⁺H⁻ polarity)",
            "reference": -LIH_DIPOLE_AU, "reference_source": "experiment 5.88 D (Wharton, Gold & Klemperer 1962, from memory)",
            "debye": along * el.DEBYE_PER_AU, "seconds": 0.0,
        }))
    return records


SPREAD_EDGES = (0.0, 0.05, 0.1, 0.2, 0.4, 0.8, 1.5, 3.0, 1e3)  # bohr


def _spread_lines(system, samples, local_energies):
    """Where the local-energy variance comes from: its shares binned by the closest
    electron–nucleus and electron–electron distances (``el.local_energy_spread``), from at most
    the last 2¹⁹ evaluation samples."""
    keep = max(1, PROPERTY_SAMPLES // samples.shape[1])
    samples, local_energies = samples[-keep:], local_energies[-keep:]
    records = []
    for by in ("nucleus", "pair"):
        spread = el.local_energy_spread(samples, local_energies, system, SPREAD_EDGES, by=by)
        worst = int(np.argmax(spread.share / np.maximum(spread.fraction, 1e-12)))
        progress(f"{system.formula}: E_L spread by closest {by} distance: bins {list(SPREAD_EDGES)} bohr, "
                 f"samples {np.round(spread.fraction, 4).tolist()}, variance shares {np.round(spread.share, 3).tolist()}")
        records.append(emit({
            "benchmark": "molecules", "system": system.describe(),
            "metric": f"local_energy_spread_by_closest_{'electron_nucleus' if by == 'nucleus' else 'electron_pair'}",
            "value": {"edges_bohr": list(SPREAD_EDGES), "sample_fraction": spread.fraction,
                      "mean_local_energy": spread.mean, "variance_share": spread.share},
            "variance": spread.variance, "worst_bin_per_sample": worst,
            "unit": "shares of Σ(E_L − Ē)² (hartree²) and of the samples", "seconds": 0.0,
        }))
    return records


def case_cost(configs, laplacian, quick, seed=0):
    """Seconds per optimisation step against the number of electrons (He … N); fitted exponent."""
    names = ("He", "Li", "Be", "B", "C", "N")
    steps = 6 if quick else 30
    cfg = dict({k: v for k, v in configs["Be"].items() if k not in SIZE_KEYS}, steps=steps, n_det=1)
    sizes, seconds, records = [], [], []
    for name in names:
        system = el.atom(name)
        search = _search(system, cfg, laplacian)
        state, history = search.run(steps, key=jax.random.PRNGKey(seed), progress=False)
        per_step = float(np.median(history["seconds"][1:]))
        sizes.append(system.n_electrons)
        seconds.append(per_step)
        progress(f"{name}: {per_step:.3f} s per step ({system.n_electrons} electrons)")
        records.append(emit({
            "benchmark": "molecules", "system": system.describe(),
            "method": {"trial_state": state_text(cfg), "laplacian": laplacian},
            "metric": "seconds_per_optimisation_step", "value": per_step, "unit": "s",
            "samples_per_step": cfg["n_samples"], "seconds": float(np.sum(history["seconds"])),
        }))
    exponent = float(np.polyfit(np.log(sizes), np.log(seconds), 1)[0])
    progress(f"cost ∝ N^{exponent:.2f}")
    records.append(emit({"benchmark": "molecules", "metric": "cost_exponent", "value": exponent,
                         "unit": "fitted p in seconds per step ∝ N^p", "electrons": sizes, "seconds": 0.0}))
    return records


def _forward_to_folx(records):
    """``{"forward_to_folx": {system: throughput ratio}}`` from the Laplacian lines (empty without folx)."""
    ratios = {r["system"]["name"]: r["ratio_to_folx"] for r in records
              if r.get("metric") == "local_energy_throughput" and r["method"]["laplacian"] == "forward"
              and r.get("ratio_to_folx") is not None}
    return {"forward_to_folx": ratios} if ratios else {}


CASES = ("energies", "scan", "ionisation", "properties", "cost", "laplacian")


def main() -> None:
    def extra(parser):
        parser.add_argument("--systems", default=",".join(SYSTEMS), help="comma-separated subset of " + ",".join(SYSTEMS)
                            + " (--case scan: the curves of H2 and/or LiH; --case ionisation: Li and/or Be)")
        parser.add_argument("--laplacian", default="forward", choices=list(el.laplacian.METHODS))
        parser.add_argument("--scale", type=float, default=1.0,
                            help="multiply optimisation steps and evaluation samples (smoke tests)")
        parser.add_argument("--case", default="energies", choices=CASES,
                            help="energies (default), scan (H2/LiH bond curves), ionisation (Li, Be), properties, "
                                 "cost (seconds per step against electron count), laplacian (local-energy "
                                 "throughput of the Laplacian implementations)")
        parser.add_argument("--checkpoints", metavar="DIR", default=None,
                            help="energies case: write each trained state to DIR/<system>.ckpt (psiloom.checkpoint) "
                                 "before its evaluation pass")
        parser.add_argument("--seed", type=int, default=0,
                            help="PRNG seed of the runs (walkers, sampling, network initialisation)")

    args = parse_args("molecules", "atoms and molecules: VMC energies against exact references", extra=extra)
    names = [n.strip() for n in args.systems.split(",") if n.strip()]
    unknown = [n for n in names if n not in SYSTEMS]
    if unknown:
        raise SystemExit(f"unknown systems {unknown}; available: {', '.join(SYSTEMS)}")
    configs = QUICK if args.quick else FULL
    if args.scale != 1.0:
        configs = {k: dict(v, steps=max(2, int(v["steps"] * args.scale)),
                           eval_samples=max(_chains(v), int(v["eval_samples"] * args.scale))) for k, v in configs.items()}
    if args.case != "energies":
        run_case = {"scan": case_scan, "ionisation": case_ionisation, "properties": case_properties,
                    "cost": case_cost, "laplacian": case_laplacian}[args.case]
        if args.case == "ionisation" and not set(names) & set(CATIONS):
            raise SystemExit(f"--case ionisation runs {', '.join(CATIONS)}; --systems names none of them")
        kwargs = {"names": names} if args.case in ("scan", "laplacian", "ionisation") else {}
        records = run_case(configs, args.laplacian, args.quick, seed=args.seed, **kwargs)
        energy_records = [r for r in records if r.get("abs_error_mha") is not None]
        summary(energy_records, benchmark="molecules", case=args.case, quick=args.quick, n_lines=len(records) + 1,
                max_abs_error_mha=max((r["abs_error_mha"] for r in energy_records), default=None),
                errors_mha={f"{r['system']['name']}" + ("+" if r.get("method", {}).get("charge", 0) > 0 else "")
                            + (f"@{r['method']['bond_length_bohr']:g}"
                                                          if "bond_length_bohr" in r.get("method", {}) else "")
                            + ("(IE)" if "quantity" in r.get("method", {}) else ""): r["abs_error_mha"]
                            for r in energy_records},
                **_forward_to_folx(records))
        return
    records, compare_with = [], None
    for name in names:
        progress(f"{name}: {configs[name]}")
        record, throughput, model, params, properties = run_system(name, configs[name], args.laplacian, args.quick,
                                                                    seed=args.seed, checkpoints=args.checkpoints)
        records += [record, throughput] + properties
        if compare_with is None or name == "LiH":
            compare_with = (name, model, params)
    if compare_with is not None:
        records += laplacian_comparison(*compare_with)
    energy_records = [r for r in records if "energy" in r]
    summary(energy_records, benchmark="molecules", quick=args.quick, n_lines=len(records) + 1,
            max_abs_error_mha=max((r["abs_error_mha"] for r in energy_records), default=None),
            errors_mha={r["system"]["name"]: r["abs_error_mha"] for r in energy_records}, **_forward_to_folx(records))


if __name__ == "__main__":
    main()
