"""Exact lowest eigenpairs of operators on small spaces by Lanczos (scipy ``eigsh``)."""

from __future__ import annotations

import numpy as np
import scipy.linalg
import scipy.sparse.linalg

from psiloom.spaces import SpinSpace

#: Below this dimension a dense Hermitian eigensolver is used instead of Lanczos.
DENSE_LIMIT = 64


def lowest_eigenpairs(operator, space: SpinSpace | None = None, k: int = 1, tol: float = 1e-12):
    """The ``k`` lowest eigenvalues (ascending) and eigenvectors (columns) of ``operator``.

    The basis order of the eigenvectors is that of ``space.all_states()``.
    """
    if not operator.is_hermitian():
        raise ValueError("lowest_eigenpairs needs a Hermitian operator")
    mat = operator.to_sparse(space)
    dim = mat.shape[0]
    if not 1 <= k <= dim:
        raise ValueError(f"k={k} must lie in [1, {dim}] for a space of dimension {dim}")
    if dim <= DENSE_LIMIT or k >= dim - 1:
        vals, vecs = scipy.linalg.eigh(mat.toarray())
        return vals[:k], vecs[:, :k]
    rng = np.random.default_rng(0)
    v0 = rng.standard_normal(dim)
    vals, vecs = scipy.sparse.linalg.eigsh(mat, k=k, which="SA", tol=tol, v0=v0)
    order = np.argsort(vals)
    return vals[order], vecs[:, order]


def ground_state(operator, space: SpinSpace | None = None, tol: float = 1e-12):
    """``(E0, ψ0)``: lowest eigenvalue and normalised eigenvector."""
    vals, vecs = lowest_eigenpairs(operator, space, k=1, tol=tol)
    return float(vals[0]), vecs[:, 0]
