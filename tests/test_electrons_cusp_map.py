"""The nuclear cusp map: every angular part of ψ gets its electron–nucleus cusp.

Pack & Byers Brown, J. Chem. Phys. 45, 556 (1966) (from memory): the l-th angular part of ψ about
a nucleus of charge Z behaves as r^l (1 − Z r/(l + 1)). With the l = 0 and l = 1 parts right, the
local energy has a limit at the nucleus that does not depend on the direction of approach; with
only Kato's l = 0 condition it jumps by Z r̂·∇ log D (module docstring of psiloom.electrons.cusp_map).
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from psiloom import electrons as el
from psiloom.electrons.cusp_map import maximum_ranges, pair_blend_range

H2_ION = el.molecule([("H", (0.0, 0.0, -1.0)), ("H", (0.0, 0.0, 1.0))], charge=1)  # one electron
LI = el.atom("Li")


def _perturbed(params, scale=0.1, seed=5):
    leaves, tree = jax.tree_util.tree_flatten(params)
    keys = jax.random.split(jax.random.PRNGKey(seed), len(leaves))
    return jax.tree_util.tree_unflatten(tree, [l + scale * jax.random.normal(k, l.shape) for l, k in zip(leaves, keys)])


def _local_energy_near_nucleus(model, params, system, x0, electron=0, nucleus=0, epsilon=1e-5):
    """E_L with ``electron`` at R_nucleus + ε n̂, for a batch of unit vectors n̂ ``(D, 3)``."""
    h = el.CoulombHamiltonian(system)
    centre = jnp.asarray(system.positions[nucleus])

    @jax.jit
    def energies(directions):
        xs = jax.vmap(lambda n: jnp.asarray(x0).at[electron].set(centre + epsilon * n))(directions)
        return h.local_energy(lambda y: model.apply(params, y), xs)

    return energies


def _directions(seed, count=6):
    n = np.random.default_rng(seed).normal(size=(count, 3))
    return jnp.asarray(n / np.linalg.norm(n, axis=1, keepdims=True))


@pytest.fixture(scope="module")
def h2_ion_energies():
    out = {}
    for mapped in (False, True):
        model = el.slater_jastrow(H2_ION, neural_jastrow=False, cusp_map=mapped)
        params = _perturbed(jax.jit(model.init)(jax.random.PRNGKey(0), jnp.zeros((1, 1, 3))))
        out[mapped] = _local_energy_near_nucleus(model, params, H2_ION, np.zeros((1, 3)))
    return out


@settings(max_examples=10, deadline=None)
@given(st.integers(0, 2**31 - 1))
def test_one_electron_local_energy_has_a_limit_at_the_nucleus(h2_ion_energies, seed):
    # One electron, two protons: the bonding orbital has a gradient at each nucleus (l = 1 part).
    directions = _directions(seed)
    mapped = np.asarray(h2_ion_energies[True](directions))
    assert np.ptp(mapped) < 1e-3
    # without the map the limit depends on the direction (the step Z r̂·∇ log D, Z = 1)
    plain = np.asarray(h2_ion_energies[False](jnp.concatenate([directions, -directions])))
    assert np.ptp(plain) > 1e-2


@pytest.mark.parametrize("mapped", [True, False])
def test_many_electron_local_energy_has_a_limit_at_the_nucleus(mapped):
    # Li with backflow orbitals (all coordinates enter every entry through ξ), the cusp Jastrow
    # (electron–electron term blended, the others at x̃) and the neural Jastrow. The other
    # electrons are farther than the blend range s from the nucleus, so the limit is exact.
    model = el.neural_slater_jastrow(LI, n_det=2, width=4, channels=2, layers=0, jastrow_width=4, cusp_map=mapped)
    params = _perturbed(jax.jit(model.init)(jax.random.PRNGKey(1), jnp.zeros((1, 3, 3))))
    x0 = np.random.default_rng(3).normal(scale=1.2, size=(3, 3))
    for electron in (0, 2):
        others = np.delete(x0, electron, axis=0)
        assert np.linalg.norm(others - LI.positions[0], axis=1).min() > pair_blend_range(LI)
        e = np.asarray(_local_energy_near_nucleus(model, params, LI, x0, electron=electron)(_directions(electron)))
        if mapped:
            assert np.ptp(e) < 3e-3  # Z = 3
        else:
            assert np.ptp(e) > 0.1  # the step Z r̂·∇ log(ψ e^{Z r}) of the unmapped state


@settings(max_examples=25, deadline=None)
@given(st.floats(0.0, 30.0), st.floats(-4.0, 4.0), st.sampled_from([1.0, 3.0, 8.0]))
def test_radial_map_is_monotonic_and_bounded(r, theta, z):
    # the range is capped at 4/Z: the map r ↦ r(1 + (Z/2) r w(r/ℓ)) keeps a positive slope
    # and moves an electron by at most 0.053 Z ℓ² (module docstring; w = (1 − t²)³ on t < 1)
    system = el.molecule([(z, (0.0, 0.0, 0.0))], n_up=1, n_down=0)
    cusp_map = el.NuclearCuspMap(system)
    params = {"params": {"cusp_range": jnp.full((1,), theta)}}
    radial = lambda t: cusp_map.apply(params, jnp.asarray([[[0.0, 0.0, t]]]))[0, 0, 2]
    length = 4.0 / z / (1.0 + np.exp(-theta))
    slope = float(jax.grad(radial)(r))
    assert slope >= 1.0 - 0.1804 * z * length - 1e-12 > 0
    assert abs(float(radial(r)) - r) <= 0.0528 * z * length**2 + 1e-12
    if r >= length:
        assert float(radial(r)) == r


def test_ranges_stop_short_of_the_other_nuclei():
    # ℓ_max = min(4/Z, half the nearest internuclear distance): LiH at R = 3.015 bohr
    lih = el.molecule([("Li", (0.0, 0.0, 0.0)), ("H", (0.0, 0.0, 3.015))])
    np.testing.assert_allclose(maximum_ranges(lih), [4.0 / 3.0, 1.5075])
    np.testing.assert_allclose(maximum_ranges(el.atom("He")), [2.0])


@given(st.integers(0, 2**31 - 1))
@settings(max_examples=10, deadline=None)
def test_map_commutes_with_permutations(seed):
    rng = np.random.default_rng(seed)
    x = jnp.asarray(rng.normal(size=(1, 3, 3)))
    perm = rng.permutation(3)
    cusp_map = el.NuclearCuspMap(LI)
    params = cusp_map.init(jax.random.PRNGKey(0), x)
    np.testing.assert_allclose(np.asarray(cusp_map.apply(params, x[:, perm])),
                               np.asarray(cusp_map.apply(params, x))[:, perm], atol=1e-14)


def test_each_nucleus_term_sees_the_map_of_the_other_nuclei_only():
    # The electron–nucleus Jastrow term of nucleus I uses x̃ less I's own shift: in an atom it
    # is the unmapped term (no added curvature at its own nucleus); in LiH the H term near Li
    # sees Li's map.
    jastrow = el.CuspJastrow(LI, electronic=False)
    x = jnp.asarray(np.random.default_rng(0).normal(scale=0.3, size=(5, 3, 3)))
    params = jastrow.init(jax.random.PRNGKey(0), x)
    mapped = el.NuclearCuspMap(LI).apply(el.NuclearCuspMap(LI).init(jax.random.PRNGKey(0), x), x,
                                         method=el.NuclearCuspMap.mapped)
    assert float(jnp.max(jnp.abs(mapped.coordinates - x))) > 1e-3  # the map does move them
    np.testing.assert_allclose(np.asarray(jastrow.apply(params, x, mapped=mapped)),
                               np.asarray(jastrow.apply(params, x)), rtol=1e-13)
    lih = el.molecule([("Li", (0.0, 0.0, 0.0)), ("H", (0.0, 0.0, 3.015))])
    cusp_map = el.NuclearCuspMap(lih)
    y = jnp.asarray(np.random.default_rng(1).normal(scale=0.2, size=(5, 4, 3)))  # all near Li
    out = cusp_map.apply(cusp_map.init(jax.random.PRNGKey(0), y), y, method=el.NuclearCuspMap.mapped)
    views = np.asarray(out.without_own_term())
    np.testing.assert_allclose(views[:, :, 0], np.asarray(y), atol=1e-14)  # Li's term: unmapped
    np.testing.assert_allclose(views[:, :, 1], np.asarray(out.coordinates), atol=1e-14)  # H's: mapped
