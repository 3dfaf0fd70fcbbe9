"""Atom-centred Slater-type basis functions and an aufbau starting guess for orbitals.

Each basis function sits on a nucleus I (u = r − R_I, r = |u|, exponent ζ > 0, bohr⁻¹) and has
one of five radial–angular forms, normalised to ∫ χ² d³r = 1:

    "s"   plain Slater 1s          e^{−ζr}                  norm² = π / ζ³
    "sc"  cusp-free 1s-like   (1 + ζr) e^{−ζr}              norm² = 7π / ζ³
    "s2"  2s-like (no cusp)       r² e^{−ζr}                norm² = 45π / (2ζ⁷)
    "p"   2p-like (x, y, z)      u_c e^{−ζr}                norm² = π / ζ⁵
    "pc"  cusp-free 2p-like  u_c (1 + ζr) e^{−ζr}           norm² = 27π / (2ζ⁵)

("sc", "s2" and "pc" are smooth at their nucleus up to O(r³), so when a Jastrow factor supplies
the electron–nucleus cusp the orbitals do not add to it; "s" carries the cusp −ζ itself and "p"
the l = 1 slope u_c (1 − ζr), see :mod:`psiloom.electrons.cusp_map`.)

Default exponents follow Slater's screening rules (Slater 1930, from memory):
ζ_1s = Z − 0.30 (Z > 1; 1 for hydrogen), and for the n = 2 shell Z_eff = Z − 2·0.85 −
0.35·(n₂ − 1), ζ_2p = Z_eff / 2, with the 2s-like function peaking where the Slater 2s does.

The aufbau guess fills orbitals in order of the hydrogen-like energies −Z_eff²/(2n²) (2s just
below 2p), forming sums and differences of equivalent functions on equivalent atoms (for H₂ the
bonding and antibonding combinations). It is only a starting point for the optimiser.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from psiloom.electrons.system import Molecule

KINDS = ("s", "sc", "s2", "p", "pc")


@dataclass(frozen=True)
class BasisFunction:
    """One Slater-type basis function: the nucleus it sits on, its kind (1s, 2s, 2p…) and exponent."""
    centre: int  # nucleus index
    kind: str  # one of KINDS
    zeta: float  # exponent, bohr⁻¹
    component: int = 0  # Cartesian component of "p" functions (0, 1, 2)
    label: str = ""  # e.g. "1s", "2s", "2px" for the aufbau guess ("" = extra function)


def slater_exponents(z: float, n_electrons_on_atom: int | None = None) -> tuple[float, float]:
    """(ζ_1s, Z_eff of the n = 2 shell) from Slater's rules for a neutral atom of charge Z."""
    n = int(round(z)) if n_electrons_on_atom is None else n_electrons_on_atom
    zeta_1s = z - 0.30 if n >= 2 else z
    n2 = max(n - 2, 1)
    z_eff2 = max(z - 2 * 0.85 - 0.35 * (n2 - 1), 0.5)
    return float(zeta_1s), float(z_eff2)


def default_basis(system: Molecule, cusp_free: bool = True, polarization: bool | None = None,
                  smooth_p: bool = False) -> list[BasisFunction]:
    """A small basis per atom: three 1s-like exponents, plus 2s/2p functions from Li on.

    Args:
        cusp_free: use the cusp-free "sc" form for 1s-like functions (else plain "s").
        polarization: add one set of p functions (ζ = 1) on H and He; default: only in molecules.
        smooth_p: use the smooth "pc" form for 2p-like functions (else "p", whose l = 1 slope
            the optimiser can combine into the right cusp; with "pc" the
            :class:`~psiloom.electrons.NuclearCuspMap` supplies it).
    """
    s_kind = "sc" if cusp_free else "s"
    p_kind = "pc" if smooth_p else "p"
    if polarization is None:
        polarization = system.n_nuclei > 1
    basis: list[BasisFunction] = []
    for i, z in enumerate(system.charges):
        zeta_1s, z_eff2 = slater_exponents(float(z))
        basis.append(BasisFunction(i, s_kind, zeta_1s, label="1s"))
        basis.append(BasisFunction(i, s_kind, 1.6 * zeta_1s))
        basis.append(BasisFunction(i, s_kind, 0.6 * zeta_1s))
        if z > 2.5:
            basis.append(BasisFunction(i, "s2", z_eff2, label="2s"))
            basis.append(BasisFunction(i, "s2", 0.6 * z_eff2))
            for c, axis in enumerate("xyz"):
                basis.append(BasisFunction(i, p_kind, z_eff2 / 2, c, label="2p" + axis))
            for c in range(3):
                basis.append(BasisFunction(i, p_kind, 0.6 * z_eff2 / 2, c))
        elif polarization:
            for c in range(3):
                basis.append(BasisFunction(i, p_kind, 1.0, c))
    return basis


def _level(system: Molecule, f: BasisFunction) -> float:
    z = float(system.charges[f.centre])
    zeta_1s, z_eff2 = slater_exponents(z)
    if f.label == "1s":
        return -zeta_1s**2 / 2
    if f.label == "2s":
        return -z_eff2**2 / 8 - 1e-3
    return -z_eff2**2 / 8


def aufbau_guess(system: Molecule, basis: list[BasisFunction]) -> tuple[np.ndarray, np.ndarray]:
    """Coefficients ``(C_up (n_up, K), C_down (n_down, K))`` of a starting orbital guess.

    Labelled functions are grouped into degenerate sets of the same label on nuclei of equal
    charge; each set of g functions yields g orthonormal combinations (the first the plain sum).
    Orbitals are taken in order of energy; both spins start from the same list.
    """
    labelled = [k for k, f in enumerate(basis) if f.label]
    groups: dict[tuple, list[int]] = {}
    for k in labelled:
        f = basis[k]
        key = (f.label, round(float(system.charges[f.centre]), 6))
        groups.setdefault(key, []).append(k)
    orbitals: list[tuple[float, int, np.ndarray]] = []
    for key, members in groups.items():
        g = len(members)
        # orthonormal combinations: first column ∝ (1, ..., 1)
        seed = np.eye(g)
        seed[:, 0] = 1.0
        q, _ = np.linalg.qr(seed)
        q[:, 0] *= np.sign(q[0, 0])
        level = _level(system, basis[members[0]])
        for c in range(g):
            coeff = np.zeros(len(basis))
            coeff[members] = q[:, c]
            orbitals.append((level + 1e-6 * c, len(orbitals), coeff))
    orbitals.sort(key=lambda t: (t[0], t[1]))
    need = max(system.n_up, system.n_down)
    if need > len(orbitals):
        raise ValueError(
            f"the aufbau guess has {len(orbitals)} orbitals but {need} electrons of one spin; "
            "systems beyond the n = 2 shell need a larger basis"
        )
    coeffs = np.stack([o[2] for o in orbitals[:need]]) if need else np.zeros((0, len(basis)))
    return coeffs[: system.n_up], coeffs[: system.n_down]


def normalisation(kind: str, zeta):
    """1 / sqrt(∫ χ² d³r) for a basis function of ``kind`` with exponent ``zeta`` (array-friendly)."""
    pi = np.pi
    if kind == "s":
        return (zeta**3 / pi) ** 0.5
    if kind == "sc":
        return (zeta**3 / (7 * pi)) ** 0.5
    if kind == "s2":
        return (2 * zeta**7 / (45 * pi)) ** 0.5
    if kind == "p":
        return (zeta**5 / pi) ** 0.5
    if kind == "pc":
        return (2 * zeta**5 / (27 * pi)) ** 0.5
    raise ValueError(f"unknown basis function kind {kind!r}; known: {KINDS}")
