"""Geometry scans: one molecule at a sequence of geometries, each run warm-started from the last.

For geometries G_1, G_2, … of the same atoms (same elements in the same order, same n_up and
n_down) :func:`geometry_scan` optimises and evaluates the trial state at each in turn. From the
second geometry on it starts from the previous geometry's end point:

* parameters: the previous optimised parameters (the parameter tree depends only on the atom
  list and the electron counts, not on the positions);
* walkers: the previous walkers, each electron moved rigidly with the nucleus it was closest to,
  r_i ← r_i + (R_I^new − R_I^old), I = argmin_J |r_i − R_J^old| (electrons follow their atoms),
  then re-equilibrated by the sampler's burn-in.

Each point yields a :class:`ScanPoint` with the evaluation pass (energy components, local
energies and samples, for densities, dipoles and differences; see
:mod:`psiloom.electrons.properties`).
"""

from __future__ import annotations

import time
from typing import Any, Callable, Iterator, NamedTuple, Sequence

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import nonnegative_int, positive_int
from psiloom.electrons.observables import EvaluationPass, evaluation_pass
from psiloom.electrons.sampler import WalkerState
from psiloom.electrons.system import Molecule


class ScanPoint(NamedTuple):
    """One geometry of a scan: its position in the list, the molecule, the evaluation pass, the
    final training state and history, wall seconds (compilation included), and whether it was
    warm-started."""

    geometry: int
    system: Molecule
    evaluation: EvaluationPass
    state: Any  # the TrainState at the end of this point's optimisation
    history: Any
    seconds: float
    warm_start: bool


def check_scan(systems: Sequence[Molecule]) -> list[Molecule]:
    """The geometries as a list; ValueError when empty or when the atom lists or electron counts differ."""
    systems = list(systems)
    if not systems:
        raise ValueError("a geometry scan needs at least one geometry")
    for k, system in enumerate(systems):
        if not isinstance(system, Molecule):
            raise ValueError(f"geometry {k} must be a psiloom.electrons.Molecule, got {type(system).__name__}")
    first = systems[0]
    for k, system in enumerate(systems[1:], start=1):
        if system.symbols != first.symbols or not np.array_equal(system.charges, first.charges):
            raise ValueError(f"geometry {k} has atoms {list(system.symbols)}, geometry 0 has {list(first.symbols)}: "
                             "a scan moves the same atoms (same elements in the same order)")
        if (system.n_up, system.n_down) != (first.n_up, first.n_down):
            raise ValueError(f"geometry {k} has n_up, n_down = {system.n_up}, {system.n_down}, geometry 0 has "
                             f"{first.n_up}, {first.n_down}: a scan keeps the electron counts")
    return systems


def follow_nuclei(x, old: Molecule, new: Molecule):
    """Walkers ``(..., N, 3)`` with each electron moved by the displacement of its nearest old nucleus."""
    old_pos = jnp.asarray(old.positions, x.dtype)
    shift = jnp.asarray(new.positions - old.positions, x.dtype)
    d2 = jnp.sum((x[..., :, None, :] - old_pos) ** 2, axis=-1)  # (..., N, M)
    return x + shift[jnp.argmin(d2, axis=-1)]


def geometry_scan(systems: Sequence[Molecule], build_search: Callable, steps: int, key: jax.Array,
                  eval_samples: int, burn_in_sweeps: int = 10, first_steps: int | None = None,
                  warm_start: bool = True) -> Iterator[ScanPoint]:
    """Run the geometries in order (module docstring); yields one :class:`ScanPoint` per geometry.

    Args:
        systems: the geometries (:func:`check_scan` validates them).
        build_search: ``system -> GroundStateSearch`` for one geometry (the same trial-state
            design every time; only the molecule changes).
        steps: optimisation steps per warm-started geometry.
        key: PRNG key (folded with the geometry index).
        eval_samples: samples of each evaluation pass.
        burn_in_sweeps: sweeps discarded before each evaluation pass.
        first_steps: steps at the first geometry (default ``steps``), which starts cold.
        warm_start: set False to start every geometry afresh (for comparison).
    """
    systems = check_scan(systems)
    steps = positive_int("steps", steps)
    first_steps = steps if first_steps is None else positive_int("first_steps", first_steps)
    nonnegative_int("burn_in_sweeps", burn_in_sweeps)
    previous: ScanPoint | None = None
    for k, system in enumerate(systems):
        start = time.perf_counter()
        search = build_search(system)
        if getattr(search.sampler, "system", system) != system and not _same_geometry(search.sampler.system, system):
            raise ValueError(f"build_search returned a search for {search.sampler.system!r}, expected {system!r}")
        k_init, k_eval = jax.random.split(jax.random.fold_in(key, k))
        warm = False
        if warm_start and previous is not None:
            warm = True
            state = search.init(k_init, params=previous.state.params)
            chains = previous.state.chains
            x = follow_nuclei(chains.x, previous.system, system)
            log_amp = lambda y: search.model.apply(state.params, y)
            state = state._replace(chains=WalkerState(x, jax.jit(log_amp)(x), chains.step_size))
            n_steps = steps
        else:
            state = search.init(k_init)
            n_steps = first_steps
        state, history = search.run(n_steps, state=state, progress=False)
        evaluation = evaluation_pass(search, state, eval_samples, k_eval, burn_in_sweeps)
        previous = ScanPoint(k, system, evaluation, state, history, time.perf_counter() - start, warm)
        yield previous


def _same_geometry(a: Molecule, b: Molecule) -> bool:
    return (a.symbols == b.symbols and np.array_equal(a.positions, b.positions)
            and (a.n_up, a.n_down) == (b.n_up, b.n_down))
