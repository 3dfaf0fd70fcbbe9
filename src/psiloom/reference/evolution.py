"""Exact time evolution of state vectors on small spaces by the sparse matrix exponential.

Real time (ħ = 1, the time unit is the inverse of the Hamiltonian's energy unit):

    |ψ(t)⟩ = exp(−i H (t − t₀)) |ψ(t₀)⟩ ,

imaginary time (``imaginary=True``), renormalised after every interval:

    |ψ(τ)⟩ = exp(−H (τ − τ₀)) |ψ(τ₀)⟩ / ‖·‖ .

Both are applied interval by interval over the given time grid with
``scipy.sparse.linalg.expm_multiply`` (Al-Mohy & Higham 2011), which never forms the dense
exponential. Vectors live in the basis order of ``space.configurations()`` (the order of
:meth:`psiloom.operators.PauliSum.sparse_matrix` and of :func:`psiloom.reference.state_vector`).
The grid need not be uniform; it must be non-decreasing from its first entry, the time of the
given vector.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from psiloom._validation import boolean
from psiloom.reference.lanczos import operator_matrix
from psiloom.reference.vectors import _vector
from psiloom.spaces import SpinSpace

__all__ = ["evolve_state", "evolve_expectations"]


def _expm_multiply(generator, v):
    """``expm(generator) @ v`` by ``scipy.sparse.linalg.expm_multiply`` (imported on use)."""
    import scipy.sparse.linalg

    return scipy.sparse.linalg.expm_multiply(generator, v)


def check_time_grid(times, name: str = "times", strict: bool = True) -> np.ndarray:
    """``times`` as a 1-D float array, finite and increasing (strictly unless ``strict=False``)."""
    t = np.asarray(times)
    if t.dtype == bool or not (np.issubdtype(t.dtype, np.integer) or np.issubdtype(t.dtype, np.floating)):
        raise TypeError(f"{name} must be real numbers, got {times!r}")
    t = t.astype(float).reshape(-1) if t.ndim == 0 else t.astype(float)
    if t.ndim != 1 or t.size == 0:
        raise ValueError(f"{name} must be a non-empty 1-D sequence of times, got shape {np.shape(times)}")
    if not np.all(np.isfinite(t)):
        raise ValueError(f"{name} must be finite, got {times!r}")
    steps = np.diff(t)
    bad = np.flatnonzero(steps <= 0) if strict else np.flatnonzero(steps < 0)
    if bad.size:
        i = int(bad[0])
        raise ValueError(f"{name} must be {'strictly ' if strict else ''}increasing, got "
                         f"{t[i]!r} followed by {t[i + 1]!r} (positions {i} and {i + 1})")
    return t


def _initial(vector, size: int) -> np.ndarray:
    """The validated start vector (see :func:`psiloom.reference.vectors._vector`), normalised, complex."""
    v = _vector(vector, size)
    return v.astype(complex) / np.linalg.norm(v)


def evolve_state(hamiltonian, vector, times, space: SpinSpace | None = None, imaginary: bool = False) -> np.ndarray:
    """Normalised states at every time of ``times`` (the first entry is the time of ``vector``).

    Args:
        hamiltonian: a PauliSum (or a square matrix in the basis of ``space``).
        vector: the state at ``times[0]`` (need not be normalised).
        times: non-decreasing times (or imaginary times τ).
        space: the configuration space (default: all 2^N configurations of a PauliSum).
        imaginary: evolve with exp(−Hτ) and renormalise instead of exp(−iHt).

    Returns:
        ``(len(times), dim)`` complex128 array of unit vectors.
    """
    imaginary = boolean("imaginary", imaginary)
    t = check_time_grid(times, strict=False)
    h = operator_matrix(hamiltonian, space).tocsr()
    v = _initial(vector, h.shape[0])
    gen = -h if imaginary else -1j * h
    out = np.empty((t.size, v.size), complex)
    out[0] = v
    for i in range(1, t.size):
        dt = t[i] - t[i - 1]
        if dt > 0:
            v = _expm_multiply(gen * dt, v)
            v = v / np.linalg.norm(v)
        out[i] = v
    return out


def evolve_expectations(hamiltonian, vector, times, observables: Mapping[str, object],
                        space: SpinSpace | None = None, imaginary: bool = False) -> dict[str, np.ndarray]:
    """⟨ψ(t)|O|ψ(t)⟩ of each named observable at every time of ``times`` (see :func:`evolve_state`).

    Returns ``{name: (len(times),) array}``, real for Hermitian observables, else complex.
    Memory holds one state at a time (plus the sparse matrices).
    """
    imaginary = boolean("imaginary", imaginary)
    if not isinstance(observables, Mapping) or not observables:
        raise TypeError(f"observables must be a non-empty mapping name -> operator, got {observables!r}")
    t = check_time_grid(times, strict=False)
    h = operator_matrix(hamiltonian, space).tocsr()
    mats = {name: operator_matrix(op, space).tocsr() for name, op in observables.items()}
    for name, m in mats.items():
        if m.shape != h.shape:
            raise ValueError(f"observable {name!r} acts on {m.shape[0]} states, the Hamiltonian on {h.shape[0]}")
    v = _initial(vector, h.shape[0])
    gen = -h if imaginary else -1j * h
    values = {name: np.empty(t.size, complex) for name in mats}
    for i in range(t.size):
        if i and t[i] > t[i - 1]:
            v = _expm_multiply(gen * (t[i] - t[i - 1]), v)
            v = v / np.linalg.norm(v)
        for name, m in mats.items():
            values[name][i] = np.vdot(v, m @ v)
    out = {}
    for name, vals in values.items():
        herm = getattr(observables[name], "is_hermitian", None)
        if callable(herm):
            hermitian = herm()
        else:
            diff = mats[name] - mats[name].conj().T
            hermitian = diff.nnz == 0 or float(abs(diff).max()) <= 1e-12
        out[name] = vals.real.copy() if hermitian else vals
    return out
