"""Per-step timing breakdown of GroundStateSearch (profile_step, run(profile_every=...)).

Timings themselves are not asserted against targets (those live in benchmarks/); these tests
check that the breakdown is complete, consistent, and leaves the optimisation untouched.
"""

import math

import jax
import numpy as np
import optax
import pytest
from hypothesis import given
from hypothesis import strategies as st

import psiloom as pl

PHASES = ("sampling", "local_energy", "gradient", "solve")


@pytest.fixture(scope="module")
def search():
    lattice = pl.lattices.chain(6)
    space = pl.spaces.SpinSpace(6, magnetisation=0)
    sampler = pl.sampling.MetropolisChains(space, n_chains=4, bonds=lattice.bonds)
    optimizer = optax.chain(pl.optimize.stochastic_reconfiguration(shift=1e-2), optax.sgd(0.05))
    return pl.train.GroundStateSearch(pl.states.RBM(alpha=1), pl.operators.heisenberg(lattice, marshall_basis=True),
                                      sampler, optimizer, n_samples=32)


def test_profile_step_reports_every_phase(search):
    state = search.init(jax.random.PRNGKey(0))
    times = search.profile_step(state, repeat=2)
    assert set(times) == set(PHASES) | {"total", "step"}
    assert all(math.isfinite(t) and t > 0 for t in times.values())
    assert times["total"] == pytest.approx(sum(times[p] for p in PHASES), rel=1e-12)
    assert int(state.step) == 0  # the state is not advanced


def test_profiled_run_records_phases_and_matches_plain_run(search):
    key = jax.random.PRNGKey(3)
    _, plain = search.run(4, key=key, progress=False)
    _, profiled = search.run(4, key=key, progress=False, profile_every=3)
    # profiling runs separate programs on copies: the optimisation itself is unchanged
    np.testing.assert_array_equal(profiled["energy"], plain["energy"])
    for phase in PHASES:
        column = profiled[f"t_{phase}"]
        assert len(column) == 4
        assert np.all(np.isfinite(column[[0, 3]])) and np.all(column[[0, 3]] > 0)  # first step and step 3
        assert np.all(np.isnan(column[[1, 2]]))
    assert "t_sampling" not in plain.columns


@given(repeat=st.one_of(st.integers(max_value=0), st.floats(allow_nan=True), st.booleans(), st.text(max_size=2)))
def test_profile_step_rejects_bad_repeat(search, repeat):
    with pytest.raises(ValueError, match="repeat"):
        search.profile_step(None, repeat=repeat)


@given(every=st.one_of(st.integers(max_value=-1), st.floats(allow_nan=True), st.booleans()))
def test_run_rejects_bad_profile_every(search, every):
    with pytest.raises(ValueError, match="profile_every"):
        search.run(1, progress=False, profile_every=every)
