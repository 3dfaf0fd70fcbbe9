"""Metropolis sampling of |ψ|² for electrons: moments of a known density, step-size adaptation."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from psiloom import electrons as el, stats
from psiloom.electrons.basis import BasisFunction

Z = 2.0
SYSTEM = el.molecule([(Z, (0.0, 0.0, 0.0))], n_up=1, n_down=1)
# ψ = e^{−Z r₁} e^{−Z r₂}: two independent hydrogen-like 1s electrons (no repulsion in ψ)
MODEL = el.SlaterJastrow(el.SlaterTypeOrbitals(SYSTEM, basis=(BasisFunction(0, "s", Z, label="1s"),), cusp_free=False), ())
PARAMS = MODEL.init(jax.random.PRNGKey(0), jnp.zeros((1, 2, 3)))
LOG_PSI = lambda x: MODEL.apply(PARAMS, x)


@pytest.mark.parametrize("move", ["all", "one"])
def test_samples_reproduce_hydrogenic_moments(move):
    # Hydrogen-like 1s density |ψ|² ∝ e^{−2Zr}: ⟨r⟩ = 3/(2Z), ⟨r²⟩ = 3/Z² (textbook, e.g.
    # Bethe & Salpeter). Tolerance: 4 autocorrelation-corrected standard errors.
    sampler = el.ElectronSampler(SYSTEM, n_chains=64, move=move, step_size=3.0, burn_in=20, equilibrate=20)

    hamiltonian = el.CoulombHamiltonian(SYSTEM)

    @jax.jit
    def run(key):
        k0, k1 = jax.random.split(key)
        state = sampler.init(k0, LOG_PSI)
        xs, logs, state, acceptance = sampler.sample(k1, state, LOG_PSI, 150)
        return xs, logs, state, acceptance, el.energy_components(hamiltonian, LOG_PSI, xs)

    xs, logs, state, acceptance, parts = run(jax.random.PRNGKey(7))
    assert xs.shape == (150, 64, 2, 3) and logs.shape == (150, 64)
    np.testing.assert_allclose(np.asarray(logs), np.asarray(LOG_PSI(xs)), atol=1e-12)
    r = jnp.linalg.norm(xs, axis=-1)  # (T, C, 2)
    for values, exact in [(jnp.mean(r, axis=-1), 1.5 / Z), (jnp.mean(r * r, axis=-1), 3.0 / Z**2)]:
        est = stats.estimate(values)
        assert abs(float(est.mean) - exact) < 4 * float(est.error), (move, float(est.mean), float(est.error))
    # Exact expectation values in this product state (first-order perturbation theory of the
    # helium-like ion, textbook): <T> = Z², <V_en> = −2Z², <V_ee> = 5Z/8, E = −Z² + 5Z/8.
    for est, exact in [(parts.kinetic, Z**2), (parts.electron_nuclear, -2 * Z**2),
                       (parts.electron_electron, 5 * Z / 8), (parts.total, -Z**2 + 5 * Z / 8)]:
        assert abs(float(est.mean) - exact) < 4 * float(est.error), (move, float(est.mean), float(est.error), exact)
    # the step size was adapted from 3 bohr toward 50 % acceptance (common practice)
    assert 0.4 < float(acceptance) < 0.6
    assert float(state.step_size) < 3.0


def test_sampler_validation():
    with pytest.raises(ValueError, match="unknown move"):
        el.ElectronSampler(SYSTEM, move="two")
    with pytest.raises(ValueError, match="step_size"):
        el.ElectronSampler(SYSTEM, step_size=-1.0)
    with pytest.raises(ValueError, match="n_chains"):
        el.ElectronSampler(SYSTEM, n_chains=0)
    with pytest.raises(ValueError, match="target_acceptance"):
        el.ElectronSampler(SYSTEM, target_acceptance=1.5)


def test_init_passes_parameters_as_arguments_not_captured_constants():
    # Parameters captured as constants of a compiled program gave all-NaN walkers in about half
    # the compilations for a trained LiH state (DEVELOPERS.md, "Two draws of one LiH config, and
    # captured constants"): neither a BoundState nor a closure over the parameters may leave them
    # as constants of ElectronSampler.init's programs. JAX's own lowering check
    # (jax_captured_constants_warn_bytes) warns when a program captures more than the given bytes.
    import warnings

    from psiloom.states import BoundState

    system = el.atom("He")
    model = el.slater_jastrow(system)
    params = jax.jit(model.init)(jax.random.PRNGKey(0), system.random(jax.random.PRNGKey(0), 1))
    closure = lambda x: model.apply(params, x)
    # the model's own constants (nuclear positions, charges, cusp coefficients) stay captured:
    # a few hundred bytes, well below half of the parameters' bytes
    limit = sum(leaf.nbytes for leaf in jax.tree_util.tree_leaves(params)) // 2
    sampler = el.ElectronSampler(system, n_chains=8, burn_in=0, equilibrate=2)
    previous = jax.config.values["jax_captured_constants_warn_bytes"]
    jax.config.update("jax_captured_constants_warn_bytes", limit)
    try:
        with warnings.catch_warnings():
            warnings.filterwarnings("error", message=".*constants were captured.*")
            bound = sampler.init(jax.random.PRNGKey(1), BoundState(model, params))
            eager = sampler.init(jax.random.PRNGKey(1), closure)
        with pytest.warns(UserWarning, match="constants were captured"):  # the check can fail
            compiled = jax.jit(lambda k: sampler.init(k, closure))(jax.random.PRNGKey(1))
    finally:
        jax.config.update("jax_captured_constants_warn_bytes", previous)
    np.testing.assert_allclose(np.asarray(bound.log_amp), np.asarray(model.apply(params, bound.x)), rtol=1e-12)
    for other in (eager, compiled):  # one key, one result whichever way the program was built
        np.testing.assert_allclose(np.asarray(other.x), np.asarray(bound.x), rtol=1e-12)


def test_init_names_walkers_with_a_non_finite_log_amplitude():
    # a trial state that is NaN wherever electron 0 lies beyond 1 bohr of the origin: walkers
    # there can neither be equilibrated nor sampled, and init says so instead of returning them
    def broken(x):
        return jnp.where(jnp.linalg.norm(x[..., 0, :], axis=-1) > 1.0, jnp.nan, LOG_PSI(x))

    sampler = el.ElectronSampler(SYSTEM, n_chains=16, burn_in=0, equilibrate=2, init_width=3.0)
    with pytest.raises(ValueError, match=r"of 16 walkers have a non-finite log\|psi\|"):
        sampler.init(jax.random.PRNGKey(0), broken)
    # inside a trace there is nothing to inspect: the training loop's guard checks its energies
    state = jax.jit(lambda k: sampler.init(k, broken))(jax.random.PRNGKey(0))
    assert not np.all(np.isfinite(np.asarray(state.log_amp)))
