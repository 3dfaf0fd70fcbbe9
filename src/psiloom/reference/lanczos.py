"""Exact lowest eigenpairs of operators on small spaces: the one diagonaliser of psiloom.

Every exact diagonalisation in psiloom goes through :func:`lowest_eigenpairs`, which has one
switch between a dense Hermitian eigensolver (``scipy.linalg.eigh``) and Lanczos
(``scipy.sparse.linalg.eigsh``, ``which="SA"``): the dense solver is used when the matrix has
at most :data:`DENSE_LIMIT` rows or when almost all eigenpairs are wanted (``k ≥ dim − 1``,
where Lanczos does not apply).

A symmetry sector (:class:`psiloom.symmetry.Sector`) restricts the problem to the orthonormal
orbit basis ``B`` of :func:`psiloom.symmetry.sector_basis`: the block ``B† H B`` is
diagonalised and its eigenvectors are mapped back, ``ψ = B φ``, so that vectors always come
in the basis order of ``space.configurations()``. The operator must commute with the group.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from psiloom._validation import positive_int
from psiloom.spaces import SpinSpace
from psiloom.symmetry import sector_basis  # symmetry never imports exact: no cycle

__all__ = ["DENSE_LIMIT", "lowest_eigenpairs", "ground_state", "sector_eigenpairs", "operator_matrix"]

#: Up to this dimension a dense Hermitian eigensolver is used instead of Lanczos.
DENSE_LIMIT = 256


def operator_matrix(operator, space: SpinSpace | None = None):
    """The matrix of ``operator`` on ``space`` (basis order of ``space.configurations()``).

    ``operator`` is anything with ``sparse_matrix(space)`` (a :class:`~psiloom.operators.PauliSum`)
    or a SciPy sparse matrix / 2-D NumPy array already written in that basis (its size is then
    checked against ``space`` when a space is given). Returns a CSR matrix.
    """
    if hasattr(operator, "sparse_matrix"):
        return sp.csr_matrix(operator.sparse_matrix(space))
    if sp.issparse(operator) or isinstance(operator, np.ndarray):
        mat = sp.csr_matrix(operator)
        if mat.ndim != 2 or mat.shape[0] != mat.shape[1]:
            raise ValueError(f"operator must be a square matrix, got shape {mat.shape}")
        if space is not None and mat.shape[0] != space.size:
            raise ValueError(
                f"operator matrix has {mat.shape[0]} rows but the space holds {space.size} states"
            )
        return mat
    raise TypeError(
        f"operator must be a PauliSum (anything with sparse_matrix) or a square matrix, "
        f"got {type(operator).__name__}"
    )


def _hermitian_or_raise(mat: sp.csr_matrix, atol: float = 1e-10) -> None:
    diff = mat - mat.conj().T
    scale = max(1.0, float(abs(mat).max()) if mat.nnz else 1.0)
    if diff.nnz and float(abs(diff).max()) > atol * scale:
        raise ValueError("lowest_eigenpairs needs a Hermitian operator")


def _lowest(mat: sp.csr_matrix, k: int, tol: float):
    """The dense-or-Lanczos switch (module docstring)."""
    dim = mat.shape[0]
    if dim <= DENSE_LIMIT or k >= dim - 1:
        import scipy.linalg  # imported on use (the linear-algebra modules cost ~0.3 s to import)

        vals, vecs = scipy.linalg.eigh(mat.toarray())
        return np.real(vals[:k]), vecs[:, :k]
    rng = np.random.default_rng(0)
    v0 = rng.standard_normal(dim)
    if np.iscomplexobj(mat.data):
        v0 = v0 + 0j
    import scipy.sparse.linalg

    vals, vecs = scipy.sparse.linalg.eigsh(mat, k=k, which="SA", tol=tol, v0=v0)
    order = np.argsort(vals)
    return np.real(vals[order]), vecs[:, order]


def lowest_eigenpairs(operator, space: SpinSpace | None = None, k: int = 1, tol: float = 1e-12,
                      sector=None):
    """The ``k`` lowest eigenvalues (ascending) and eigenvectors (columns, normalised).

    Args:
        operator: a Hermitian PauliSum, or a Hermitian sparse/dense matrix in the basis of
            ``space.configurations()``.
        space: the configuration space (default: all ``2^N`` configurations of the operator).
        k: number of eigenpairs.
        tol: Lanczos tolerance (unused by the dense solver).
        sector: optional :class:`psiloom.symmetry.Sector`; then only eigenstates of that
            sector are returned (the operator must commute with its group).

    Returns:
        ``(values, vectors)``; the vectors are in the basis order of ``space.configurations()``.
    """
    k = positive_int("k", k)
    if hasattr(operator, "is_hermitian") and not operator.is_hermitian():
        raise ValueError("lowest_eigenpairs needs a Hermitian operator")
    if sector is not None and space is None:
        space = SpinSpace(operator.n_sites)
    mat = operator_matrix(operator, space)
    if not hasattr(operator, "is_hermitian"):
        _hermitian_or_raise(mat)
    if sector is None:
        dim = mat.shape[0]
        if k > dim:
            raise ValueError(f"k={k} must lie in [1, {dim}] for a space of dimension {dim}")
        return _lowest(mat, k, tol)
    assert space is not None  # set above whenever a sector is given
    basis = sector_basis(space, sector)
    n = basis.shape[1]
    if n == 0:
        raise ValueError(f"sector {sector.label!r} holds no states of this space")
    if k > n:
        raise ValueError(f"k={k} must lie in [1, {n}] for a sector of dimension {n}")
    block = (basis.conj().T @ mat @ basis).tocsr()
    vals, vecs = _lowest(block, k, tol)
    return vals, basis @ vecs


def sector_eigenpairs(operator, space: SpinSpace, sector, k: int = 1, tol: float = 1e-12):
    """The ``k`` lowest eigenpairs of ``operator`` restricted to a symmetry sector.

    Same as ``lowest_eigenpairs(operator, space, k, tol, sector=sector)``; the eigenvectors are
    in the basis of ``space.configurations()``. Raises ValueError if the sector is empty or smaller
    than ``k``.
    """
    return lowest_eigenpairs(operator, space, k=k, tol=tol, sector=sector)


def ground_state(operator, space: SpinSpace | None = None, tol: float = 1e-12, sector=None):
    """``(E0, ψ0)``: lowest eigenvalue and normalised eigenvector (optionally in a sector)."""
    vals, vecs = lowest_eigenpairs(operator, space, k=1, tol=tol, sector=sector)
    return float(vals[0]), vecs[:, 0]
