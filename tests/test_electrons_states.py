"""Electron trial states and the Coulomb Hamiltonian: symmetry, exact solutions, cusps, Laplacians."""

import importlib.util

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import given, strategies as st

from psiloom import electrons as el
from psiloom.electrons.basis import BasisFunction

LI = el.atom("Li")  # n_up = 2, n_down = 1
BE = el.atom("Be")  # n_up = 2, n_down = 2


def _perturbed(params, scale=0.1, seed=5):
    """Random non-zero values everywhere (the zero-initialised read-outs would hide bugs)."""
    leaves, tree = jax.tree_util.tree_flatten(params)
    keys = jax.random.split(jax.random.PRNGKey(seed), len(leaves))
    return jax.tree_util.tree_unflatten(tree, [l + scale * jax.random.normal(k, l.shape) for l, k in zip(leaves, keys)])


def _config(system, seed):
    return np.random.default_rng(seed).normal(scale=1.2, size=(system.n_electrons, 3))


# Slater-Jastrow Be (cusp Jastrow) and the feature network, shared by several tests
_SJ_BE_MODEL = el.slater_jastrow(BE, neural_jastrow=False)
_SJ_BE_PARAMS = _perturbed(jax.jit(_SJ_BE_MODEL.init)(jax.random.PRNGKey(2), jnp.zeros((1, 4, 3))))
_SJ_BE_APPLY = jax.jit(lambda p, x: _SJ_BE_MODEL.apply(p, x, method=_SJ_BE_MODEL.sign_and_log))

_FEATURE_NET = el.MomentMixer(BE, width=8, channels=4, layers=2)
_FEATURE_PARAMS = _perturbed(jax.jit(_FEATURE_NET.init)(jax.random.PRNGKey(4), jnp.zeros((1, 4, 3))))
_FEATURES = jax.jit(_FEATURE_NET.apply)


@pytest.fixture(scope="module")
def neural_li():
    # small sizes: these tests check exact identities, and compilation dominates their cost. No
    # message-passing layer (layers=0): the backflow's pair term already couples all electrons,
    # and the feature network's own equivariance is tested below with two layers.
    model = el.neural_slater_jastrow(LI, n_det=2, width=4, channels=2, layers=0, jastrow_width=4)
    params = _perturbed(jax.jit(model.init)(jax.random.PRNGKey(1), jnp.zeros((1, 3, 3))))
    return model, params


@pytest.fixture(scope="module")
def neural_li_sign_log(neural_li):
    model, params = neural_li
    return jax.jit(lambda x: model.apply(params, x, method=model.sign_and_log))


# ----------------------------------------------------------------------------- antisymmetry
@given(st.integers(0, 2**31 - 1), st.sampled_from(["neural Li up", "Slater-Jastrow Be down"]))
def test_same_spin_exchange_flips_sign(neural_li_sign_log, seed, case):
    # Pauli principle: ψ is antisymmetric under exchanging two same-spin electrons (exact).
    if case == "neural Li up":
        system, sign_log, (i, j) = LI, neural_li_sign_log, (0, 1)
    else:
        params = jax.tree_util.tree_map(jnp.copy, _SJ_BE_PARAMS)
        system, sign_log, (i, j) = BE, (lambda x: _SJ_BE_APPLY(params, x)), (2, 3)
    x = _config(system, seed)
    swapped = x.copy()
    swapped[[i, j]] = x[[j, i]]
    s0, l0 = sign_log(x)
    s1, l1 = sign_log(swapped)
    assert float(s1) == -float(s0)
    assert float(l1) == pytest.approx(float(l0), abs=1e-10)


@given(st.integers(0, 2**31 - 1))
def test_closed_shell_spin_block_exchange(seed):
    # Spin-factorised closed shell with the same orbitals for both spins and a spin-symmetric
    # Jastrow (a singlet, e.g. Be 1s²2s²): exchanging the up block with the down block of
    # positions leaves ψ unchanged, since ψ = det Φ(r↑) det Φ(r↓) e^{J} is symmetric in the
    # two blocks (textbook property of the restricted spin-factorised form).
    params = jax.tree_util.tree_map(jnp.copy, _SJ_BE_PARAMS)
    orb = params["params"]["orbitals"]
    params["params"]["orbitals"]["coeff_down"] = orb["coeff_up"]
    x = _config(BE, seed)
    swapped = np.concatenate([x[2:], x[:2]])
    s0, l0 = _SJ_BE_APPLY(params, x)
    s1, l1 = _SJ_BE_APPLY(params, swapped)
    assert float(s1) == float(s0)
    assert float(l1) == pytest.approx(float(l0), abs=1e-10)
    # ... and a single opposite-spin exchange is *not* a symmetry: the value changes.
    one = x.copy()
    one[[0, 2]] = x[[2, 0]]
    assert abs(float(_SJ_BE_APPLY(params, one)[1]) - float(l0)) > 1e-8


def test_spin_factorised_form_matches_explicit_determinants():
    # |ψ| = |det Φ↑| |det Φ↓| e^{J} computed independently with numpy determinants.
    model = el.SlaterJastrow(el.SlaterTypeOrbitals(LI), (el.CuspJastrow(LI),))
    x = _config(LI, 3)[None]
    params = _perturbed(jax.jit(model.init)(jax.random.PRNGKey(0), x))
    pieces = jax.jit(lambda p, y: (model.apply(p, y, method=model.orbital_matrices),
                                   el.CuspJastrow(LI).apply({"params": p["params"]["jastrows_0"]}, y),
                                   model.apply(p, y)))
    # exchanging the up electron 1 with the down electron 2 re-evaluates the same formula
    y = x.copy()
    y[0, [1, 2]] = x[0, [2, 1]]
    for config in (x, y):
        (up, down), jastrow, log_psi = pieces(params, config)
        dets = np.linalg.det(np.asarray(up[0, 0])) * np.linalg.det(np.asarray(down[0, 0]))
        assert float(log_psi[0]) == pytest.approx(np.log(abs(dets)) + float(jastrow[0]), rel=1e-12)


@given(st.integers(0, 2**31 - 1), st.permutations(range(2)), st.permutations(range(2)))
def test_features_are_permutation_equivariant(seed, perm_up, perm_down):
    # Relabelling electrons within each spin group relabels the feature rows identically.
    params = _FEATURE_PARAMS
    x = _config(BE, seed)
    order = np.concatenate([np.asarray(perm_up), 2 + np.asarray(perm_down)])
    h = _FEATURES(params, x[None])[0]
    h_perm = _FEATURES(params, x[order][None])[0]
    np.testing.assert_allclose(np.asarray(h_perm), np.asarray(h)[order], atol=1e-12)
    assert h.shape == (4, _FEATURE_NET.width)


# ----------------------------------------------------------------------------- exact solutions
def _hydrogenic(z):
    system = el.molecule([(float(z), (0.1, -0.2, 0.3))], n_up=1, n_down=0)
    orbitals = el.SlaterTypeOrbitals(system, basis=(BasisFunction(0, "s", float(z), label="1s"),), cusp_free=False)
    model = el.SlaterJastrow(orbitals, ())
    params = model.init(jax.random.PRNGKey(0), jnp.zeros((1, 1, 3)))
    return system, model, params


@pytest.mark.parametrize("z, exact", [(1, -0.5), (2, -2.0)])
@pytest.mark.parametrize("method", ["forward", "hessian"])
def test_hydrogenic_ground_state_has_exact_local_energy(z, exact, method):
    # ψ = e^{−Z r} is the exact 1s state: E_loc = −Z²/2 at every point, zero variance
    # (hydrogen −0.5 Ha, He⁺ −2.0 Ha; textbook hydrogen-like atom).
    system, model, params = _hydrogenic(z)
    x = jax.random.normal(jax.random.PRNGKey(z), (64, 1, 3)) * 2.0
    h = el.CoulombHamiltonian(system, laplacian=method)
    parts = jax.jit(lambda y: h.local_energy_parts(lambda z: model.apply(params, z), y, chunk=16))(x)
    np.testing.assert_allclose(np.asarray(parts.total), exact, atol=1e-10)
    assert np.all(np.asarray(parts.kinetic) != 0)


def test_wrong_trial_exponent_is_not_an_eigenstate():
    # With ζ ≠ Z the local energy varies: E_L = −ζ²/2 + (ζ − Z)/r (hydrogen-like algebra).
    system = el.molecule([(1.0, (0, 0, 0))], n_up=1, n_down=0)
    orbitals = el.SlaterTypeOrbitals(system, basis=(BasisFunction(0, "s", 1.3, label="1s"),), cusp_free=False)
    model = el.SlaterJastrow(orbitals, ())
    params = model.init(jax.random.PRNGKey(0), jnp.zeros((1, 1, 3)))
    x = jax.random.normal(jax.random.PRNGKey(1), (16, 1, 3))
    e = jax.jit(lambda y: el.CoulombHamiltonian(system).local_energy(lambda z: model.apply(params, z), y))(x)
    r = np.linalg.norm(np.asarray(x[:, 0]), axis=-1)
    np.testing.assert_allclose(np.asarray(e), -1.3**2 / 2 + 0.3 / r, rtol=1e-10)


# ----------------------------------------------------------------------------- Laplacians
# Forward Laplacian vs Hessian trace vs finite differences on a neural state: test_laplacian_blocks.py


@pytest.mark.skipif(importlib.util.find_spec("folx") is None, reason="optional package folx not installed")
def test_folx_laplacian_agrees_with_own_forward_laplacian():
    model = el.slater_jastrow(LI, neural_jastrow=False)
    x = jnp.asarray(_config(LI, 12))
    params = _perturbed(jax.jit(model.init)(jax.random.PRNGKey(0), x[None]))
    f = lambda r: model.apply(params, r.reshape(1, 3, 3))[0]
    (v1, g1, l1), (v0, g0, l0) = jax.jit(lambda y: [el.value_grad_laplacian(f, y, m) for m in ("folx", "forward")])(x)
    np.testing.assert_allclose(np.asarray(g1), np.asarray(g0), atol=1e-10)
    assert float(l1) == pytest.approx(float(l0), rel=1e-10, abs=1e-10)


def test_primitive_without_rule_is_never_a_silent_slow_path():
    # lax.bessel_i1e has no forward-Laplacian rule: the test configuration turns the warning into
    # an error; a user (default warning filter) is told once per primitive, and the generic rule
    # still gives the exact Laplacian (compared with the jvp-of-gradient method).
    import warnings
    from psiloom.electrons.laplacian import UnknownPrimitiveWarning

    f = lambda y: jnp.sum(jax.lax.bessel_i1e(y) * y)
    x = jnp.asarray([0.3, -0.7, 1.1])
    with pytest.raises(UnknownPrimitiveWarning, match="bessel_i1e"):
        el.value_grad_laplacian(f, x, "forward")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("default")
        results = [el.value_grad_laplacian(f, x, "forward") for _ in range(3)]
    assert [w.category for w in caught] == [UnknownPrimitiveWarning]
    _, g0, l0 = el.value_grad_laplacian(f, x, "hessian")
    np.testing.assert_allclose(np.asarray(results[0][1]), np.asarray(g0), rtol=1e-12)
    assert float(results[0][2]) == pytest.approx(float(l0), rel=1e-12)


def test_unknown_laplacian_method_raises():
    with pytest.raises(ValueError, match="unknown laplacian"):
        el.CoulombHamiltonian(LI, laplacian="magic")
    with pytest.raises(ValueError, match="unknown Laplacian method"):
        el.value_grad_laplacian(jnp.sum, jnp.zeros(3), "magic")


# ----------------------------------------------------------------------------- cusp conditions
@pytest.fixture(scope="module")
def mapped_li():
    # the same small state with the nuclear cusp map (psiloom.electrons.cusp_map)
    model = el.neural_slater_jastrow(LI, n_det=2, width=4, channels=2, layers=0, jastrow_width=4, cusp_map=True)
    params = _perturbed(jax.jit(model.init)(jax.random.PRNGKey(1), jnp.zeros((1, 3, 3))))
    return model, params


@pytest.fixture(scope="module")
def radial_li():
    # the same small state with the cusp Jastrow's short-range radial terms (non-zero after _perturbed)
    model = el.neural_slater_jastrow(LI, n_det=2, width=4, channels=2, layers=0, jastrow_width=4, radial_terms=3)
    params = _perturbed(jax.jit(model.init)(jax.random.PRNGKey(1), jnp.zeros((1, 3, 3))))
    return model, params


@pytest.mark.parametrize("case", ["plain", "mapped, pair inside the map's range", "radial terms"])
def test_kato_cusp_conditions(neural_li, mapped_li, radial_li, case):
    # Kato 1957: spherically averaged ∂ ln ψ/∂r at coalescence = −Z (electron–nucleus) and
    # +1/2 (antiparallel electrons); +1/4 for parallel electrons after removing the linear
    # zero of ψ (Pack & Byers Brown 1966, from memory). Averaging over ±n removes the smooth
    # linear part; Richardson extrapolation 2f(δ) − f(2δ) removes the O(δ) remainder. With the
    # cusp map the electron pairs meet 0.1 bohr from the nucleus, where the map stretches space
    # (ψ varies faster there: smaller δ).
    model, params = {"plain": neural_li, "radial terms": radial_li}.get(case, mapped_li)
    mapped = case.startswith("mapped")
    delta = 1e-5 if mapped else 1e-4
    nucleus = jnp.asarray(LI.positions[0])

    @jax.jit
    def cusps(x, n):
        # (moved electron, coalescence centre, pole 1/δ removed): e–n, antiparallel, parallel
        electrons = jnp.asarray([0, 2, 1])
        centres = jnp.stack([nucleus, x[0], x[0]])
        poles = jnp.asarray([0.0, 0.0, 1.0])

        def radial(electron, centre, direction, delta):
            f = lambda d: model.apply(params, x.at[electron].set(centre + d * direction))
            return jax.grad(f)(delta)

        def averaged(electron, centre, pole, delta):
            return 0.5 * (radial(electron, centre, n, delta) + radial(electron, centre, -n, delta)) - pole / delta

        one = lambda e, c, p: 2 * averaged(e, c, p, delta) - averaged(e, c, p, 2 * delta)
        return jax.vmap(one)(electrons, centres, poles)

    for seed in (0, 1):
        n = np.random.default_rng(seed).normal(size=3)
        x = _config(LI, 100 + seed)
        if mapped:
            x[0] = np.asarray(LI.positions[0]) + 0.1 * n / np.linalg.norm(n)
        en, anti, par = np.asarray(cusps(jnp.asarray(x), jnp.asarray(n / np.linalg.norm(n))))
        assert en == pytest.approx(-3.0, abs=1e-4)  # Z(Li) = 3
        assert anti == pytest.approx(0.5, abs=1e-4)  # electron 2 (down) meets electron 0 (up)
        assert par == pytest.approx(0.25, abs=1e-3)  # electron 1 (up) meets electron 0 (up)


_RADIAL_BE = el.CuspJastrow(BE, radial_terms=3)
_RADIAL_BE_PARAMS = _perturbed(jax.jit(_RADIAL_BE.init)(jax.random.PRNGKey(6), jnp.zeros((1, 4, 3))), scale=0.5)


@given(st.integers(0, 2**31 - 1), st.permutations([0, 1]), st.permutations([2, 3]))
def test_radial_terms_are_symmetric_under_same_spin_exchange(seed, perm_up, perm_down):
    # a Jastrow factor is symmetric under any permutation within a spin species (exact)
    x = jnp.asarray(_config(BE, seed))[None]
    permuted = x[:, np.asarray(list(perm_up) + list(perm_down))]
    value, swapped = (_RADIAL_BE.apply(_RADIAL_BE_PARAMS, y) for y in (x, permuted))
    np.testing.assert_allclose(np.asarray(swapped), np.asarray(value), rtol=1e-12)


def test_radial_terms_start_at_zero_and_factor_into_one_electron_terms():
    # a new state is unchanged by the radial terms (zero coefficients); the electron–nucleus
    # part stays a product of one-electron factors (what Hartree-Fock pretraining moves into
    # the orbitals): J_en = Σ_i j_i exactly
    lih = el.molecule([("Li", (0, 0, 0)), ("H", (0.3, -0.2, 3.015))])
    x = lih.random(jax.random.PRNGKey(0), 5)
    radial, plain = el.CuspJastrow(lih, radial_terms=4), el.CuspJastrow(lih)
    fresh = radial.init(jax.random.PRNGKey(1), x)
    shared = {"params": {k: fresh["params"][k] for k in ("ee_length", "en_length")}}
    np.testing.assert_allclose(np.asarray(radial.apply(fresh, x)), np.asarray(plain.apply(shared, x)), rtol=1e-14)
    nuclear = el.CuspJastrow(lih, electronic=False, radial_terms=4)
    params = _perturbed(nuclear.init(jax.random.PRNGKey(2), x), scale=0.5)
    assert np.any(np.abs(np.asarray(params["params"]["en_radial_coeff"])) > 0.1)
    terms = nuclear.apply(params, x, method=nuclear.one_electron_terms)
    np.testing.assert_allclose(np.asarray(jnp.sum(terms, axis=-1)), np.asarray(nuclear.apply(params, x)), rtol=1e-12)
    # ... and they do change the value once the coefficients are non-zero
    no_radial = {"params": {"en_length": params["params"]["en_length"]}}
    assert np.max(np.abs(np.asarray(nuclear.apply(params, x) - el.CuspJastrow(lih, electronic=False).apply(no_radial, x)))) > 1e-3


@pytest.mark.parametrize("bad", [-1, 2.5, "3", True])
def test_bad_radial_terms_raise(bad):
    with pytest.raises(ValueError, match="radial_terms"):
        el.CuspJastrow(BE, radial_terms=bad)


# ----------------------------------------------------------------------------- building blocks
_WEIGHTS = st.floats(-2, 2, allow_subnormal=False).filter(lambda w: w == 0 or abs(w) > 1e-6)


@given(st.lists(st.tuples(st.floats(-30, 30), st.sampled_from([-1.0, 1.0]), _WEIGHTS), min_size=1, max_size=5))
def test_signed_log_sum_exp_matches_direct_sum(terms):
    logs = np.array([t[0] for t in terms])
    signs = np.array([t[1] for t in terms])
    weights = np.array([t[2] for t in terms])
    direct = np.sum(weights * signs * np.exp(logs))
    sign, log = el.signed_log_sum_exp(jnp.asarray(signs), jnp.asarray(logs), jnp.asarray(weights))
    if abs(direct) < 1e-9 * np.max(np.abs(weights) * np.exp(logs)) or direct == 0:
        return  # cancellation: nothing to compare in floating point
    assert float(sign) == np.sign(direct)
    assert float(log) == pytest.approx(np.log(abs(direct)), abs=1e-8)


def test_empty_determinant_is_one():
    sign, log = el.signed_log_det(jnp.zeros((5, 2, 0, 0)))
    assert sign.shape == (5, 2) and np.all(np.asarray(sign) == 1) and np.all(np.asarray(log) == 0)
    with pytest.raises(ValueError, match="square"):
        el.signed_log_det(jnp.zeros((2, 3)))


def test_bad_configurations_raise():
    model = el.slater_jastrow(LI, neural_jastrow=False)
    with pytest.raises(ValueError, match=r"\(\.\.\., n_electrons, 3\)"):
        model.init(jax.random.PRNGKey(0), jnp.zeros((1, 3, 2)))
    with pytest.raises(ValueError, match="3 electrons"):
        model.init(jax.random.PRNGKey(0), jnp.zeros((1, 4, 3)))
    with pytest.raises(ValueError, match="n_samples, 3, 3"):
        el.CoulombHamiltonian(LI).local_energy(lambda y: jnp.zeros(y.shape[0]), jnp.zeros((2, 2, 3)))


def test_single_configuration_and_batch_shapes(neural_li_sign_log):
    x = jnp.asarray(_config(LI, 7))
    sign, single = neural_li_sign_log(x)
    signs, batch = neural_li_sign_log(jnp.stack([x, x])[None])
    assert single.shape == () and sign.shape == () and batch.shape == (1, 2) and signs.shape == (1, 2)
    assert float(batch[0, 1]) == pytest.approx(float(single), abs=1e-12)
    assert float(signs[0, 0]) == float(sign) and abs(float(sign)) == 1.0


def test_basis_normalisation_by_quadrature():
    # ∫ χ² d³r = 1 for each basis kind (radial quadrature with scipy, angular part analytic).
    from scipy.integrate import quad
    from psiloom.electrons.basis import normalisation
    zeta = 1.7
    radial = {
        "s": (lambda r: np.exp(-zeta * r), 4 * np.pi),
        "sc": (lambda r: (1 + zeta * r) * np.exp(-zeta * r), 4 * np.pi),
        "s2": (lambda r: r**2 * np.exp(-zeta * r), 4 * np.pi),
        "p": (lambda r: r * np.exp(-zeta * r), 4 * np.pi / 3),  # ⟨cos²θ⟩ over the sphere = 1/3
        "pc": (lambda r: r * (1 + zeta * r) * np.exp(-zeta * r), 4 * np.pi / 3),
    }
    for kind, (f, angular) in radial.items():
        integral = angular * quad(lambda r: f(r) ** 2 * r**2, 0, np.inf)[0]
        assert normalisation(kind, zeta) ** 2 * integral == pytest.approx(1.0, rel=1e-10), kind
