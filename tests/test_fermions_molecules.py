"""Molecules in a Gaussian basis against PySCF's Hartree-Fock and full CI (same basis)."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

pyscf = pytest.importorskip("pyscf", reason="molecular tests need PySCF: pip install 'psiloom[test]' (or [chemistry])")

from psiloom import fermions as fm  # noqa: E402
from psiloom.reference import ground_state  # noqa: E402
from psiloom.states import BoundState  # noqa: E402

H2 = [("H", (0.0, 0.0, 0.0)), ("H", (0.0, 0.0, 0.7414))]  # Å, near equilibrium
LIH = [("Li", (0.0, 0.0, 0.0)), ("H", (0.0, 0.0, 1.5949))]


@pytest.mark.parametrize("atoms, options", [(H2, {}), (LIH, {}), (LIH, {"n_frozen": 1, "n_active": 4})],
                         ids=["H2", "LiH", "LiH-frozen-core"])
def test_exact_diagonalisation_in_basis_equals_pyscf_fci(atoms, options):
    problem = fm.molecular_hamiltonian(atoms, "sto-3g", units="angstrom", **options)
    e0, _ = ground_state(problem.hamiltonian, problem.space)
    assert e0 == pytest.approx(problem.fci_energy(), abs=1e-8)
    # the Hartree-Fock determinant: its diagonal element, and the local energy of the HF
    # Slater determinant (zero on every other configuration), equal PySCF's SCF energy
    x = jnp.asarray(problem.hartree_fock_configuration())[None]
    model = fm.SlaterDeterminant(problem.space, problem.hartree_fock_guess())
    params = model.init(jax.random.PRNGKey(0), x)
    e_loc = jax.jit(lambda p, x: problem.hamiltonian.local_energy(BoundState(model, p), x))(params, x)
    assert float(e_loc[0].real) == pytest.approx(problem.hartree_fock_energy, abs=1e-8)


def test_molecule_bad_input():
    with pytest.raises(ValueError, match="no-such-basis"):
        fm.molecular_hamiltonian(H2, "no-such-basis", units="angstrom")
    with pytest.raises(ValueError, match="n_active=1"):
        fm.molecular_hamiltonian(LIH, "sto-3g", units="angstrom", n_frozen=0, n_active=1)
    with pytest.raises(ValueError, match="n_frozen=3"):
        fm.molecular_hamiltonian(LIH, "sto-3g", units="angstrom", n_frozen=3)
    with pytest.raises(ValueError, match="spin"):
        fm.molecular_hamiltonian(H2, "sto-3g", spin=1)


def test_missing_pyscf_names_the_extra(monkeypatch):
    import builtins

    real_import = builtins.__import__

    def fake(name, *args, **kwargs):
        if name == "pyscf" or name.startswith("pyscf."):
            raise ImportError("no pyscf")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", fake)
    with pytest.raises(ImportError, match="chemistry"):
        fm.molecular_hamiltonian(H2, "sto-3g")
