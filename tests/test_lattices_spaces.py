"""Lattices and spin configuration spaces: geometry, counting and input validation.

References are elementary: bond counts of chains and square lattices follow from counting
(each site has 2 nearest neighbours on a ring, 4 on a periodic square lattice), the number of
configurations with k up spins out of N is the binomial coefficient C(N, k), and a graph is
bipartite exactly when it has no odd cycle (König 1936). The bipartiteness reference below
is an independent breadth-first 2-colouring that shares no code with psiloom.
"""

from __future__ import annotations

import collections
import math

import jax
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from psiloom import lattices
from psiloom.spaces import SpinSpace, codes


# --------------------------------------------------------------------------- helpers


def bfs_two_colouring(n_sites: int, bonds) -> np.ndarray | None:
    """0/1 colours with every bond joining different colours, or None if impossible (odd cycle)."""
    adjacency = collections.defaultdict(list)
    for i, j in bonds:
        adjacency[int(i)].append(int(j))
        adjacency[int(j)].append(int(i))
    colour = -np.ones(n_sites, dtype=int)
    for start in range(n_sites):
        if colour[start] >= 0:
            continue
        colour[start] = 0
        queue = collections.deque([start])
        while queue:
            a = queue.popleft()
            for b in adjacency[a]:
                if colour[b] < 0:
                    colour[b] = 1 - colour[a]
                    queue.append(b)
                elif colour[b] == colour[a]:
                    return None
    return colour


def neighbour_sets(n_sites: int, bonds) -> list[set[int]]:
    out = [set() for _ in range(n_sites)]
    for i, j in bonds:
        out[int(i)].add(int(j))
        out[int(j)].add(int(i))
    return out


def check_bond_array(lat) -> None:
    for arr in (lat.bonds, lat.next_bonds):
        assert arr.ndim == 2 and arr.shape[1] == 2
        assert np.all(arr[:, 0] < arr[:, 1]), "bonds are stored with i < j"
        assert np.all((arr >= 0) & (arr < lat.n_sites))
        assert len({tuple(b) for b in arr.tolist()}) == len(arr), "no duplicate bonds"


# --------------------------------------------------------------------------- chains


@pytest.mark.parametrize("length", [3, 4, 5, 8, 13])
def test_periodic_chain_bonds_and_neighbours(length):
    lat = lattices.chain(length, periodic=True)
    check_bond_array(lat)
    assert lat.n_sites == length
    # counting: a ring of L ≥ 3 sites has L nearest-neighbour bonds, each site two neighbours
    assert len(lat.bonds) == length
    nbrs = neighbour_sets(length, lat.bonds)
    for i in range(length):
        assert nbrs[i] == {(i - 1) % length, (i + 1) % length}
    if length >= 5:  # second neighbours i ± 2 are distinct from i and from each other
        assert len(lat.next_bonds) == length
        nnn = neighbour_sets(length, lat.next_bonds)
        for i in range(length):
            assert nnn[i] == {(i - 2) % length, (i + 2) % length}


@pytest.mark.parametrize("length", [1, 2, 3, 6, 11])
def test_open_chain_bonds_and_neighbours(length):
    lat = lattices.chain(length, periodic=False)
    check_bond_array(lat)
    assert len(lat.bonds) == length - 1
    assert len(lat.next_bonds) == max(0, length - 2)
    assert {tuple(b) for b in lat.bonds.tolist()} == {(i, i + 1) for i in range(length - 1)}
    assert {tuple(b) for b in lat.next_bonds.tolist()} == {(i, i + 2) for i in range(length - 2)}
    # an open chain is a tree: always bipartite
    assert lat.is_bipartite


def test_tiny_rings_store_each_pair_once():
    # a 2-site ring joins sites 0 and 1 "twice" (left and right); stored once and flagged
    two = lattices.chain(2, periodic=True)
    assert two.bonds.tolist() == [[0, 1]]
    assert two.has_wrapped_duplicates
    # 4-site ring: second neighbours (0,2) and (1,3) are reached both ways round
    four = lattices.chain(4, periodic=True)
    assert four.next_bonds.tolist() == [[0, 2], [1, 3]]
    assert four.has_wrapped_duplicates
    assert not lattices.chain(6, periodic=True).has_wrapped_duplicates


@given(st.integers(3, 30), st.booleans())
def test_chain_sublattice_matches_two_colouring(length, periodic):
    lat = lattices.chain(length, periodic=periodic)
    reference = bfs_two_colouring(length, lat.bonds)
    # odd periodic rings contain an odd cycle: not bipartite (König 1936)
    expect_bipartite = not (periodic and length % 2 == 1)
    assert (reference is not None) == expect_bipartite
    assert lat.is_bipartite == expect_bipartite
    if expect_bipartite:
        sub = lat.sublattice
        assert set(np.unique(sub).tolist()) <= {0, 1}
        assert np.all(sub[lat.bonds[:, 0]] != sub[lat.bonds[:, 1]])
        # a connected bipartite graph has a unique colouring up to swapping the colours
        assert np.array_equal(sub, reference) or np.array_equal(sub, 1 - reference)
    else:
        assert lat.sublattice is None


# --------------------------------------------------------------------------- square lattices


@pytest.mark.parametrize("lx,ly", [(3, 3), (4, 4), (3, 5), (6, 4)])
def test_periodic_square_counts_and_neighbours(lx, ly):
    lat = lattices.square(lx, ly, periodic=True)
    check_bond_array(lat)
    n = lx * ly
    assert lat.n_sites == n and lat.shape == (lx, ly)
    # counting: 4 neighbours per site → 2N bonds; 4 diagonal neighbours → 2N next bonds
    assert len(lat.bonds) == 2 * n
    assert len(lat.next_bonds) == 2 * n
    nbrs = neighbour_sets(n, lat.bonds)
    nnn = neighbour_sets(n, lat.next_bonds)
    for x in range(lx):
        for y in range(ly):
            i = x + lx * y  # documented site order: x runs fastest
            expect = {((x + dx) % lx) + lx * ((y + dy) % ly) for dx, dy in [(1, 0), (-1, 0), (0, 1), (0, -1)]}
            assert nbrs[i] == expect
            diag = {((x + dx) % lx) + lx * ((y + dy) % ly) for dx, dy in [(1, 1), (-1, -1), (1, -1), (-1, 1)]}
            assert nnn[i] == diag


@pytest.mark.parametrize("lx,ly", [(1, 1), (2, 3), (4, 4), (5, 2)])
def test_open_square_counts(lx, ly):
    lat = lattices.square(lx, ly, periodic=False)
    check_bond_array(lat)
    assert len(lat.bonds) == (lx - 1) * ly + lx * (ly - 1)
    assert len(lat.next_bonds) == 2 * (lx - 1) * (ly - 1)
    coords = lat.coords
    for i, j in lat.bonds:
        assert np.abs(coords[i] - coords[j]).sum() == 1
    for i, j in lat.next_bonds:
        assert np.all(np.abs(coords[i] - coords[j]) == 1)


@given(st.integers(2, 6), st.integers(2, 6), st.booleans())
def test_square_sublattice_matches_two_colouring(lx, ly, periodic):
    lat = lattices.square(lx, ly, periodic=periodic)
    reference = bfs_two_colouring(lat.n_sites, lat.bonds)
    # periodic wrapping along an odd extent ≥ 3 closes an odd cycle (König 1936)
    expect_bipartite = not periodic or all(e % 2 == 0 or e < 3 for e in (lx, ly))
    assert (reference is not None) == expect_bipartite
    assert lat.is_bipartite == expect_bipartite
    if expect_bipartite:
        sub = lat.sublattice
        assert np.all(sub[lat.bonds[:, 0]] != sub[lat.bonds[:, 1]])
        assert np.array_equal(sub, reference) or np.array_equal(sub, 1 - reference)


def test_square_default_is_square():
    lat = lattices.square(3)
    assert lat.shape == (3, 3) and lat.n_sites == 9


@given(st.integers(1, 6), st.integers(1, 6))
def test_coordinates_and_site_index(lx, ly):
    lat = lattices.square(lx, ly, periodic=True)
    assert lat.coords.shape == (lx * ly, 2)
    for i, (x, y) in enumerate(lat.coords.tolist()):
        assert i == x + lx * y
        assert lat.site_index(x, y) == i
        # periodic wrapping: shifting by a full period lands on the same site
        assert lat.site_index(x + lx, y - ly) == i
    ring = lattices.chain(lx + 2)
    assert ring.site_index(-1) == lx + 1


def test_open_site_index_outside_raises():
    lat = lattices.square(3, 2, periodic=False)
    with pytest.raises(ValueError, match=r"\(3, 0\)"):
        lat.site_index(3, 0)
    with pytest.raises(ValueError, match="expected 2 coordinates"):
        lat.site_index(1)


# --------------------------------------------------------------------------- bad lattice sizes

bad_sizes = st.one_of(
    st.integers(max_value=0),
    st.floats(allow_nan=False, allow_infinity=False).filter(lambda v: v != int(v)),
    st.just(2.0),  # integer-valued floats are still not integers
    st.just("4"),
)


@given(bad_sizes)
def test_bad_chain_length_raises_naming_value(value):
    with pytest.raises(ValueError) as err:
        lattices.chain(value)
    assert repr(value) in str(err.value)


@given(bad_sizes, st.integers(1, 4))
def test_bad_square_extent_raises_naming_value(value, good):
    with pytest.raises(ValueError) as err:
        lattices.square(value, good)
    assert repr(value) in str(err.value)
    with pytest.raises(ValueError) as err:
        lattices.square(good, value)
    assert repr(value) in str(err.value)


# --------------------------------------------------------------------------- spin spaces


@given(st.integers(1, 12), st.data())
def test_space_size_is_binomial(n, data):
    assert SpinSpace(n).size == 2**n
    n_up = data.draw(st.integers(0, n))
    magnetisation = n_up - n / 2
    space = SpinSpace(n, magnetisation=magnetisation)
    assert space.n_up == n_up
    assert space.size == math.comb(n, n_up)  # C(N, n_up) configurations (counting)


@pytest.mark.parametrize("n,magnetisation", [(1, None), (5, None), (8, None), (8, 0), (9, 0.5), (7, -1.5), (6, 3)])
def test_configurations_unique_valid_and_in_sector(n, magnetisation):
    space = SpinSpace(n, magnetisation=magnetisation)
    states = space.configurations()
    assert states.shape == (space.size, n)
    assert np.all(np.abs(states) == 1)
    c = codes(states)
    assert len(np.unique(c)) == len(c)
    assert np.all(np.diff(c) > 0), "ordered by increasing integer code"
    if magnetisation is None:
        assert np.array_equal(c, np.arange(2**n))
    else:
        assert np.all(states.sum(axis=1) == 2 * magnetisation)  # S^z_tot = ½ Σ x_i
    assert np.all(space.contains(states))


def test_basis_order_convention():
    # site 0 is the most significant bit and up (+1) is bit 1: the documented convention
    states = SpinSpace(3).configurations()
    assert states[0].tolist() == [-1, -1, -1]
    assert states[1].tolist() == [-1, -1, 1]
    assert states[4].tolist() == [1, -1, -1]
    assert states[-1].tolist() == [1, 1, 1]


@pytest.mark.parametrize("n,magnetisation", [(1, None), (9, None), (10, 0), (7, 1.5)])
@given(seed=st.integers(0, 2**31 - 1))
def test_random_configurations_valid_and_in_sector(n, magnetisation, seed):
    # hypothesis draws only the seed: a new shape would recompile for every example
    space = SpinSpace(n, magnetisation=magnetisation)
    x = np.asarray(space.random(jax.random.PRNGKey(seed), 7))
    assert x.shape == (7, n)
    assert np.all(np.abs(x) == 1)
    if magnetisation is not None:
        assert np.all(x.sum(axis=1) == 2 * magnetisation)
    assert np.all(space.contains(x))


def test_random_configurations_cover_the_sector_uniformly():
    # 6 spins with S^z = 0: C(6,3) = 20 states, each with probability 1/20
    from scipy.stats import chisquare

    space = SpinSpace(6, magnetisation=0)
    x = np.asarray(space.random(jax.random.PRNGKey(3), 4000))
    counts = np.bincount(np.searchsorted(codes(space.configurations()), codes(x)), minlength=20)
    assert counts.sum() == 4000
    assert chisquare(counts).pvalue > 1e-4


def test_contains_rejects_invalid_rows():
    space = SpinSpace(4, magnetisation=0)
    x = np.array([[1, -1, 1, -1], [1, 1, 1, -1], [1, 0, -1, 1]], dtype=float)
    assert space.contains(x).tolist() == [True, False, False]


@given(bad_sizes)
def test_bad_space_size_raises_naming_value(value):
    with pytest.raises(ValueError) as err:
        SpinSpace(value)
    assert repr(value) in str(err.value)


@given(st.integers(1, 20), st.data())
def test_sector_outside_range_raises_naming_value(n, data):
    # |S^z_tot| ≤ N/2; step in half-integers so only the range is wrong
    excess = data.draw(st.integers(1, 10))
    sign = data.draw(st.sampled_from([-1, 1]))
    magnetisation = sign * (n / 2 + excess)
    with pytest.raises(ValueError) as err:
        SpinSpace(n, magnetisation=magnetisation)
    assert repr(magnetisation) in str(err.value)


@given(st.integers(0, 10))
def test_odd_size_with_zero_magnetisation_raises(k):
    n = 2 * k + 1
    with pytest.raises(ValueError) as err:
        SpinSpace(n, magnetisation=0)
    msg = str(err.value)
    assert "magnetisation=0" in msg and f"n_sites={n}" in msg


@given(st.integers(1, 20), st.floats(-10, 10, allow_nan=False))
def test_non_half_integer_sector_raises(n, magnetisation):
    n_up = n / 2 + magnetisation
    if abs(n_up - round(n_up)) < 1e-9:
        return  # an admissible value; covered elsewhere
    with pytest.raises(ValueError) as err:
        SpinSpace(n, magnetisation=magnetisation)
    assert repr(magnetisation) in str(err.value)


@pytest.mark.parametrize("magnetisation", [float("nan"), float("inf"), -float("inf")])
def test_non_finite_sector_raises(magnetisation):
    with pytest.raises(ValueError) as err:
        SpinSpace(4, magnetisation=magnetisation)
    assert repr(magnetisation) in str(err.value)


@given(st.one_of(st.integers(max_value=-1), st.just(1.5), st.just(True)))
def test_bad_random_count_raises(n):
    with pytest.raises(ValueError) as err:
        SpinSpace(4).random(jax.random.PRNGKey(0), n)
    assert repr(n) in str(err.value)


@settings(max_examples=40)
@given(magnetisation=st.one_of(st.booleans(), st.text(max_size=3), st.complex_numbers(allow_nan=False).filter(lambda z: z.imag != 0),
                          st.just(0j), st.just([0]), st.just("0")))
def test_sector_of_the_wrong_type_raises_naming_it(magnetisation):
    # SpinSpace(4, magnetisation=True) used to be the sector Sᶻ = 1 and magnetisation='0' the sector 0;
    # a complex sector raised a raw TypeError from float()
    with pytest.raises((TypeError, ValueError), match="magnetisation"):
        SpinSpace(4, magnetisation=magnetisation)
