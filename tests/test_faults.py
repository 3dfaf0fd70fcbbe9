"""The cheap core of the fault campaign (``benchmarks/faults.py``): bad arguments of public
constructors, a NaN update at a given step against a checkpoint written every step, and kill -9
of a training process in the middle of its checkpoint writes.

Checkpoint damage (truncation, bit flips), crafted files, resume mismatches and NaN stops inside
multi-step visits are tested in ``tests/test_vmc_loop.py`` and not repeated here.
"""

from __future__ import annotations

import math
import os
import re
import signal
import subprocess
import sys
import textwrap
import time

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

import psiloom as pl
from psiloom.testing import fail_at_step, sgd_failing_at, trees_equal
from psiloom.train import GroundStateSearch, NonFiniteError

SRC = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "src")


def names(message: str, word: str) -> bool:
    """``word`` appears in ``message`` as a word (not inside another identifier)."""
    return re.search(r"(?<![A-Za-z0-9_])" + re.escape(word) + r"(?![A-Za-z0-9_])", message) is not None


# values that are not positive integers: non-positive integers, non-integral or non-finite floats,
# bools, strings, complex numbers, sequences, None (integral floats such as 4.0 are left out:
# accepting them is a matter of taste, not a fault)
not_a_count = st.one_of(
    st.integers(max_value=0),
    st.floats(allow_nan=True, allow_infinity=True).filter(lambda f: not (math.isfinite(f) and f.is_integer())),
    st.sampled_from([True, False, "4", 4 + 0j, 1j, [4], (4,), None, np.array([4, 4])]),
)


def lattice():
    return pl.lattices.chain(6)


def space():
    return pl.spaces.SpinSpace(6, magnetisation=0)


def sampler(n_chains=4):
    return pl.sampling.MetropolisChains(space(), n_chains=n_chains, bonds=lattice().bonds)


def search(optimizer=None, n_samples=16, **kw):
    if optimizer is None:
        optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05))
    return GroundStateSearch(pl.states.RBM(alpha=1.0, init_scale=0.05), pl.operators.heisenberg(lattice()),
                             sampler(), optimizer, n_samples=n_samples, **kw)


@pytest.fixture(scope="module")
def small():
    s = search()
    return s, s.init(jax.random.PRNGKey(1))


CONSTRUCTORS = {
    "n_sites (chain)": lambda v: pl.lattices.chain(v),
    "lx": lambda v: pl.lattices.square(v, 3),
    "n_sites": lambda v: pl.spaces.SpinSpace(v),
    "n_chains": lambda v: pl.sampling.MetropolisChains(space(), n_chains=v),
    "n_samples": lambda v: search(n_samples=v),
}


@settings(max_examples=60, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(arg=st.sampled_from(sorted(CONSTRUCTORS)), value=not_a_count)
def test_constructors_refuse_what_is_not_a_count_naming_the_argument(arg, value):
    # the project rule (DEVELOPERS.md): bad input raises ValueError/TypeError naming the value
    with pytest.raises((ValueError, TypeError)) as err:
        CONSTRUCTORS[arg](value)
    assert names(str(err.value), arg.split()[0]), str(err.value)


not_a_count0 = st.one_of(st.integers(max_value=-1), not_a_count.filter(lambda v: not isinstance(v, int) or isinstance(v, bool)))


@settings(max_examples=40, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(arg=st.sampled_from(["checkpoint_every", "steps_per_visit", "print_every", "profile_every", "burn_in_sweeps"]),
       data=st.data())
def test_run_and_evaluate_refuse_bad_counts_before_any_compute(small, arg, data):
    s, start = small
    value = data.draw(not_a_count0 if arg in ("profile_every", "burn_in_sweeps") else not_a_count)
    assume(not (arg == "steps_per_visit" and value is None))  # None: the default (print_every)
    with pytest.raises((ValueError, TypeError)) as err:
        if arg == "burn_in_sweeps":
            s.evaluate(start, 8, burn_in_sweeps=value)
        else:
            s.run(0, state=start, progress=False, **{arg: value})
    assert names(str(err.value), arg.split()[0]), str(err.value)


@given(position=st.sampled_from([math.nan, math.inf, -math.inf]), axis=st.integers(0, 2))
def test_molecule_refuses_non_finite_nuclear_positions(position, axis):
    where = [0.0, 0.0, 0.0]
    where[axis] = position
    with pytest.raises(ValueError, match="finite"):
        pl.electrons.molecule([("H", [0.0, 0.0, 0.0]), ("H", where)])


# ------------------------------------------------------- flags, reals and state attributes

# not a bool: integers (0/1 included: a flag is never a count), floats with NaN, strings,
# None, lists of bools
not_a_flag = st.one_of(st.integers(), st.floats(allow_nan=True), st.text(max_size=3), st.none(),
                       st.lists(st.booleans(), min_size=1, max_size=2))

FLAGS = {
    "periodic": [lambda v: pl.lattices.chain(6, periodic=v), lambda v: pl.lattices.square(2, 3, periodic=v)],
    "marshall_basis": [lambda v: pl.operators.heisenberg(lattice(), marshall_basis=v),
                  lambda v: pl.operators.j1j2(pl.lattices.square(2, 2), marshall_basis=v)],
    "compiled_sweeps": [lambda v: pl.sampling.MetropolisChains(space(), compiled_sweeps=v)],
}


@settings(max_examples=60)
@given(arg=st.sampled_from(sorted(FLAGS)), which=st.integers(0, 1), value=not_a_flag)
def test_flags_take_only_true_or_false(arg, which, value):
    build = FLAGS[arg][which % len(FLAGS[arg])]
    with pytest.raises((ValueError, TypeError)) as err:
        build(value)
    assert names(str(err.value), arg.split()[0]), str(err.value)


@pytest.mark.parametrize("builder", ["heisenberg", "xxz", "transverse_field_ising", "j1j2",
                                     "staggered_magnetization_z"])
@pytest.mark.parametrize("value", [6, "chain", None, (6,)])
def test_model_builders_name_a_lattice_that_is_not_one(builder, value):
    with pytest.raises(TypeError, match="lattice"):
        getattr(pl.operators, builder)(value)


# not a finite real >= 0: negative or non-finite floats, bools, strings, complex, lists, None
not_a_nonnegative_real = st.one_of(
    st.floats(max_value=-1e-300), st.sampled_from([math.nan, math.inf, -math.inf]),
    st.booleans(), st.text(max_size=3), st.complex_numbers(min_magnitude=1e-3),
    st.lists(st.floats(0, 1), min_size=1, max_size=2), st.none(),
)


@settings(max_examples=60)
@given(arg=st.sampled_from(["shift", "relative_shift", "tol", "atol"]), value=not_a_nonnegative_real)
def test_sr_refuses_bad_shifts_and_tolerances_naming_them(arg, value):
    assume(not (arg == "relative_shift" and value is None))  # None: no relative shift
    solver = "cg" if arg in ("tol", "atol") else "dense"
    with pytest.raises((ValueError, TypeError)) as err:
        pl.optimize.stochastic_reconfiguration(solver=solver, **{arg: value})
    assert names(str(err.value), arg.split()[0]), str(err.value)


def test_sr_still_takes_schedules():
    tx = pl.optimize.stochastic_reconfiguration(shift=lambda count: 1e-2, relative_shift=lambda count: 0.0)
    assert tx is not None


def init_state(model, n_sites=4):
    return model.init(jax.random.PRNGKey(0), jnp.ones((2, n_sites)))


STATE_ATTRIBUTES = {
    ("RBM", "alpha"): (lambda v: pl.states.RBM(alpha=v), "positive"),
    ("RBM", "init_scale"): (lambda v: pl.states.RBM(init_scale=v), "nonneg"),
    ("TwoBodyJastrow", "init_scale"): (lambda v: pl.states.TwoBodyJastrow(init_scale=v), "nonneg"),
    ("FeedForward", "hidden"): (lambda v: pl.states.FeedForward(hidden=(v,)), "positive"),
    ("ChainRuleState", "magnetisation"): (lambda v: pl.states.ChainRuleState(magnetisation=v), "real"),
    ("ChainRuleState", "features"): (lambda v: pl.states.ChainRuleState(features=v), "count0"),
}
not_a_positive_real = st.one_of(not_a_nonnegative_real, st.just(0.0))
not_a_real = st.one_of(st.sampled_from([math.nan, math.inf, -math.inf]), st.booleans(),
                       st.text(min_size=1, max_size=3), st.complex_numbers(min_magnitude=1e-3),
                       st.lists(st.floats(0, 1), min_size=1, max_size=2))
BAD_BY_KIND = {"positive": not_a_positive_real, "nonneg": not_a_nonnegative_real, "real": not_a_real,
               "count0": not_a_count0}


@settings(max_examples=60, deadline=None)
@given(target=st.sampled_from(sorted(STATE_ATTRIBUTES)), data=st.data())
def test_state_attributes_are_checked_at_init_naming_them(target, data):
    build, kind = STATE_ATTRIBUTES[target]
    value = data.draw(BAD_BY_KIND[kind])
    with pytest.raises((ValueError, TypeError)) as err:
        init_state(build(value))
    assert names(str(err.value), target[1]) or f"{target[1]}[0]" in str(err.value), str(err.value)


def test_state_attributes_survive_clone():
    model = pl.states.RBM(alpha=2.0).clone(alpha=1.0)
    assert init_state(model)["params"]["kernel"].shape == (4, 4)
    with pytest.raises(ValueError, match="alpha"):
        init_state(pl.states.RBM().clone(alpha=-1.0))


def test_zero_site_configurations_are_refused_clearly():
    with pytest.raises(ValueError, match="at least one site"):
        pl.states.RBM().init(jax.random.PRNGKey(0), jnp.ones((2, 0)))


@settings(max_examples=12, deadline=None)
@given(model=st.sampled_from(["RBM", "TwoBodyJastrow", "FeedForward"]),
       m=st.integers(1, 9).filter(lambda m: m != 6))
def test_a_state_names_the_size_it_was_built_for(model, m):
    state = getattr(pl.states, model)()
    variables = init_state(state, 6)
    with pytest.raises(ValueError, match=f"built for 6 sites, got configurations of {m} sites"):
        state.apply(variables, jnp.ones((3, m)))


@pytest.mark.parametrize("fast", [True, False])
@pytest.mark.parametrize("m", [5, 7])
def test_local_energy_names_the_operators_size(fast, m):
    model = pl.states.TwoBodyJastrow()
    bound = pl.states.BoundState(model, init_state(model, 6), fast=fast)
    with pytest.raises(ValueError, match=f"{m} sites.*acts on 6 sites"):
        pl.operators.local_estimates(bound, pl.operators.heisenberg(lattice()), jnp.ones((2, m)))


class OnePerSite(pl.states.TrialState):
    """A faulty state: one number per site instead of one per configuration."""

    def log_amplitude(self, x):
        return 0.1 * x


def test_a_state_with_one_value_per_site_is_refused_clearly():
    with pytest.raises(ValueError, match="one log-amplitude per configuration"):
        init_state(OnePerSite())


def test_samplers_refuse_a_log_amplitude_with_one_value_per_site():
    def per_site(x):
        return 0.1 * x

    for smp in (sampler(), pl.sampling.TemperingSampler(space(), n_chains=2, bonds=lattice().bonds)):
        with pytest.raises(ValueError, match="one log-amplitude per configuration"):
            smp.init(jax.random.PRNGKey(0), per_site)


@given(betas=st.one_of(st.text(max_size=3), st.just([True, False]), st.just([1.0, 0.5j]),
                       st.just(["1", "0.5"]), st.just([1.0, None])))
def test_tempering_betas_must_be_real_numbers(betas):
    with pytest.raises((ValueError, TypeError), match="beta"):
        pl.sampling.TemperingSampler(space(), betas=betas)


@given(spin=st.integers(max_value=-1))
def test_atom_spin_is_never_negative(spin):
    with pytest.raises(ValueError, match="spin"):
        pl.electrons.atom("Li", spin=spin)


@pytest.mark.parametrize("symbol", [None, [3], 1j])
def test_atom_names_a_symbol_that_is_neither_element_nor_charge(symbol):
    with pytest.raises((ValueError, TypeError), match="symbol"):
        pl.electrons.atom(symbol)


@given(step_size=not_a_positive_real)
def test_electron_sampler_step_size_is_a_finite_positive_length(step_size):
    with pytest.raises((ValueError, TypeError), match="step_size"):
        pl.electrons.ElectronSampler(pl.electrons.atom("He"), step_size=step_size)


OTHER_OPTIONS = {  # each value would pass as a valid one if converted (True → 1, "1" → 1.0)
    "Mixture weight": ([True, "1", np.array(True)],
                       lambda v: pl.sampling.Mixture((pl.sampling.single_flip,), (v,))),
    "spin_parity": ([True, np.True_], lambda v: init_state(pl.states.Symmetrized(
        pl.states.RBM(), pl.symmetry.translations(pl.lattices.chain(4)), spin_parity=v))),
}


@pytest.mark.parametrize("arg, value", [(a, v) for a, (vs, _) in sorted(OTHER_OPTIONS.items()) for v in vs])
def test_other_options_refuse_values_that_only_look_valid(arg, value):
    with pytest.raises((ValueError, TypeError)) as err:
        OTHER_OPTIONS[arg][1](value)
    assert arg in str(err.value), str(err.value)


# --------------------------------------------------------------------------- NaN at step k


def test_nan_update_at_step_k_leaves_the_checkpoint_of_step_k_minus_1(tmp_path):
    run = search(optimizer=sgd_failing_at())
    for k in (1, 4):
        start = run.init(jax.random.PRNGKey(k))
        start = fail_at_step(start, k)
        path = str(tmp_path / f"nan{k}.ckpt")
        with pytest.raises(NonFiniteError) as err:
            run.run(k + 2, state=start, progress=False, checkpoint=path, checkpoint_every=1, steps_per_visit=1)
        assert err.value.step == k and f"step {k}" in str(err.value)
        if k == 1:  # nothing good happened: no checkpoint at all, and no lock or temporary file
            assert not any("nan1" in f for f in os.listdir(tmp_path))
            continue
        good, _ = run.run(k - 1, state=start, progress=False, steps_per_visit=1)
        saved, history = run.resume(path)
        assert int(saved.step) == k - 1 and trees_equal(saved, good)
        assert list(history["step"]) == list(range(1, k))


# --------------------------------------------------------------------------- kill -9

TRAINER = textwrap.dedent("""
    import jax, optax
    jax.config.update("jax_enable_x64", True)
    import psiloom as pl
    lat = pl.lattices.chain(6)
    sampler = pl.sampling.MetropolisChains(pl.spaces.SpinSpace(6, magnetisation=0), n_chains=4, bonds=lat.bonds)
    search = pl.train.GroundStateSearch(pl.states.RBM(alpha=1.0, init_scale=0.05), pl.operators.heisenberg(lat),
                                        sampler, optax.sgd(0.05), n_samples=16)  # search(optax.sgd(0.05)) below
    search.run(10**6, key=jax.random.PRNGKey(9), progress=False, checkpoint={path!r}, checkpoint_every=1)
""")


def litter(path):
    base = os.path.basename(path)
    return sorted(f for f in os.listdir(os.path.dirname(path)) if f != base)


def test_kill_9_during_checkpoint_writes_leaves_a_loadable_checkpoint(tmp_path):
    rng = np.random.default_rng(2026)
    env = dict(os.environ, PYTHONPATH=SRC + os.pathsep + os.environ.get("PYTHONPATH", ""))
    paths, procs = [], []
    try:
        for i in range(2):  # two trainers at once (start-up dominates), killed at different moments
            (tmp_path / f"kill{i}").mkdir()
            paths.append(str(tmp_path / f"kill{i}" / "run.ckpt"))
            procs.append(subprocess.Popen([sys.executable, "-c", TRAINER.format(path=paths[-1])],
                                          stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env, text=True))
        for path, proc in zip(paths, procs):
            deadline = time.time() + 150
            while not os.path.exists(path) and proc.poll() is None and time.time() < deadline:
                time.sleep(0.02)
            assert os.path.exists(path), f"the trainer wrote no checkpoint: {proc.poll()}"
            time.sleep(float(rng.uniform(0.05, 0.6)))  # a random moment among the per-step writes
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(timeout=30)
            assert proc.returncode == -signal.SIGKILL
    finally:
        for proc in procs:
            if proc.poll() is None:
                os.kill(proc.pid, signal.SIGKILL)
                proc.wait(timeout=30)
    s = search(optax.sgd(0.05))  # plain SGD: a cheaper compilation than SR, the same checkpoint path
    for path in paths:
        state, history = s.resume(path)  # the kill never leaves a damaged or missing checkpoint
        assert int(state.step) >= 1 and len(history) == int(state.step)
        # a new run takes over the dead writer's lock; its write removes the dead writer's temp files
        s.run(int(state.step) + 1, state=state, history=history, progress=False, checkpoint=path,
              checkpoint_every=1)
        assert litter(path) == []
        assert int(s.resume(path)[0].step) == int(state.step) + 1
