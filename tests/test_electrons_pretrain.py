"""Hartree-Fock orbitals from PySCF, evaluated in JAX, and orbital pretraining (PySCF optional)."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

pyscf = pytest.importorskip("pyscf")

from psiloom import electrons as el  # noqa: E402
from psiloom.electrons import pretrain  # noqa: E402

LIH = el.molecule([("Li", (0, 0, 0)), ("H", (0.3, -0.2, 3.015))])


@pytest.fixture(scope="module")
def lih_hf():
    return pretrain.hartree_fock(LIH, basis="cc-pvdz")


@pytest.mark.parametrize("cart", [False, True])
def test_jax_atomic_orbitals_match_pyscf(cart):
    # PySCF's own evaluation (mol.eval_gto) is the reference; cc-pVDZ on Li has s, p and d shells.
    hf = pretrain.hartree_fock(LIH, basis="cc-pvdz", cart=cart) if cart else None
    mol = pyscf.gto.M(atom=[(3, (0, 0, 0)), (1, (0.3, -0.2, 3.015))], unit="bohr", basis="cc-pvdz", cart=cart)
    basis = pretrain.GaussianBasis.from_pyscf(mol) if hf is None else hf.orbitals.basis
    points = np.random.default_rng(0).normal(scale=1.5, size=(50, 3))
    reference = mol.eval_gto("GTOval_cart" if cart else "GTOval_sph", points)
    values = np.asarray(jax.jit(basis)(jnp.asarray(points)))
    assert values.shape == reference.shape
    np.testing.assert_allclose(values, reference, atol=1e-12, rtol=1e-10)


def test_jax_molecular_orbitals_match_pyscf(lih_hf):
    # Occupied MOs: PySCF AO values times PySCF's converged mo_coeff.
    x = LIH.random(jax.random.PRNGKey(0), 8)
    up, down = lih_hf.orbitals.apply({}, x)
    ao = lih_hf.mol.eval_gto("GTOval_sph", np.asarray(x).reshape(-1, 3)).reshape(8, 4, -1)
    c = lih_hf.scf.mo_coeff
    np.testing.assert_allclose(np.asarray(up[:, 0]), ao[:, :2] @ c[:, :2], atol=1e-12)
    np.testing.assert_allclose(np.asarray(down[:, 0]), ao[:, 2:] @ c[:, :2], atol=1e-12)
    # HF of LiH in cc-pVDZ lies above the HF limit −7.987352 (Cencek & Rychlewski, from memory)
    # by a few mHa at most.
    assert -7.987352 < lih_hf.energy < -7.97


def test_pretraining_pulls_orbitals_toward_hartree_fock(lih_hf):
    model = el.slater_jastrow(LIH, n_det=2, neural_jastrow=False)
    params = jax.jit(model.init)(jax.random.PRNGKey(2), LIH.random(jax.random.PRNGKey(1), 1))
    params, losses = pretrain.pretrain_orbitals(model, params, lih_hf, jax.random.PRNGKey(3), n_steps=60,
                                                n_walkers=64, learning_rate=3e-2)
    assert np.all(np.isfinite(losses))
    # the misfit on walkers from |ψ_HF|² falls by well over a factor of 5 (observed ~15)
    assert losses[-5:].mean() < 0.2 * losses[:3].mean()
    with pytest.raises(ValueError, match="n_steps"):
        pretrain.pretrain_orbitals(model, params, lih_hf, jax.random.PRNGKey(3), n_steps=0)
