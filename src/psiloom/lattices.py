"""Lattices: sites, coordinates, bonds, boundary conditions and sublattices.

A :class:`Lattice` is an immutable description held in NumPy arrays (host data, never traced):

* ``coords``      — integer site coordinates, shape ``(n_sites, dim)``; site index
  ``i = x + Lx * y`` on the square lattice (x runs fastest).
* ``bonds``       — nearest-neighbour pairs ``(i, j)`` with ``i < j``, shape ``(n_bonds, 2)``.
* ``next_bonds``  — next-nearest-neighbour pairs (diagonals of the square lattice,
  second neighbours ``i, i+2`` on a chain).
* ``sublattice``  — 0/1 labels when every nearest-neighbour bond joins different labels
  (bipartite), else ``None``. Used by the Marshall sign rule.

Periodic wrapping can make two different displacement vectors join the same pair of sites on
tiny lattices (e.g. a ring of two sites). Bonds are stored once per unordered pair: such a
lattice therefore has fewer bonds than ``dim * n_sites``. Sizes where this matters are listed
by :attr:`Lattice.has_wrapped_duplicates`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from psiloom._validation import boolean, positive_int


def _check_size(name: str, value) -> int:
    return positive_int(f"lattice {name}", value)


@dataclass(frozen=True, eq=False)
class Lattice:
    """An immutable lattice (see module docstring for the array conventions)."""

    kind: str
    shape: tuple[int, ...]
    periodic: bool
    coords: np.ndarray
    bonds: np.ndarray
    next_bonds: np.ndarray
    sublattice: np.ndarray | None
    has_wrapped_duplicates: bool = field(default=False)

    @property
    def n_sites(self) -> int:
        """Number of sites."""
        return int(self.coords.shape[0])

    @property
    def dim(self) -> int:
        """Spatial dimension."""
        return len(self.shape)

    @property
    def is_bipartite(self) -> bool:
        """True when the lattice has two sublattices (then ``sublattice`` holds 0/1 per site)."""
        return self.sublattice is not None

    def site_index(self, *position: int) -> int:
        """Index of the site at integer ``position`` (wrapped when periodic)."""
        if len(position) != self.dim:
            raise ValueError(f"expected {self.dim} coordinates, got {position!r}")
        idx, stride = 0, 1
        for p, n in zip(position, self.shape):
            if self.periodic:
                p %= n
            elif not 0 <= p < n:
                raise ValueError(f"position {position!r} lies outside the open lattice {self.shape}")
            idx += p * stride
            stride *= n
        return idx

    def __repr__(self) -> str:
        bc = "periodic" if self.periodic else "open"
        return f"Lattice({self.kind}, shape={self.shape}, {bc}, n_sites={self.n_sites})"


def _build(kind: str, shape: tuple[int, ...], periodic: bool, nn_shifts, nnn_shifts) -> Lattice:
    grids = np.meshgrid(*[np.arange(n) for n in shape], indexing="ij")
    # site index i = x + Lx*y: flatten with x fastest
    coords = np.stack([g.transpose().reshape(-1) for g in grids], axis=-1) if len(shape) > 1 else grids[0].reshape(-1, 1)
    ext = np.array(shape)
    strides = np.cumprod([1, *shape[:-1]])

    def pairs(shifts):
        found: set[tuple[int, int]] = set()
        duplicates = False
        for shift in shifts:
            target = coords + np.array(shift)
            if periodic:
                target = target % ext
                valid = np.ones(len(coords), dtype=bool)
            else:
                valid = np.all((target >= 0) & (target < ext), axis=1)
            j = target @ strides
            for a, b in zip(np.arange(len(coords))[valid], j[valid]):
                if a == b:
                    duplicates = True
                    continue
                key = (min(a, b), max(a, b))
                if key in found:
                    duplicates = True
                found.add(key)
        arr = np.array(sorted(found), dtype=np.int64).reshape(-1, 2)
        return arr, duplicates

    bonds, dup1 = pairs(nn_shifts)
    next_bonds, dup2 = pairs(nnn_shifts)
    parity = coords.sum(axis=1) % 2
    bipartite = len(bonds) == 0 or bool(np.all(parity[bonds[:, 0]] != parity[bonds[:, 1]]))
    return Lattice(
        kind=kind,
        shape=shape,
        periodic=periodic,
        coords=coords.astype(np.int64),
        bonds=bonds,
        next_bonds=next_bonds,
        sublattice=parity.astype(np.int64) if bipartite else None,
        has_wrapped_duplicates=dup1 or dup2,
    )


def chain(n_sites: int, periodic: bool = True) -> Lattice:
    """A one-dimensional chain of ``n_sites`` sites (a ring when ``periodic``)."""
    n = _check_size("n_sites", n_sites)
    return _build("chain", (n,), boolean("periodic", periodic), [(1,)], [(2,)])


def square(lx: int, ly: int | None = None, periodic: bool = True) -> Lattice:
    """A rectangular ``lx × ly`` square lattice (``ly = lx`` by default); site ``i = x + lx*y``.

    Nearest neighbours along x and y; next-nearest neighbours along both diagonals.
    """
    nx = _check_size("lx", lx)
    ny = nx if ly is None else _check_size("ly", ly)
    return _build("square", (nx, ny), boolean("periodic", periodic), [(1, 0), (0, 1)], [(1, 1), (1, -1)])
