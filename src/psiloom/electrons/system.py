"""Atoms and molecules: fixed point nuclei and the numbers of spin-up and spin-down electrons.

Units are atomic units throughout psiloom's electron code: lengths in bohr, energies in
hartree. Positions given in ångström are converted with

    1 Å = 1 / 0.529177210903 bohr = 1.8897261246 bohr        (CODATA 2018, from memory).

Electron configurations are arrays of shape ``(n_samples, n_electrons, 3)`` in bohr, sample axis
leading; within a configuration the first ``n_up`` electrons are spin-up, the remaining
``n_down`` spin-down. The spin is given as ``spin = n_up − n_down = 2 S_z`` (an integer, as in
most chemistry codes); by default the smallest spin compatible with the electron count.

A :class:`Molecule` is also the configuration space of the electron sampler: its
:meth:`Molecule.random` draws walkers placed around the nuclei in proportion to their charges.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import finite_real, integer, nonnegative_int, positive_real

#: Bohr radii per ångström, 1/a0 with a0 = 0.529177210903 Å (CODATA 2018; from memory).
BOHR_PER_ANGSTROM = 1.0 / 0.529177210903

#: Element symbols by nuclear charge (index = Z).
ELEMENTS = (
    "X", "H", "He", "Li", "Be", "B", "C", "N", "O", "F", "Ne",
    "Na", "Mg", "Al", "Si", "P", "S", "Cl", "Ar",
)
_CHARGE_OF = {s.lower(): z for z, s in enumerate(ELEMENTS) if z > 0}

#: Nuclei closer than this (bohr) are rejected as coincident.
MIN_NUCLEAR_DISTANCE = 1e-6


def charge_of(symbol: str) -> int:
    """Nuclear charge Z of an element symbol (``"Li"`` → 3), case-insensitive."""
    try:
        return _CHARGE_OF[str(symbol).strip().lower()]
    except KeyError:
        raise ValueError(f"unknown element symbol {symbol!r}; known: {', '.join(ELEMENTS[1:])}") from None


@dataclass(frozen=True, eq=False)
class Molecule:
    """Nuclei (charges ``Z_I``, positions ``R_I`` in bohr) and electrons (``n_up``, ``n_down``).

    Use :func:`molecule` or :func:`atom` to build one from element symbols; the constructor takes
    arrays directly. ``charges`` may be non-integer (pseudo or model systems) but must be > 0.

    Attributes:
        charges: ``(n_nuclei,)`` nuclear charges Z_I (units of e).
        positions: ``(n_nuclei, 3)`` positions R_I in bohr.
        n_up, n_down: numbers of spin-up and spin-down electrons.
        symbols: element symbols (informational).
    """

    charges: np.ndarray
    positions: np.ndarray
    n_up: int
    n_down: int
    symbols: tuple[str, ...] = ()

    def __post_init__(self):
        charges = np.atleast_1d(np.asarray(self.charges, dtype=np.float64))
        positions = np.asarray(self.positions, dtype=np.float64)
        if charges.ndim != 1 or charges.size == 0:
            raise ValueError(f"charges must be a non-empty 1-d sequence, got shape {charges.shape}")
        if positions.shape != (charges.size, 3):
            raise ValueError(
                f"positions must have shape (n_nuclei, 3) = ({charges.size}, 3), got {positions.shape}"
            )
        if not np.all(np.isfinite(charges)) or not np.all(np.isfinite(positions)):
            raise ValueError("charges and positions must be finite numbers")
        bad = np.flatnonzero(charges <= 0)
        if bad.size:
            raise ValueError(
                f"nuclear charges must be positive, got charge {charges[bad[0]]!r} for nucleus {int(bad[0])}"
            )
        for i in range(charges.size):
            for j in range(i):
                d = float(np.linalg.norm(positions[i] - positions[j]))
                if d < MIN_NUCLEAR_DISTANCE:
                    raise ValueError(
                        f"nuclei {j} and {i} coincide (distance {d:.3g} bohr at {positions[i].tolist()})"
                    )
        for name in ("n_up", "n_down"):
            nonnegative_int(name, getattr(self, name))
        if self.n_up + self.n_down == 0:
            raise ValueError("a system needs at least one electron (n_up + n_down = 0)")
        symbols = tuple(self.symbols) if self.symbols else tuple(
            ELEMENTS[int(z)] if float(z).is_integer() and int(z) < len(ELEMENTS) else f"Z={z:g}" for z in charges
        )
        if len(symbols) != charges.size:
            raise ValueError(f"got {len(symbols)} symbols for {charges.size} nuclei")
        charges.setflags(write=False)
        positions.setflags(write=False)
        object.__setattr__(self, "charges", charges)
        object.__setattr__(self, "positions", positions)
        object.__setattr__(self, "n_up", int(self.n_up))
        object.__setattr__(self, "n_down", int(self.n_down))
        object.__setattr__(self, "symbols", symbols)

    # ------------------------------------------------------------------ derived quantities
    @property
    def n_nuclei(self) -> int:
        """Number of nuclei."""
        return int(self.charges.size)

    @property
    def n_electrons(self) -> int:
        """Number of electrons, n_up + n_down."""
        return self.n_up + self.n_down

    @property
    def spin(self) -> int:
        """n_up − n_down (= 2 S_z)."""
        return self.n_up - self.n_down

    @property
    def charge(self) -> float:
        """Net charge Σ Z_I − n_electrons."""
        return float(self.charges.sum()) - self.n_electrons

    @property
    def spins(self) -> np.ndarray:
        """``(n_electrons,)`` +1 for spin-up electrons (the first ``n_up``), −1 for spin-down."""
        return np.where(np.arange(self.n_electrons) < self.n_up, 1.0, -1.0)

    def nuclear_repulsion(self) -> float:
        """V_NN = Σ_{I<J} Z_I Z_J / |R_I − R_J| (hartree)."""
        e = 0.0
        for i in range(self.n_nuclei):
            for j in range(i):
                e += self.charges[i] * self.charges[j] / np.linalg.norm(self.positions[i] - self.positions[j])
        return float(e)

    @property
    def formula(self) -> str:
        """Chemical formula in order of first appearance, e.g. "H2", "LiH"."""
        counts: dict[str, int] = {}
        for s in self.symbols:
            counts[s] = counts.get(s, 0) + 1
        return "".join(s + (str(c) if c > 1 else "") for s, c in counts.items())

    def describe(self) -> dict:
        """The benchmark-contract ``system`` object (positions in bohr)."""
        return {
            "model": "molecule",
            "name": self.formula,
            "atoms": [[s, [float(c) for c in p]] for s, p in zip(self.symbols, self.positions)],
            "units": "bohr",
            "n_up": self.n_up,
            "n_down": self.n_down,
        }

    def __repr__(self) -> str:
        atoms = ", ".join(f"{s}@{np.round(p, 4).tolist()}" for s, p in zip(self.symbols, self.positions))
        return f"Molecule([{atoms}], n_up={self.n_up}, n_down={self.n_down})"

    # ------------------------------------------------------------------ walkers
    def electron_sites(self) -> np.ndarray:
        """Nucleus index assigned to each of the electrons for initial placement.

        Electrons are dealt round-robin over the nuclei in order of decreasing charge, each
        nucleus taking at most ``round(Z_I)`` (anions: the surplus goes round again), so a
        neutral system puts Z_I electrons on nucleus I (charge-proportional placement, common
        practice).
        """
        n = self.n_electrons
        quota = np.maximum(np.round(self.charges).astype(int), 1)
        sites: list[int] = []
        order = np.argsort(-self.charges, kind="stable")
        while len(sites) < n:
            placed = False
            for i in order:
                if quota[i] > 0 and len(sites) < n:
                    sites.append(int(i))
                    quota[i] -= 1
                    placed = True
            if not placed:  # anions: extra electrons go round the nuclei again
                quota = np.maximum(np.round(self.charges).astype(int), 1)
        return np.sort(np.asarray(sites[:n]))

    def random(self, key: jax.Array, n: int, width: float = 1.0) -> jax.Array:
        """``n`` walkers ``(n, n_electrons, 3)``: electrons around the nuclei, shared by charge.

        Each walker deals the slots of :meth:`electron_sites` to its electrons in a random order
        (so spin-up electrons visit every nucleus across walkers) and places each electron at its
        nucleus plus an isotropic Gaussian displacement of standard deviation ``width`` bohr.
        """
        n = nonnegative_int("n (number of walkers)", n)
        width = positive_real("width", width)
        sites = jnp.asarray(self.electron_sites())
        centres = jnp.asarray(self.positions)
        k_perm, k_noise = jax.random.split(key)
        perms = jax.vmap(lambda k: jax.random.permutation(k, sites))(jax.random.split(k_perm, n))
        noise = jax.random.normal(k_noise, (n, self.n_electrons, 3), dtype=centres.dtype)
        return centres[perms] + width * noise


def _electron_counts(total_z: float, charge: int, spin: int | None) -> tuple[int, int]:
    charge = integer("charge", charge)
    n_total = total_z - charge
    if abs(n_total - round(n_total)) > 1e-9:
        raise ValueError(f"nuclear charges sum to {total_z:g}; with charge {charge} the electron count "
                         f"{n_total:g} is not an integer")
    n = int(round(n_total))
    if n <= 0:
        raise ValueError(f"charge {charge} leaves {n} electrons for nuclear charge {total_z:g}")
    if spin is None:
        spin = n % 2
    spin = integer("spin (= n_up − n_down)", spin, minimum=0)
    if abs(spin) > n or (n - spin) % 2:
        raise ValueError(
            f"spin {spin} is impossible for {n} electrons: need |spin| <= {n} and n − spin even "
            f"(n_up = (n + spin)/2 = {(n + spin) / 2:g})"
        )
    return (n + spin) // 2, (n - spin) // 2


def molecule(atoms: Sequence, units: str = "bohr", charge: int = 0, spin: int | None = None,
             n_up: int | None = None, n_down: int | None = None) -> Molecule:
    """Build a :class:`Molecule` from ``[(symbol_or_charge, (x, y, z)), ...]``.

    Args:
        atoms: pairs of an element symbol (or a positive nuclear charge) and a position.
        units: ``"bohr"`` or ``"angstrom"`` (converted with :data:`BOHR_PER_ANGSTROM`).
        charge: net charge (electrons = Σ Z − charge).
        spin: n_up − n_down ≥ 0 (spin-up electrons are the majority by convention; the
            mirror state with more spin-down electrons has the same energy); default the lowest
            possible (0 or 1).
        n_up, n_down: give both to set the electron counts directly; a ``charge`` or ``spin``
            given as well must agree with them (``charge = Σ Z − n_up − n_down``,
            ``spin = n_up − n_down``), otherwise ValueError.

    Raises:
        ValueError: (a TypeError, which is also a ValueError, for wrong types) a non-integer ``charge`` (``0.5``, ``'1'``) or
            ``spin``, impossible electron counts, or counts that contradict ``charge``/``spin``.
    """
    if units not in ("bohr", "angstrom"):
        raise ValueError(f"units must be 'bohr' or 'angstrom', got {units!r}")
    atoms = list(atoms)
    if not atoms:
        raise ValueError("atoms is empty: a molecule needs at least one nucleus")
    charges, positions, symbols = [], [], []
    for entry in atoms:
        try:
            what, where = entry
        except (TypeError, ValueError):
            raise ValueError(f"each atom must be (symbol, (x, y, z)), got {entry!r}") from None
        if isinstance(what, str):
            z = float(charge_of(what))
            symbols.append(ELEMENTS[int(z)])
        else:
            z = finite_real("atom symbol or nuclear charge", what)
            symbols.append(ELEMENTS[int(z)] if z.is_integer() and 0 < z < len(ELEMENTS) else f"Z={z:g}")
        charges.append(z)
        pos = np.asarray(where, dtype=np.float64)
        if pos.shape != (3,):
            raise ValueError(f"position of {what!r} must have 3 components, got {where!r}")
        positions.append(pos * (BOHR_PER_ANGSTROM if units == "angstrom" else 1.0))
    charges_arr = np.asarray(charges)
    if (n_up is None) != (n_down is None):
        raise ValueError("give both n_up and n_down, or neither")
    charge = integer("charge", charge)
    if spin is not None:
        spin = integer("spin (= n_up − n_down)", spin, minimum=0)  # n_up ≥ n_down by convention
    if n_up is None:
        if np.any(charges_arr <= 0):
            bad = charges_arr[charges_arr <= 0][0]
            raise ValueError(f"nuclear charges must be positive, got {bad!r}")
        n_up, n_down = _electron_counts(float(charges_arr.sum()), charge, spin)
    else:
        n_up, n_down = nonnegative_int("n_up", n_up), nonnegative_int("n_down", n_down)
        implied = float(charges_arr.sum()) - (n_up + n_down)
        if charge != 0 and abs(implied - charge) > 1e-9:
            raise ValueError(
                f"charge={charge} contradicts n_up={n_up}, n_down={n_down}: nuclear charge "
                f"{float(charges_arr.sum()):g} with {n_up + n_down} electrons has net charge {implied:g}"
            )
        if spin is not None and spin != n_up - n_down:
            raise ValueError(
                f"spin={spin} contradicts n_up={n_up}, n_down={n_down} (n_up − n_down = {n_up - n_down})"
            )
    return Molecule(charges_arr, np.stack(positions), n_up, n_down, tuple(symbols))


def atom(symbol, charge: int = 0, spin: int | None = None) -> Molecule:
    """A single atom at the origin, e.g. ``atom("Li")`` (n_up = 2, n_down = 1).

    ``charge`` and ``spin`` are integers (``atom("He", charge=0.5)`` raises rather than
    building neutral helium)."""
    return molecule([(symbol, (0.0, 0.0, 0.0))], charge=charge, spin=spin)
