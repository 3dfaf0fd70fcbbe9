"""Pure VMC functions, the outer loop (k-step device visits, non-finite stops), checkpoint files
(damage, crafted files, locks), resume checks and input validation of the loop."""

from __future__ import annotations

import json
import os
import pickle
import subprocess
import sys

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import psiloom as pl
from psiloom.stats import parenthesis_notation
from psiloom.checkpoint import CheckpointError, CheckpointLock, load_checkpoint, run_meta, save_checkpoint
from psiloom.history import History
from psiloom.spaces import SpinSpace
from psiloom.testing import compilations, trees_equal
from psiloom.states import RBM
from psiloom.train import GroundStateSearch, NonFiniteError
from psiloom.vmc import vmc

L = 6


def parts(n_chains=4, magnetisation=0, n_sites=L, alpha=1.0, complex_params=False, optimizer=None):
    lat = pl.lattices.chain(n_sites)
    space = SpinSpace(n_sites, magnetisation=magnetisation)
    sampler = pl.sampling.MetropolisChains(space, n_chains=n_chains, bonds=lat.bonds if magnetisation is not None else None)
    if optimizer is None:
        optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05))
    model = RBM(alpha=alpha, complex_params=complex_params, init_scale=0.05)
    return model, pl.operators.heisenberg(lat), sampler, optimizer


def make(n_samples=32, **kw):
    return GroundStateSearch(*parts(**kw), n_samples=n_samples)


@pytest.fixture(scope="module")
def search():
    return make()


@pytest.fixture(scope="module")
def start(search):
    return search.init(jax.random.PRNGKey(11))


@pytest.fixture(scope="module")
def saved(search, start, tmp_path_factory):
    """A checkpoint after 2 steps, its bytes and the state it holds."""
    state, history = search.run(2, state=start, progress=False)
    path = str(tmp_path_factory.mktemp("ckpt") / "run.ckpt")
    search.save(path, state, history)
    with open(path, "rb") as f:
        data = f.read()
    return path, data, state, history


# --------------------------------------------------------------------------- pure functions

def test_pure_steps_equal_the_facade_step_and_k_step_visits(search, start):
    pure = vmc(*parts(), n_samples=32)  # built separately from the same ingredients
    assert trees_equal(pure.init(jax.random.PRNGKey(11)), start)
    pure_step = jax.jit(pure.step)
    state, energies = start, []
    for _ in range(7):
        state, out = pure_step(state)
        energies.append(float(out.energy.mean))
        if len(energies) == 1:
            first, first_out = search.step(start)
            assert trees_equal(first, state) and trees_equal(first_out, out)
    assert int(state.step) == 7 and not trees_equal(state.params, start.params)
    # visits of 1 (first), 3, 3 steps: one scan program with traced active counts
    scanned, history = search.run(7, state=start, progress=False, steps_per_visit=3)
    np.testing.assert_allclose(history["energy"], energies, rtol=1e-12, atol=1e-12)
    for a, b in zip(jax.tree_util.tree_leaves(scanned), jax.tree_util.tree_leaves(state)):
        np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-10, atol=1e-12)
    assert list(history["step"]) == list(range(1, 8))


def test_progress_lines_hooks_and_history_agree(search, start):
    lines, visits, calls = [], [], []
    _, history = search.run(8, state=start, progress=lines.append, print_every=3, steps_per_visit=3,
                            hooks=[lambda v: visits.append((v.step, len(v.outputs)))])
    assert visits == [(1, 1), (3, 2), (6, 3), (8, 2)]  # first visit one step; cuts at prints and the end
    assert [int(line.split()[1].split("/")[0]) for line in lines] == [1, 3, 6, 8]
    for line in lines:
        step = int(line.split()[1].split("/")[0])
        # the line's energy is the history row's, in parenthesis notation (stats.parenthesis_notation)
        energy = parenthesis_notation(history["energy"][step - 1], history["error"][step - 1], sign=True)
        assert f"E = {energy} " in line and history["step"][step - 1] == step
    # a callback sees every step (visits of one step), with the state after that step
    search.run(3, state=start, progress=False, steps_per_visit=3,
               callback=lambda state, out: calls.append((int(state.step), float(out.energy.mean))))
    assert [c[0] for c in calls] == [1, 2, 3]
    np.testing.assert_array_equal([c[1] for c in calls], history["energy"][:3])


def test_default_training_step_compiles_once():
    search = make()  # fresh: no compiled programs yet
    with compilations() as names:
        # visits of 1, 4, 4 steps from init's state and from states the step returned
        state, _ = search.run(9, key=jax.random.PRNGKey(2), progress=False, steps_per_visit=4)
        search.run(12, state=state, progress=False, steps_per_visit=4)  # a resumed run, a 3-step visit
    # the compile log counts compilations (a jitted function's dispatch-cache size can be trimmed by JAX)
    assert names.count("jit(multi)") == 1 and len(search._multi) == 1, names


def test_initial_state_is_strongly_typed_so_the_single_step_compiles_once(search, start):
    stepped, _ = search.step(start)
    for a, b in zip(jax.tree_util.tree_leaves(start), jax.tree_util.tree_leaves(stepped)):
        assert (a.dtype, a.weak_type) == (b.dtype, b.weak_type)
    search.step(stepped)
    assert search._step._cache_size() == 1  # a weakly typed init leaf used to cost a second compilation


# --------------------------------------------------------------------------- non-finite stops

def poison_at(step: int, where: str) -> optax.GradientTransformation:
    """SGD whose update (``where="updates"``) or state (``"state"``) turns NaN at ``step`` (1-based)."""

    def init(params):
        return {"count": jnp.zeros((), jnp.int32), "junk": jnp.zeros(())}

    def update(grads, state, params=None):
        count = state["count"] + 1
        nan = jnp.where(count == step, jnp.nan, 0.0)
        upd = jax.tree_util.tree_map(lambda g: -0.05 * g + (nan if where == "updates" else 0.0), grads)
        return upd, {"count": count, "junk": state["junk"] + (nan if where == "state" else 0.0)}

    return optax.GradientTransformation(init, update)


@pytest.mark.parametrize("where, what", [("updates", "parameters"), ("state", "optimiser state")])
def test_non_finite_inside_a_visit_stops_at_the_right_step(tmp_path, where, what):
    run = GroundStateSearch(*parts(optimizer=poison_at(6, where)), n_samples=32)
    start = run.init(jax.random.PRNGKey(4))
    good, _ = run.run(5, state=start, progress=False, steps_per_visit=3)  # the same compiled program
    path = str(tmp_path / "nan.ckpt")
    # visits: [1], [2 3 4] (checkpoint at 4), [5 6 7]: step 6 is bad in the middle of a scan
    with pytest.raises(NonFiniteError) as err:
        run.run(10, state=start, progress=False, checkpoint=path, checkpoint_every=4, steps_per_visit=3)
    assert err.value.step == 6 and err.value.what == what and f"non-finite {what} at step 6" in str(err.value)
    # the state did not advance past the last good step, and step 7 was not taken either
    assert int(err.value.state.step) == 5 and trees_equal(err.value.state, good)
    assert list(err.value.history["step"]) == [1, 2, 3, 4, 5]
    saved, hist = run.resume(path)
    assert int(saved.step) == 4 and len(hist) == 4
    assert all(np.all(np.isfinite(np.asarray(l))) for l in jax.tree_util.tree_leaves(saved))
    assert not os.path.exists(path + ".lock")  # released on the error


def test_shift_zero_sr_on_a_degenerate_metric_never_reaches_the_checkpoint(tmp_path):
    # a parameter that does not enter log ψ (zero log-derivative column) makes the SR metric
    # singular; without a diagonal shift the solve is 0/0 (common practice: shift > 0 regularises)
    import flax.linen as nn

    from psiloom.states import TrialState

    class WithSpectator(TrialState):
        @nn.compact
        def log_amplitude(self, x):
            w = self.param("w", nn.initializers.normal(0.1), (x.shape[-1],), jnp.float64)
            s = self.param("spectator", nn.initializers.zeros, (), jnp.float64)
            return x @ w + 0.0 * s

    model, ham, sampler, _ = parts()

    def search(shift):
        opt = optax.chain(pl.optimize.stochastic_reconfiguration(shift=shift, solver="dense"), optax.sgd(0.05))
        return GroundStateSearch(WithSpectator(), ham, sampler, opt, n_samples=32)

    path = str(tmp_path / "sr.ckpt")
    good, _ = search(1e-2).run(2, key=jax.random.PRNGKey(0), progress=False, checkpoint=path)
    before = open(path, "rb").read()
    degenerate = search(0.0)
    with pytest.raises(NonFiniteError) as err:
        degenerate.run(4, state=good, progress=False, checkpoint=path, checkpoint_every=1)
    assert err.value.step == 3 and err.value.what == "parameters"
    assert open(path, "rb").read() == before
    saved, _ = degenerate.resume(path)
    assert trees_equal(saved, good)


# --------------------------------------------------------------------------- checkpoint files

def test_checkpoint_header_is_json_and_describes_the_run(saved, search):
    path, data, state, history = saved
    first, rest = data.split(b"\n", 1)
    magic, n_head, _ = first.split(b" ")
    header = json.loads(rest[: int(n_head)])
    assert magic == b"psiloom-checkpoint" and header["n_chains"] == 4 and header["x64"] is True
    assert header["space"] == {"type": "SpinSpace", "n_sites": L, "magnetisation": 0}
    assert header["psiloom_version"] == pl.__version__
    assert [leaf[1] for leaf in header["state"]["params"]["leaves"]] == [[L], [L, L], [L]]
    back, hist = search.resume(path)
    assert trees_equal(back, state) and trees_equal(hist.columns, history.columns)


@settings(max_examples=40, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(cut=st.integers(0, 10**6))
def test_truncated_checkpoint_is_refused(saved, search, tmp_path, cut):
    path, data, _, _ = saved
    cut = cut % len(data)
    bad = str(tmp_path / "cut.ckpt")
    with open(bad, "wb") as f:
        f.write(data[:cut])
    with pytest.raises(CheckpointError, match="cut.ckpt"):
        search.resume(bad)


@settings(max_examples=80, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(position=st.integers(0, 10**6), bit=st.integers(0, 7))
def test_flipped_bit_is_refused_or_harmless(saved, search, tmp_path, position, bit):
    path, data, state, history = saved
    position %= len(data)
    damaged = bytearray(data)
    damaged[position] ^= 1 << bit
    bad = str(tmp_path / "flip.ckpt")
    with open(bad, "wb") as f:
        f.write(bytes(damaged))
    try:
        back, hist = search.resume(bad)
    except CheckpointError as err:
        assert "flip.ckpt" in str(err)
    else:  # never altered numbers
        assert trees_equal(back, state) and trees_equal(hist.columns, history.columns)


class Exploit:
    def __reduce__(self):
        return (os.system, (f"touch {EXPLOIT_MARK}",))


EXPLOIT_MARK = os.path.join(os.path.dirname(os.path.abspath(__file__)), ".exploit-ran")


def test_crafted_files_are_never_executed(search, saved, tmp_path):
    from flax import serialization

    if os.path.exists(EXPLOIT_MARK):
        os.unlink(EXPLOIT_MARK)
    crafted = str(tmp_path / "pickle.ckpt")
    with open(crafted, "wb") as f:
        pickle.dump({"version": 1, "state": Exploit()}, f)  # the old format, with a payload that runs code
    with pytest.raises(CheckpointError, match="not a psiloom checkpoint"):
        search.resume(crafted)
    # a well-formed header with valid checksums around a pickle / a foreign msgpack payload
    path, data, _, _ = saved
    first, rest = data.split(b"\n", 1)
    header = json.loads(rest[: int(first.split(b" ")[1])])
    for payload in (pickle.dumps(Exploit()), serialization.msgpack_serialize({"leaves": {"0": "import os"}})):
        import hashlib

        header.update(payload_bytes=len(payload), payload_sha256=hashlib.sha256(payload).hexdigest())
        head = json.dumps(header).encode()
        with open(crafted, "wb") as f:
            f.write(b"psiloom-checkpoint %d %s\n" % (len(head), hashlib.sha256(head).hexdigest().encode()) + head + payload)
        with pytest.raises(CheckpointError):
            search.resume(crafted)
    assert not os.path.exists(EXPLOIT_MARK)


# --------------------------------------------------------------------------- resume checks

@pytest.mark.parametrize("other, words", [
    (dict(n_chains=8), "chain count: 4 in the checkpoint, 8 in this run"),
    (dict(magnetisation=1), "magnetisation sector magnetisation: 0 in the checkpoint, 1 in this run"),
    (dict(n_sites=8), "n_sites: 6 in the checkpoint, 8 in this run"),
    (dict(complex_params=True), "parameters are real in the checkpoint but complex in this run"),
    (dict(alpha=2.0), "model parameter .*kernel.* has shape \\[6, 6\\] in the checkpoint, \\[6, 12\\]"),
    (dict(optimizer=optax.adam(1e-3)), "optimiser state structure differs"),
], ids=["chains", "sector", "sites", "complex", "shapes", "optimiser"])
def test_resume_names_every_mismatch(saved, other, words):
    path = saved[0]
    n_samples = 32 if other.get("n_chains", 4) == 4 else 64
    with pytest.raises(CheckpointError, match=words):
        make(n_samples=n_samples, **other).resume(path)


def test_resume_checks_the_x64_setting(saved, search):
    with pytest.raises(CheckpointError, match="x64 setting: enabled in the checkpoint, disabled in this run"):
        load_checkpoint(saved[0], search.template(), {**search.meta(), "x64": False})


def test_run_refuses_a_state_of_another_search(start):
    other = make(n_samples=64, n_chains=8)
    with pytest.raises(ValueError, match="chain count: 4 in the given state, 8 in this search"):
        other.run(3, state=start, progress=False)
    wrong_sector = start._replace(chains=start.chains._replace(x=jnp.ones_like(start.chains.x)))
    with pytest.raises(ValueError, match="magnetisation sector: chains have magnetisation=3"):
        make().run(3, state=wrong_sector, progress=False)


def test_run_refuses_a_history_with_gaps(search, saved):
    _, _, state, history = saved
    gappy = History({k: list(v) for k, v in history.columns.items()})
    gappy.columns["step"][0] = 0  # rows 0, 2 for a state at step 2
    with pytest.raises(ValueError, match="history steps are not contiguous 1..2"):
        search.run(3, state=state, history=gappy, progress=False)


# --------------------------------------------------------------------------- locks and temp files

def test_second_writer_of_a_checkpoint_is_refused(search, start, tmp_path):
    path = str(tmp_path / "busy.ckpt")
    other = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        with open(path + ".lock", "w") as f:
            f.write(str(other.pid))
        with pytest.raises(CheckpointError, match=f"process {other.pid}"):
            search.run(1, state=start, progress=False, checkpoint=path)
        assert not os.path.exists(path)
        fresh = make()
        with pytest.raises(CheckpointError, match=f"process {other.pid}"):
            fresh.run(1, progress=False, checkpoint=path)
        assert fresh._template is None and fresh._multi == {}  # refused before any compute
    finally:
        other.kill()
        other.wait()
    # the owner is gone now: its lock is stale and taken over
    search.run(1, state=start, progress=False, checkpoint=path)
    assert os.path.exists(path) and not os.path.exists(path + ".lock")
    with CheckpointLock(path):
        with pytest.raises(CheckpointError, match="another run in this process"):
            CheckpointLock(path).acquire()


def test_stray_temp_files_are_removed_by_the_next_write(start, tmp_path):
    path = str(tmp_path / "s.ckpt")
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    stray = tmp_path / f".s.ckpt.tmp-{dead.pid}-abc"
    stray.write_bytes(b"half a checkpoint")
    unrelated = tmp_path / ".other.ckpt.tmp-1-abc"
    unrelated.write_bytes(b"x")
    save_checkpoint(path, start, None, run_meta())
    assert not stray.exists() and unrelated.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == [".other.ckpt.tmp-1-abc", "s.ckpt"]


def test_history_is_strict_json_with_nan_as_null(tmp_path):
    history = History({"step": [1, 2], "energy": [float("nan"), -1.5], "rhat": [float("inf"), 1.0]})
    path = str(tmp_path / "h.json")
    history.save(path)
    text = open(path).read()
    json.loads(text, parse_constant=lambda c: pytest.fail(f"non-standard JSON constant {c}"))
    back = History.load(path)
    assert np.isnan(back["energy"][0]) and back["energy"][1] == -1.5 and np.isnan(back["rhat"][0])


# --------------------------------------------------------------------------- input validation

@pytest.mark.parametrize("kwargs, name", [
    (dict(checkpoint_every=0), "checkpoint_every"), (dict(checkpoint_every=2.5), "checkpoint_every"),
    (dict(print_every=0), "print_every"), (dict(print_every=-3), "print_every"), (dict(print_every=True), "print_every"),
    (dict(steps_per_visit=0), "steps_per_visit"), (dict(steps_per_visit=1.5), "steps_per_visit"),
    (dict(checkpoint=""), "checkpoint"),
])
def test_run_rejects_bad_loop_arguments(kwargs, name):
    search = make()
    with pytest.raises(ValueError, match=name):
        search.run(3, progress=False, **kwargs)
    assert search._multi == {} and search._step._cache_size() == 0  # nothing was compiled


def test_run_rejects_a_directory_as_checkpoint(tmp_path):
    with pytest.raises(ValueError, match="is a directory"):
        make().run(3, progress=False, checkpoint=str(tmp_path))


@pytest.mark.parametrize("chunk", [2.5, 0, -4, True, "8"])
def test_fractional_or_non_positive_chunk_is_refused(chunk):
    with pytest.raises(ValueError, match="chunk"):
        GroundStateSearch(*parts(), n_samples=32, chunk=chunk)
