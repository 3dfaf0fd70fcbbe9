"""Reference energies of LiH along its bond from PySCF (not part of psiloom): Hartree-Fock and full
CI in the core-valence basis cc-pCVTZ (cc-pVTZ on H), all four electrons correlated.

cc-pCVTZ carries the tight functions that Li's 1s correlation needs, so the full-CI energy is
variational for the basis and lies some mHa above the exact non-relativistic energy (−8.070548 Ha at
R = 3.015 bohr, Cencek & Rychlewski, from memory); most of that basis error is the same along the
bond, so the energy differences E(R) − E(3.015) are the reference for the shape of
``molecules.py --case scan``'s LiH curve (the stored lines say how far each is from the exact
equilibrium energy).

usage: python lih_curve_fci.py [R ...]   (bohr; default 2.6 2.8 3.015 3.4 4.0). One JSON line per R
on stdout; about a minute per R on two cores.
"""
import json
import sys
import time

from pyscf import fci, gto, scf

EXACT_EQUILIBRIUM = -8.070548  # R = 3.015 bohr (Cencek & Rychlewski, from memory)


def energies(bond_length: float, basis: str = "cc-pcvtz") -> tuple[float, float, int]:
    """(E_HF, E_FCI, number of basis functions) in hartree for LiH at ``bond_length`` bohr."""
    mol = gto.M(atom=f"Li 0 0 0; H 0 0 {bond_length}", unit="bohr", basis={"Li": basis, "H": "cc-pvtz"},
                verbose=0, max_memory=8000)
    mf = scf.RHF(mol).run(conv_tol=1e-11)
    solver = fci.FCI(mf)
    solver.conv_tol = 1e-10
    e_fci, _ = solver.kernel()
    return mf.e_tot, float(e_fci), mol.nao


def main() -> None:
    lengths = [float(r) for r in sys.argv[1:]] or [2.6, 2.8, 3.015, 3.4, 4.0]
    for r in lengths:
        start = time.time()
        hf, full, n_basis = energies(r)
        line = {"bond_length_bohr": r, "basis": "cc-pCVTZ (Li), cc-pVTZ (H)", "n_basis": n_basis,
                "hf": hf, "fci": full, "seconds": time.time() - start}
        if r == 3.015:
            line["fci_minus_exact_mha"] = 1e3 * (full - EXACT_EQUILIBRIUM)
        print(json.dumps(line), flush=True)


if __name__ == "__main__":
    main()
