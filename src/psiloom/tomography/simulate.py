"""Simulated measurement records from states psiloom can enumerate.

For a state vector ψ over all 2^N configurations (an ED ground state, or a trial state through
:func:`psiloom.reference.state_vector`) and a product basis b, the outcome strings s are drawn
from the Born distribution

    p_b(s) = |ψ_b(s)|² / Σ_x |ψ(x)|²,

with ψ_b from :func:`psiloom.tomography.rotations.rotate_vector`. The draws use an explicit
JAX key, so a record is reproducible from its seed. A vector over a fixed-magnetisation sector
is embedded into the full space first (pass ``space``).
"""

from __future__ import annotations

from typing import Mapping

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import ArgumentTypeError, positive_int
from psiloom.spaces import SpinSpace, codes
from psiloom.tomography.records import MeasurementRecord, basis_codes
from psiloom.tomography.rotations import rotate_vector

__all__ = ["full_vector", "measurement_probabilities", "simulate_record", "pair_bases"]

#: Largest number of sites whose 2^N probabilities this module builds.
MAX_SIMULATED_SITES = 24


def full_vector(vector, space: SpinSpace | None = None) -> np.ndarray:
    """``vector`` over all 2^N configurations (a sector vector of ``space`` is embedded with zeros
    elsewhere); normalised, complex128."""
    v = np.asarray(vector)
    if v.ndim != 1 or v.size == 0:
        raise ValueError(f"a state vector must be a non-empty 1-D array, got shape {v.shape}")
    if not np.all(np.isfinite(v)):
        raise ValueError("the state vector holds nan or inf")
    if space is not None:
        if not isinstance(space, SpinSpace):
            raise ArgumentTypeError(f"space must be a SpinSpace, got {type(space).__name__}")
        if v.size != space.size:
            raise ValueError(f"the vector has {v.size} entries, the space {space.size} configurations")
        if space.n_sites > MAX_SIMULATED_SITES:
            raise ValueError(f"{space.n_sites} sites: at most {MAX_SIMULATED_SITES} can be simulated exactly")
        if space.is_sector:
            full = np.zeros(2**space.n_sites, np.complex128)
            full[codes(space.configurations())] = v
            v = full
    if v.size & (v.size - 1) or v.size < 2:
        raise ValueError(f"a vector over all configurations has 2^N entries, got {v.size} (pass its space)")
    norm = np.linalg.norm(v)
    if norm == 0:
        raise ValueError("the state vector is zero")
    return (v / norm).astype(np.complex128)


def measurement_probabilities(vector, bases: str, space: SpinSpace | None = None) -> np.ndarray:
    """The Born probabilities ``p_b(s)`` of every outcome string (configuration order)."""
    p = np.abs(rotate_vector(full_vector(vector, space), bases)) ** 2
    return p / p.sum()


def pair_bases(n_sites: int, letters=("XX", "XY", "YX", "YY"), periodic: bool = True) -> list[str]:
    """Bases rotating one pair of neighbouring sites (i, i+1) of a chain to ``letters``, Z
    elsewhere: the measurement settings of two-site rotations, ``n_sites·len(letters)`` of them
    on a ring (``n_sites − 1`` pairs when open)."""
    n = positive_int("n_sites", n_sites)
    out = []
    for i in range(n if periodic and n > 2 else n - 1):
        j = (i + 1) % n
        for pair in letters:
            basis_codes(pair, 2)
            row = ["Z"] * n
            row[i], row[j] = pair[0].upper(), pair[1].upper()
            out.append("".join(row))
    return out


def simulate_record(key: jax.Array, vector, bases, n_shots, space: SpinSpace | None = None) -> MeasurementRecord:
    """Draw shots of a state vector in one or several product bases.

    Args:
        key: JAX PRNG key (the record is a function of it).
        vector: ψ over ``space`` (default: all 2^N configurations).
        bases: a basis string (``"ZZZZ"``), a sequence of them, or a mapping basis → shots.
        n_shots: shots per basis (an int), or ignored when ``bases`` is a mapping.
        space: the space of ``vector`` when it is a sector vector.

    Returns:
        A :class:`MeasurementRecord` with the shots of each basis in the order given.
    """
    v = full_vector(vector, space)
    n = v.size.bit_length() - 1
    if isinstance(bases, str):
        plan = {bases: n_shots}
    elif isinstance(bases, Mapping):
        plan = dict(bases)
    else:
        bases = list(bases)
        if not bases:
            raise ValueError("bases is empty: name at least one measurement basis")
        plan = {}
        for b in bases:
            plan[b] = plan.get(b, 0) + positive_int("n_shots", n_shots)
    if not plan:
        raise ValueError("bases is empty: name at least one measurement basis")
    outcomes, codes_out = [], []
    keys = jax.random.split(key, len(plan))
    configs = SpinSpace(n).configurations().astype(np.int8)
    for k, (b, count) in zip(keys, plan.items()):
        count = positive_int(f"n_shots of basis {b!r}", count)
        code_row = basis_codes(b, n)
        p = measurement_probabilities(v, b)
        index = np.asarray(jax.random.choice(k, p.size, shape=(count,), p=jnp.asarray(p)))
        outcomes.append(configs[index])
        codes_out.append(np.broadcast_to(code_row, (count, n)))
    return MeasurementRecord(np.concatenate(outcomes), np.concatenate(codes_out))
