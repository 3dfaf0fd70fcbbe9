"""Reference energies of LiH along its bond from PySCF (not part of psiloom): CCSD(T) with all four
electrons correlated in the core-valence bases cc-pCVTZ and cc-pCVQZ (cc-pVTZ/QZ on H) and their
basis-set limit.

For four electrons CCSD(T) lies within a few tenths of a mHa of full CI (common practice; full CI
in cc-pCVTZ, 2.5 million determinants, took over half an hour per geometry here). The correlation
energy is extrapolated as E_c(X) = E_c(∞) + A·X⁻³ from X = 3 and 4 (Helgaker, Klopper, Koch &
Noga, JCP 106, 9639 (1997)); the Hartree-Fock part is taken from cc-pCVQZ. At R = 3.015 bohr the
line carries the difference from the exact non-relativistic energy −8.070548 Ha (Cencek &
Rychlewski, from memory), which calibrates the other points; the differences E(R) − E(3.015) are
the reference for the shape of ``molecules.py --case scan``'s LiH curve.

usage: python lih_curve_basis_limit.py [R ...]   (bohr; default 2.6 2.8 3.015 3.4 4.0). One JSON line
per R on stdout; well under a minute per R.
"""
import json
import sys
import time

from pyscf import cc, gto, scf

EXACT_EQUILIBRIUM = -8.070548  # R = 3.015 bohr (Cencek & Rychlewski, from memory)


def ccsd_t(bond_length: float, x: str) -> tuple[float, float]:
    """(E_HF, E_CCSD(T)) in hartree for LiH at ``bond_length`` bohr in cc-pCVXZ (Li), cc-pVXZ (H)."""
    mol = gto.M(atom=f"Li 0 0 0; H 0 0 {bond_length}", unit="bohr",
                basis={"Li": f"cc-pcv{x}z", "H": f"cc-pv{x}z"}, verbose=0, max_memory=8000)
    mf = scf.RHF(mol).run(conv_tol=1e-11)
    coupled = cc.CCSD(mf).run(conv_tol=1e-10)
    return mf.e_tot, mf.e_tot + coupled.e_corr + coupled.ccsd_t()


def main() -> None:
    lengths = [float(r) for r in sys.argv[1:]] or [2.6, 2.8, 3.015, 3.4, 4.0]
    for r in lengths:
        start = time.time()
        hf3, cc3 = ccsd_t(r, "t")
        hf4, cc4 = ccsd_t(r, "q")
        corr3, corr4 = cc3 - hf3, cc4 - hf4
        corr_limit = (4**3 * corr4 - 3**3 * corr3) / (4**3 - 3**3)
        line = {"bond_length_bohr": r, "ccsd_t_cc_pcvtz": cc3, "ccsd_t_cc_pcvqz": cc4, "hf_cc_pcvqz": hf4,
                "basis_limit": hf4 + corr_limit, "seconds": time.time() - start}
        if r == 3.015:
            line["exact"] = EXACT_EQUILIBRIUM
            line["limit_minus_exact_mha"] = 1e3 * (line["basis_limit"] - EXACT_EQUILIBRIUM)
        print(json.dumps(line), flush=True)


if __name__ == "__main__":
    main()
