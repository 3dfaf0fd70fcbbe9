"""Exact state vectors and expectation values on small spaces (comparing a trial state with ED).

A state vector ``v`` has one amplitude per configuration of ``space.configurations()`` (the basis
order of :meth:`psiloom.operators.PauliSum.sparse_matrix` and of the eigenvectors of
:func:`psiloom.reference.lowest_eigenpairs`). For a trial state with batched ``log ψ`` the exact,
normalised vector is obtained by enumeration,

    v_x = exp(log ψ(x) − c) / sqrt(Σ_y |exp(log ψ(y) − c)|²),     c = max_x Re log ψ(x),

(``c`` keeps the exponentials finite; it cancels in the normalisation), so that

    ⟨O⟩ = ⟨v|O|v⟩ / ⟨v|v⟩                         (:func:`expectation`)
    F   = |⟨v|w⟩|² / (⟨v|v⟩⟨w|w⟩)                  (:func:`fidelity`)

are exact for the trial state, with no sampling error. Both accept complex amplitudes.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from psiloom._validation import positive_int
from psiloom.reference.lanczos import operator_matrix
from psiloom.spaces import SpinSpace

__all__ = ["state_vector", "expectation", "fidelity"]


def state_vector(log_amplitude: Callable, space: SpinSpace, chunk: int = 1 << 14) -> np.ndarray:
    """The normalised vector ``v_x ∝ ψ(x)`` of a trial state over all of ``space`` (NumPy).

    Args:
        log_amplitude: batched ``log ψ``, ``(B, N) -> (B,)``, real or complex (e.g.
            ``lambda x: model.apply(params, x)``); ``-inf`` marks a zero amplitude.
        space: the configuration space to enumerate (at most ``MAX_ENUMERATION`` states).
        chunk: configurations per call of ``log_amplitude``.

    Returns:
        ``(space.size,)`` complex128 (float64 when ``log ψ`` is real), unit norm, in the basis
        order of ``space.configurations()``.
    """
    if not isinstance(space, SpinSpace):
        raise TypeError(f"space must be a SpinSpace, got {type(space).__name__}")
    chunk = positive_int("chunk", chunk)
    states = space.configurations()
    logs = np.concatenate([
        np.asarray(log_amplitude(states[start:start + chunk])).reshape(-1)
        for start in range(0, len(states), chunk)
    ])
    if logs.shape != (len(states),):
        raise ValueError(f"log_amplitude returned {logs.shape[0]} values for {len(states)} configurations")
    real = np.real(logs)
    if np.any(np.isnan(logs)) or np.any(real == np.inf):
        raise ValueError("log_amplitude returned nan or +inf on some configuration")
    top = np.max(real)
    if not np.isfinite(top):
        raise ValueError("the trial state vanishes on every configuration of the space")
    shifted = logs - top
    vec = np.where(real > -np.inf, np.exp(np.where(real > -np.inf, shifted, 0.0)), 0.0)
    if not np.iscomplexobj(logs):
        vec = vec.real
    return vec / np.linalg.norm(vec)


def _vector(vector, size: int | None = None) -> np.ndarray:
    v = np.asarray(vector)
    if v.ndim != 1 or v.size == 0:
        raise ValueError(f"vector must be a non-empty 1-D array, got shape {v.shape}")
    if not np.all(np.isfinite(v)):
        raise ValueError("vector holds nan or inf")
    norm = np.linalg.norm(v)
    if norm == 0:
        raise ValueError("vector is zero")
    if size is not None and v.size != size:
        raise ValueError(f"vector has {v.size} entries but the operator acts on {size} states")
    return v


def expectation(operator, vector, space: SpinSpace | None = None):
    """``⟨v|O|v⟩ / ⟨v|v⟩`` of a PauliSum or a sparse/dense matrix in a state vector.

    Args:
        operator: a PauliSum (its matrix on ``space`` is built) or a square matrix in the basis
            of ``space.configurations()``.
        vector: amplitudes over ``space.configurations()`` (need not be normalised).
        space: the space of ``vector`` (default: all ``2^N`` configurations of a PauliSum).

    Returns:
        A float for a Hermitian operator (the imaginary part is rounding), else a complex.
    """
    mat = operator_matrix(operator, space)
    v = _vector(vector, mat.shape[0])
    value = np.vdot(v, mat @ v) / np.vdot(v, v).real
    if hasattr(operator, "is_hermitian"):
        hermitian = operator.is_hermitian()
    else:
        diff = mat - mat.conj().T
        hermitian = diff.nnz == 0 or float(abs(diff).max()) <= 1e-12 * max(1.0, float(abs(mat).max()))
    return float(value.real) if hermitian else complex(value)


def fidelity(vector_a, vector_b) -> float:
    """``|⟨a|b⟩|² / (⟨a|a⟩⟨b|b⟩)`` in [0, 1] (1 when the states agree up to a global phase)."""
    a = _vector(vector_a)
    b = _vector(vector_b, a.size)
    return float(abs(np.vdot(a, b)) ** 2 / (np.vdot(a, a).real * np.vdot(b, b).real))
