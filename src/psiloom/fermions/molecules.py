"""Molecules in a Gaussian basis: second-quantised Hamiltonians from PySCF integrals.

In an orthonormal basis of spatial orbitals φ_p (restricted Hartree-Fock, or restricted open-shell
HF when spin ≠ 0, molecular orbitals from PySCF), with spin-orbitals ``p = σ·M + i``
(:mod:`psiloom.fermions.space`), the electronic Hamiltonian in hartree is

    H = E_0 + Σ_{pq,σ} h_pq c†_pσ c_qσ + ½ Σ_{pqrs,στ} (pq|rs) c†_pσ c†_rτ c_sτ c_qσ,

h_pq = ⟨φ_p| −½∇² − Σ_I Z_I/|r − R_I| |φ_q⟩, (pq|rs) = ∫∫ φ_p(1)φ_q(1) φ_r(2)φ_s(2)/r_12 (chemists'
notation), E_0 the nuclear repulsion. Frozen core (the ``n_frozen`` lowest orbitals doubly
occupied) and an active space (the next ``n_active`` orbitals) fold the core into

    E_0 += Σ_c 2 h_cc + Σ_{cd} [2 (cc|dd) − (cd|dc)],     h_pq += Σ_c [2 (pq|cc) − (pc|cq)].

Geometry, units (``"bohr"`` or ``"angstrom"``), ``charge`` and ``spin = n_up − n_down`` follow
:func:`psiloom.electrons.molecule`. PySCF is an optional dependency (the ``chemistry`` and ``test``
extras); without it :func:`molecular_hamiltonian` raises ImportError naming the extra. Reference
energies: Hartree-Fock (``hartree_fock_energy``) and full CI in the same basis and active space
(:meth:`MolecularProblem.fci_energy`, PySCF's FCI / CASCI).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from psiloom._validation import finite_real, nonnegative_int, positive_int
from psiloom.fermions.determinants import OrbitalGuess
from psiloom.fermions.operators import FermionOperator
from psiloom.fermions.space import FermionSpace


def _pyscf():
    try:
        import pyscf  # noqa: F401
        from pyscf import ao2mo, fci, gto, mcscf, scf
    except ImportError as err:
        raise ImportError("molecules in a basis need the optional package PySCF: install psiloom's "
                          "'chemistry' extra (pip install 'psiloom[chemistry]', or pip install pyscf)") from err
    return gto, scf, ao2mo, fci, mcscf


def integrals_operator(one_body, two_body, constant: float = 0.0, threshold: float = 1e-12) -> FermionOperator:
    """The Hamiltonian of the module docstring from real integrals ``one_body`` (M, M) and
    ``two_body`` (M, M, M, M) in chemists' notation (pq|rs), plus ``constant``. Integrals with
    |value| ≤ ``threshold`` are dropped."""
    h = np.asarray(one_body, dtype=np.float64)
    g = np.asarray(two_body, dtype=np.float64)
    m = h.shape[0]
    if h.shape != (m, m) or g.shape != (m, m, m, m):
        raise ValueError(f"integrals must have shapes (M, M) and (M, M, M, M), got {h.shape} and {g.shape}")
    if not (np.all(np.isfinite(h)) and np.all(np.isfinite(g))):
        raise ValueError("integrals must be finite")
    constant = finite_real("constant", constant)
    terms: dict = {(): constant} if constant else {}
    for s in (0, 1):
        for p, q in zip(*np.nonzero(np.abs(h) > threshold)):
            one: tuple = ((int(p) + s * m, 1), (int(q) + s * m, 0))
            terms[one] = terms.get(one, 0.0) + h[p, q]
    idx = np.argwhere(np.abs(g) > threshold)
    for s in (0, 1):
        for t in (0, 1):
            for p, q, r, u in idx:
                a, b, c, d = int(p) + s * m, int(r) + t * m, int(u) + t * m, int(q) + s * m
                if a == b or c == d:
                    continue  # c†c† or cc on one spin-orbital vanishes
                two: tuple = ((a, 1), (b, 1), (c, 0), (d, 0))
                terms[two] = terms.get(two, 0.0) + 0.5 * g[p, q, r, u]
    return FermionOperator(m, terms)


@dataclass(frozen=True, eq=False)
class MolecularProblem:
    """A molecule in a basis: its :class:`~psiloom.fermions.FermionSpace`, Hamiltonian (attached
    to the space), integrals (active space, MO basis) and PySCF references."""

    space: FermionSpace
    hamiltonian: FermionOperator
    one_body: np.ndarray
    two_body: np.ndarray
    constant: float
    nuclear_repulsion: float
    hartree_fock_energy: float
    n_frozen: int
    basis: str
    atoms: tuple
    mol: Any = field(repr=False)
    scf: Any = field(repr=False)

    def hartree_fock_guess(self, noise: float = 0.0, seed: int = 0) -> OrbitalGuess:
        """The Hartree-Fock determinant in this MO basis (the lowest N↑ and N↓ orbitals), plus
        ``noise`` × standard normal numbers (generator ``seed``). The exact HF determinant is zero
        on every other configuration and HF is stationary: chains could not leave it and the
        energy gradient would vanish, so give some ``noise`` (e.g. 0.2) to start VMC."""
        noise = finite_real("noise", noise, minimum=0.0)
        m = self.space.n_orbitals
        rng = np.random.default_rng(nonnegative_int("seed", seed))
        up = np.eye(m) + noise * rng.standard_normal((m, m))
        down = np.eye(m) + noise * rng.standard_normal((m, m))
        return OrbitalGuess.from_arrays(self.space, up, down)

    def hartree_fock_configuration(self) -> np.ndarray:
        """Occupations of the Hartree-Fock determinant, ``(n_spin_orbitals,)``."""
        m = self.space.n_orbitals
        x = np.zeros(2 * m)
        x[: self.space.n_up] = 1.0
        x[m: m + self.space.n_down] = 1.0
        return x

    def fci_energy(self) -> float:
        """Full CI energy in the same basis and active space, from PySCF (hartree): ``fci.FCI``
        on the SCF object without frozen core / active space, CASCI otherwise."""
        _, _, _, fci, mcscf = _pyscf()
        s = self.space
        if self.n_frozen == 0 and s.n_orbitals == self.mol.nao:
            solver = fci.FCI(self.scf)
            energy, _ = solver.kernel()
            return float(energy)
        cas = mcscf.CASCI(self.scf, s.n_orbitals, (s.n_up, s.n_down))
        cas.verbose = 0
        return float(cas.kernel()[0])

    def describe(self) -> dict:
        """Atoms (bohr), basis and electron counts as plain Python values."""
        return {"atoms": [[sym, list(pos)] for sym, pos in self.atoms], "basis": self.basis,
                "n_orbitals": self.space.n_orbitals, "n_up": self.space.n_up, "n_down": self.space.n_down,
                "n_frozen": self.n_frozen, "units": "bohr"}


def molecular_hamiltonian(atoms, basis: str = "sto-3g", units: str = "bohr", charge: int = 0,
                          spin: int | None = None, n_frozen: int = 0, n_active: int | None = None,
                          verbose: int = 0) -> MolecularProblem:
    """Build the problem of a molecule ``atoms`` (as :func:`psiloom.electrons.molecule`, or a
    :class:`psiloom.electrons.Molecule`) in ``basis`` (any name PySCF knows).

    Args:
        n_frozen: lowest orbitals kept doubly occupied (folded into the constant and h).
        n_active: orbitals kept after the frozen ones (default: all the others).

    Raises:
        ImportError: PySCF is missing (names the extra to install).
        ValueError: an unknown basis (PySCF's message passed on), an active space that cannot
            hold the electrons, more frozen orbitals than electron pairs, bad charge/spin.
    """
    from psiloom.electrons.system import Molecule, molecule

    gto, scf, ao2mo, _, _ = _pyscf()
    system = atoms if isinstance(atoms, Molecule) else molecule(atoms, units=units, charge=charge, spin=spin)
    if not isinstance(basis, str) or not basis.strip():
        raise ValueError(f"basis must be a basis-set name such as 'sto-3g', got {basis!r}")
    n_frozen = nonnegative_int("n_frozen", n_frozen)
    pyscf_atoms = [(system.symbols[i], tuple(float(v) for v in system.positions[i])) for i in range(system.n_nuclei)]
    try:
        mol = gto.M(atom=pyscf_atoms, unit="bohr", basis=basis, charge=int(round(system.charge)),
                    spin=system.spin, verbose=verbose)
    except Exception as err:  # PySCF raises various types for unknown bases
        raise ValueError(f"PySCF could not build basis {basis!r} for {system.formula}: {err}") from err
    n_mo = mol.nao
    if n_frozen > system.n_down:
        raise ValueError(f"n_frozen={n_frozen} doubly occupied core orbitals need {2 * n_frozen} electrons with "
                         f"n_down ≥ {n_frozen}; the molecule has n_up={system.n_up}, n_down={system.n_down}")
    n_active = n_mo - n_frozen if n_active is None else positive_int("n_active", n_active)
    if n_frozen + n_active > n_mo:
        raise ValueError(f"n_frozen={n_frozen} + n_active={n_active} exceeds the {n_mo} orbitals of basis {basis!r}")
    n_up, n_down = system.n_up - n_frozen, system.n_down - n_frozen
    if n_up > n_active or n_down > n_active:
        raise ValueError(f"the active space of n_active={n_active} orbitals cannot hold n_up={n_up} and "
                         f"n_down={n_down} active electrons (after n_frozen={n_frozen} core orbitals)")
    mf = scf.RHF(mol) if system.spin == 0 else scf.ROHF(mol)
    mf.verbose = verbose
    mf.kernel()
    c = np.asarray(mf.mo_coeff)
    h_full = c.T @ mf.get_hcore() @ c
    g_full = ao2mo.restore(1, ao2mo.kernel(mol, c), n_mo)
    core, act = slice(0, n_frozen), slice(n_frozen, n_frozen + n_active)
    e_nuc = float(mol.energy_nuc())
    constant = e_nuc
    h = h_full[act, act].copy()
    if n_frozen:
        cc = np.arange(n_frozen)
        constant += 2.0 * np.sum(h_full[cc, cc])
        constant += _core_energy(g_full, n_frozen)
        h += 2.0 * np.einsum("pqcc->pq", g_full[act, act, core, core]) - np.einsum("pccq->pq", g_full[act, core, core, act])
    g = np.ascontiguousarray(g_full[act, act, act, act])
    space = FermionSpace(n_active, n_up, n_down)
    op = integrals_operator(h, g, constant).in_sector(space)
    atoms_out = tuple((sym, tuple(float(v) for v in pos)) for sym, pos in pyscf_atoms)
    return MolecularProblem(space, op, h, g, float(constant), e_nuc, float(mf.e_tot), n_frozen, basis, atoms_out,
                            mol, mf)


def _core_energy(g, n_frozen: int) -> float:
    """Σ_{cd} [2 (cc|dd) − (cd|dc)] over the frozen orbitals."""
    c = np.arange(n_frozen)
    coulomb = g[c[:, None], c[:, None], c[None, :], c[None, :]]  # (cc|dd)
    exchange = g[c[:, None], c[None, :], c[None, :], c[:, None]]  # (cd|dc)
    return float(np.sum(2.0 * coulomb - exchange))
