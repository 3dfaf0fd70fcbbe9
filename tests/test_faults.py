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
    return pl.spaces.SpinSpace(6, total_sz=0)


def sampler(n_chains=4):
    return pl.sampling.MetropolisSampler(space(), n_chains=n_chains, bonds=lattice().bonds)


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
    "length": lambda v: pl.lattices.chain(v),
    "lx": lambda v: pl.lattices.square(v, 3),
    "n_sites": lambda v: pl.spaces.SpinSpace(v),
    "n_chains": lambda v: pl.sampling.MetropolisSampler(space(), n_chains=v),
    "n_samples": lambda v: search(n_samples=v),
}


@settings(max_examples=60, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(arg=st.sampled_from(sorted(CONSTRUCTORS)), value=not_a_count)
def test_constructors_refuse_what_is_not_a_count_naming_the_argument(arg, value):
    # the project rule (DEVELOPERS.md): bad input raises ValueError/TypeError naming the value
    with pytest.raises((ValueError, TypeError)) as err:
        CONSTRUCTORS[arg](value)
    assert names(str(err.value), arg), str(err.value)


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
    assert names(str(err.value), arg), str(err.value)


@given(position=st.sampled_from([math.nan, math.inf, -math.inf]), axis=st.integers(0, 2))
def test_molecule_refuses_non_finite_nuclear_positions(position, axis):
    where = [0.0, 0.0, 0.0]
    where[axis] = position
    with pytest.raises(ValueError, match="finite"):
        pl.electrons.molecule([("H", [0.0, 0.0, 0.0]), ("H", where)])


# --------------------------------------------------------------------------- NaN at step k

def nan_at_step():
    """SGD whose update turns NaN at the (1-based) step held in its state; the step is data, so
    one compiled program serves every k."""

    def init(params):
        return {"count": jnp.zeros((), jnp.int32), "at": jnp.zeros((), jnp.int32)}

    def update(grads, state, params=None):
        count = state["count"] + 1
        nan = jnp.where(count == state["at"], jnp.nan, 0.0)
        return jax.tree_util.tree_map(lambda g: -0.05 * g + nan, grads), {"count": count, "at": state["at"]}

    return optax.GradientTransformation(init, update)


def leaves_equal(a, b) -> bool:
    la, lb = jax.tree_util.tree_leaves(a), jax.tree_util.tree_leaves(b)
    return len(la) == len(lb) and all(np.array_equal(np.asarray(x), np.asarray(y)) for x, y in zip(la, lb))


def test_nan_update_at_step_k_leaves_the_checkpoint_of_step_k_minus_1(tmp_path):
    run = search(optimizer=nan_at_step())
    for k in (1, 4):
        start = run.init(jax.random.PRNGKey(k))
        start = start._replace(opt_state={**start.opt_state, "at": jnp.asarray(k, jnp.int32)})
        path = str(tmp_path / f"nan{k}.ckpt")
        with pytest.raises(NonFiniteError) as err:
            run.run(k + 2, state=start, progress=False, checkpoint=path, checkpoint_every=1, steps_per_visit=1)
        assert err.value.step == k and f"step {k}" in str(err.value)
        if k == 1:  # nothing good happened: no checkpoint at all, and no lock or temporary file
            assert not any("nan1" in f for f in os.listdir(tmp_path))
            continue
        good, _ = run.run(k - 1, state=start, progress=False, steps_per_visit=1)
        saved, history = run.resume(path)
        assert int(saved.step) == k - 1 and leaves_equal(saved, good)
        assert list(history["step"]) == list(range(1, k))


# --------------------------------------------------------------------------- kill -9

TRAINER = textwrap.dedent("""
    import jax, optax
    jax.config.update("jax_enable_x64", True)
    import psiloom as pl
    lat = pl.lattices.chain(6)
    sampler = pl.sampling.MetropolisSampler(pl.spaces.SpinSpace(6, total_sz=0), n_chains=4, bonds=lat.bonds)
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
