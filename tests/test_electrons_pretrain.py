"""Hartree-Fock orbitals from PySCF, evaluated in JAX, and orbital pretraining (PySCF optional)."""

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest

import psiloom as pl

pyscf = pytest.importorskip("pyscf", reason="PySCF (in the test extra: pip install -e '.[test]') is not installed")

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


def test_pretrained_backflow_determinant_starts_at_hartree_fock_energy():
    # Right after pretraining, the backflow determinant (with the cusp Jastrow's electron–nucleus
    # part, whose one-electron factors pretraining divides out) has the Hartree-Fock energy: VMC
    # within a few mHa of PySCF's E_HF (H₂, R = 1.4 bohr, cc-pVDZ; the HF limit −1.13363 Ha,
    # Kołos & Roothaan 1960 from memory, is a lower bound for any single determinant). Without the
    # division the start was ~57 mHa above E_HF for the full state and this test failed.
    h2 = el.molecule([("H", (0, 0, 0)), ("H", (0, 0, 1.4))])
    hf = pretrain.hartree_fock(h2, basis="cc-pvdz")
    assert -1.13363 < hf.energy < -1.12  # PySCF RHF/cc-pVDZ ≈ −1.1287 (from memory)
    model = el.SlaterJastrow(el.BackflowOrbitals(h2, width=4, channels=2, layers=1),
                             (el.CuspJastrow(h2, electronic=False),))
    params = jax.jit(model.init)(jax.random.PRNGKey(0), h2.random(jax.random.PRNGKey(0), 1))
    params, losses = pretrain.pretrain_orbitals(model, params, hf, jax.random.PRNGKey(1), n_steps=100,
                                                n_walkers=64, learning_rate=3e-2, fit_walkers=256)
    assert losses[-5:].mean() < 0.01 * losses[0]
    sampler = el.ElectronSampler(h2, n_chains=64, sweep=5, burn_in=1, equilibrate=50)
    search = pl.train.GroundStateSearch(model, el.CoulombHamiltonian(h2), sampler, optax.sgd(0.0), n_samples=64)
    energy, _ = search.evaluate(search.init(jax.random.PRNGKey(2), params=params), 16384, burn_in_sweeps=10)
    mean, error = float(energy.mean), float(energy.error)
    assert error < 0.006
    assert abs(mean - hf.energy) < 0.004 + 3 * error, (mean, error, hf.energy)
    assert mean > -1.13363 - 3 * error  # variational bound for one determinant


def test_least_squares_refit_minimises_the_loss_over_the_coefficients(lih_hf):
    # The orbital loss is quadratic in the linear coefficients: after the exact solve its gradient
    # with respect to them vanishes on the walkers used (first-order optimality; the normal
    # equations), and the loss is no higher than before (it is the minimum over them).
    model = el.slater_jastrow(LIH, n_det=1, neural_jastrow=False)
    params = jax.jit(model.init)(jax.random.PRNGKey(2), LIH.random(jax.random.PRNGKey(1), 1))
    x = LIH.random(jax.random.PRNGKey(4), 256, width=1.0)
    loss = lambda p: pretrain.orbital_loss(model, p, lih_hf.orbitals, x)
    fitted = pretrain.fit_orbital_coefficients(model, params, lih_hf.orbitals, x)
    before, after = float(loss(params)), float(loss(fitted))
    assert after < before
    grads = jax.grad(loss)(fitted)["params"]["orbitals"]
    scale = jax.grad(loss)(params)["params"]["orbitals"]
    for name in ("coeff_up", "coeff_down"):
        assert np.max(np.abs(grads[name])) < 1e-8 * max(1.0, float(np.max(np.abs(scale[name]))))
    # the exponents are not the solve's business
    np.testing.assert_array_equal(fitted["params"]["orbitals"]["exponents"], params["params"]["orbitals"]["exponents"])


def test_least_squares_refit_keeps_the_differences_between_determinants(lih_hf):
    model = el.slater_jastrow(LIH, n_det=3, neural_jastrow=False)
    params = jax.jit(model.init)(jax.random.PRNGKey(2), LIH.random(jax.random.PRNGKey(1), 1))
    x = LIH.random(jax.random.PRNGKey(4), 128, width=1.0)
    fitted = pretrain.fit_orbital_coefficients(model, params, lih_hf.orbitals, x)
    for name in ("coeff_up", "coeff_down"):
        old, new = params["params"]["orbitals"][name], fitted["params"]["orbitals"][name]
        np.testing.assert_allclose(new - new[:1], old - old[:1], atol=1e-12)
        assert np.max(np.abs(new[0] - old[0])) > 1e-3  # the first determinant did move


def test_pretraining_holds_the_backflow_and_rejects_bad_options(lih_hf):
    model = el.SlaterJastrow(el.BackflowOrbitals(LIH, width=4, channels=2, layers=1), (el.CuspJastrow(LIH),))
    params = jax.jit(model.init)(jax.random.PRNGKey(0), LIH.random(jax.random.PRNGKey(0), 1))
    trained, _ = pretrain.pretrain_orbitals(model, params, lih_hf, jax.random.PRNGKey(1), n_steps=5, n_walkers=32,
                                            learning_rate=1e-2, refits=1, fit_walkers=64)
    held = params["params"]["orbitals"]["backflow"]
    jax.tree_util.tree_map(np.testing.assert_array_equal, trained["params"]["orbitals"]["backflow"], held)
    moved = jax.tree_util.tree_map(lambda a, b: float(np.max(np.abs(a - b))), trained["params"]["orbitals"]["analytic"],
                                   params["params"]["orbitals"]["analytic"])
    assert min(jax.tree_util.tree_leaves(moved)) > 0.0
    freed, _ = pretrain.pretrain_orbitals(model, params, lih_hf, jax.random.PRNGKey(1), n_steps=5, n_walkers=32,
                                          learning_rate=1e-2, hold=(), refits=0)
    changed = jax.tree_util.tree_map(lambda a, b: float(np.max(np.abs(a - b))), freed["params"]["orbitals"]["backflow"],
                                     held)
    assert max(jax.tree_util.tree_leaves(changed)) > 0.0
    with pytest.raises(ValueError, match="nonexistent"):
        pretrain.pretrain_orbitals(model, params, lih_hf, jax.random.PRNGKey(1), n_steps=1, hold=("nonexistent",))
    with pytest.raises(ValueError, match="refits"):
        pretrain.pretrain_orbitals(model, params, lih_hf, jax.random.PRNGKey(1), n_steps=1, refits=-1)
