"""Optional Hartree-Fock start: PySCF orbitals evaluated in JAX, and orbital pretraining.

Needs the optional package PySCF (``pip install pyscf``) only for :func:`hartree_fock`; the
JAX side (:class:`GaussianOrbitals`, :func:`pretrain_orbitals`) works on the extracted arrays.

Gaussian basis functions. A contracted Cartesian Gaussian on centre A with exponents α_p and
contraction coefficients c_p (PySCF's, including primitive normalisation) is

    g(r) = f_l · x^a y^b z^c Σ_p c_p e^{−α_p |r − A|²},     a + b + c = l,

with the factor f_0 = 1/(2√π), f_1 = √(3/(4π)), f_l = 1 (l ≥ 2) that PySCF's integral library
applies to s and p shells. Spherical functions are ``cartesian @ T`` with PySCF's
``cart2sph_coeff`` matrix T; molecular orbitals are ``AO @ C`` with the SCF coefficients C
(unrestricted: separate columns for each spin, occupied ones lowest first).

Pretraining (common practice): fit the orbital matrices Φ_θ(x) of a trial state to the
Hartree-Fock ones on walkers x drawn from |ψ_HF|²,

    L(θ) = mean_x Σ_{d,i,a} (Φ_θ[d, i, a](x) − Φ_HF[i, a](x) e^{−j_i(x)})²,

with Adam (the backflow displacement held at zero), then exact least-squares solves for the
linear orbital coefficients (:func:`fit_orbital_coefficients`); every determinant is pulled
toward the same HF orbitals. The factor e^{−j_i}
removes the one-electron part j_i of the trial state's Jastrow factors (the electron–nucleus
cusp term of :class:`~psiloom.electrons.CuspJastrow`, −Σ_I Z_I r_iI / (1 + r_iI/c_I)), which
multiplies every orbital of electron i: without it the pretrained state is the HF determinant
times e^{Σ_i j_i}, far more compact than HF (tens of mHa above E_HF for H₂ in cc-pVDZ). What
remains of the Jastrow factor, the electron–electron part, then starts ψ near or below E_HF.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple, cast

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import optax

from psiloom.electrons.determinants import SlaterJastrow
from psiloom.electrons.sampler import ElectronSampler
from psiloom.electrons.system import Molecule
from psiloom.reduce import sample_mean
from psiloom.states.bound import BoundState
from psiloom._validation import nonnegative_int, positive_int

_SHELL_FACTOR = {0: 0.5 / np.sqrt(np.pi), 1: np.sqrt(3.0 / (4.0 * np.pi))}


def cartesian_powers(l: int) -> list[tuple[int, int, int]]:
    """PySCF's order of Cartesian components for angular momentum l (xx, xy, xz, yy, yz, zz…)."""
    return [(lx, ly, l - lx - ly) for lx in range(l, -1, -1) for ly in range(l - lx, -1, -1)]


@dataclass(frozen=True, eq=False)
class GaussianBasis:
    """Flat arrays describing contracted Cartesian Gaussians (one row per Cartesian function).

    Attributes:
        centres: ``(F, 3)`` centre of each function (bohr).
        powers: ``(F, 3)`` integer powers (a, b, c).
        exponents: ``(F, P)`` primitive exponents α (padded with 1 where unused).
        coefficients: ``(F, P)`` contraction coefficients times the shell factor (0 where unused).
        cart2sph: ``(F, n_ao)`` map to the AO basis (identity for a Cartesian basis).
    """

    centres: np.ndarray
    powers: np.ndarray
    exponents: np.ndarray
    coefficients: np.ndarray
    cart2sph: np.ndarray

    @property
    def n_ao(self) -> int:
        """Number of (spherical) atomic orbitals."""
        return self.cart2sph.shape[1]

    def cartesian(self, r):
        """Cartesian function values at points ``r`` ``(..., 3)`` → ``(..., F)``."""
        d = r[..., None, :] - jnp.asarray(self.centres, r.dtype)
        r2 = jnp.sum(d * d, axis=-1)
        radial = jnp.sum(jnp.asarray(self.coefficients, r.dtype)
                         * jnp.exp(-jnp.asarray(self.exponents, r.dtype) * r2[..., None]), axis=-1)
        angular = jnp.ones_like(r2)
        for c in range(3):
            p = self.powers[:, c]
            for k in range(1, int(p.max(initial=0)) + 1):
                angular = angular * jnp.where(jnp.asarray(p >= k), d[..., c], 1.0)
        return angular * radial

    def __call__(self, r):
        """AO values at points ``r`` ``(..., 3)`` → ``(..., n_ao)`` (PySCF's AO order)."""
        return self.cartesian(r) @ jnp.asarray(self.cart2sph, r.dtype)

    @classmethod
    def from_pyscf(cls, mol) -> "GaussianBasis":
        """The contracted Gaussian basis of a PySCF ``Mole``, centred on its atoms (bohr)."""
        centres, powers, exps, coeffs = [], [], [], []
        for ib in range(mol.nbas):
            l = int(mol.bas_angular(ib))
            alpha = np.asarray(mol.bas_exp(ib))
            ctr = np.asarray(mol._libcint_ctr_coeff(ib)) * _SHELL_FACTOR.get(l, 1.0)
            for k in range(ctr.shape[1]):
                for pw in cartesian_powers(l):
                    centres.append(mol.bas_coord(ib))
                    powers.append(pw)
                    exps.append(alpha)
                    coeffs.append(ctr[:, k])
        width = max(len(a) for a in exps)
        pad = lambda rows, fill: np.array([np.concatenate([r, np.full(width - len(r), fill)]) for r in rows])
        t = np.eye(len(powers)) if mol.cart else np.asarray(mol.cart2sph_coeff())
        return cls(np.asarray(centres, float), np.asarray(powers, int), pad(exps, 1.0), pad(coeffs, 0.0), t)


class GaussianOrbitals(nn.Module):
    """Fixed orbitals ``AO(r) @ C`` as an orbital layer (one determinant, no parameters).

    Attributes:
        system: the molecule.
        basis: a :class:`GaussianBasis`.
        coeff_up, coeff_down: ``(n_ao, n_up)`` and ``(n_ao, n_down)`` occupied MO coefficients,
            wrapped in :class:`Coefficients` (hashable holder).
    """

    system: Molecule
    basis: GaussianBasis
    coefficients: "Coefficients"

    def __call__(self, x):
        nu = self.system.n_up
        ao = self.basis(x)  # (B, N, n_ao)
        up = ao[:, :nu] @ jnp.asarray(self.coefficients.up, x.dtype)
        down = ao[:, nu:] @ jnp.asarray(self.coefficients.down, x.dtype)
        return up[:, None], down[:, None]


@dataclass(frozen=True, eq=False)
class Coefficients:
    """Molecular-orbital coefficients over the atomic orbitals, one matrix per spin."""
    up: np.ndarray  # (n_ao, n_up)
    down: np.ndarray  # (n_ao, n_down)


class HartreeFock(NamedTuple):
    """Result of :func:`hartree_fock`: the SCF energy (hartree) and the occupied orbitals as a layer."""
    energy: float  # SCF total energy (hartree)
    orbitals: GaussianOrbitals  # orbital layer
    state: SlaterJastrow  # the HF determinant as a trial state (no parameters)
    mol: object  # the PySCF Mole
    scf: object  # the converged PySCF SCF object


def hartree_fock(system: Molecule, basis: str = "cc-pvdz", cart: bool = False, verbose: int = 0) -> HartreeFock:
    """Run PySCF restricted (closed shell) or unrestricted Hartree-Fock for ``system``.

    PySCF's SCF is not bitwise repeatable when it runs threaded (LiH's occupied MO coefficients
    differed by ~1e-14 between runs); set ``OMP_NUM_THREADS=1`` before the process starts where a
    run must repeat bit for bit. Raises ImportError naming the optional extra when PySCF is absent.
    """
    try:
        from pyscf import gto, scf
    except ImportError as err:  # pragma: no cover - depends on the environment
        raise ImportError("hartree_fock needs the optional package PySCF (pip install pyscf)") from err
    atoms = [(int(round(z)) if float(z).is_integer() else float(z), tuple(map(float, p)))
             for z, p in zip(system.charges, system.positions)]
    mol = gto.M(atom=atoms, unit="bohr", basis=basis, spin=system.spin, charge=int(round(system.charge)),
                cart=cart, verbose=verbose)
    if system.spin == 0:
        mf = scf.RHF(mol)
        mf.kernel()
        c = np.asarray(mf.mo_coeff)
        c_up, c_down = c[:, : system.n_up], c[:, : system.n_down]
    else:
        mf = scf.UHF(mol)
        mf.kernel()
        c = np.asarray(mf.mo_coeff)
        c_up, c_down = c[0][:, : system.n_up], c[1][:, : system.n_down]
    orbitals = GaussianOrbitals(system, GaussianBasis.from_pyscf(mol), Coefficients(c_up, c_down))
    return HartreeFock(float(mf.e_tot), orbitals, SlaterJastrow(orbitals, ()), mol, mf)


def orbital_loss(model, params, target: GaussianOrbitals, x):
    """Mean squared difference of all determinants' orbital matrices from the target's, the
    target divided by the model's one-electron Jastrow factors e^{j_i} (module docstring)."""
    up, down = model.apply(params, x, method=model.orbital_matrices)
    t_up, t_down = cast(tuple, target.apply({}, x))
    if hasattr(model, "one_electron_log_factors"):
        scale = jnp.exp(-jnp.asarray(model.apply(params, x, method=model.one_electron_log_factors)))[:, None, :, None]
        nu = t_up.shape[-2]
        t_up, t_down = t_up * scale[:, :, :nu], t_down * scale[:, :, nu:]
    per_sample = jnp.sum((up - t_up) ** 2, axis=(1, 2, 3)) + jnp.sum((down - t_down) ** 2, axis=(1, 2, 3))
    return sample_mean(per_sample)


def _replace_leaf(params, name: str, new):
    """``params`` with its one leaf called ``name`` replaced by ``new(old)``."""
    found = []

    def swap(path, leaf):
        if _path_names(path)[-1] == name:
            found.append(path)
            return new(leaf)
        return leaf

    out = jax.tree_util.tree_map_with_path(swap, params)
    if len(found) != 1:
        raise ValueError(f"expected one parameter called {name!r}, found {len(found)}")
    return out


def fit_orbital_coefficients(model, params, target: GaussianOrbitals, x):
    """Exact least-squares correction of the linear orbital coefficients toward the target orbitals.

    For an orbital layer linear in its coefficients, φ_{d,a}(r_i) = Σ_k C_{d,a,k} χ_k(r_i | x)
    (+ any term that does not depend on C; its ``basis_values`` method gives χ, and the exponents
    and the backflow shift stay fixed), the loss of :func:`orbital_loss` on the walkers ``x`` is
    quadratic in C. Its minimum over the first determinant's coefficients solves one linear
    least-squares problem per spin for the correction ΔC,

        min_ΔC Σ_{x,i} Σ_a (Σ_k ΔC_{a,k} χ_k(r_i) − [Φ_HF[i, a](x) e^{−j_i(x)} − φ_{1,a}(r_i)])²,

    and every determinant moves by the same ΔC, so the differences between determinants (which
    let them separate in the optimisation) are kept. Adam's first-order steps converge slowly on
    this ill-conditioned quadratic (DEVELOPERS.md). Returns the updated parameters.
    """
    nu = model.orbitals.system.n_up
    chi = np.asarray(model.apply(params, x, method=model.orbital_basis_values), dtype=np.float64)
    current = [np.asarray(m, dtype=np.float64)[:, 0] for m in model.apply(params, x, method=model.orbital_matrices)]
    scale = np.exp(-np.asarray(model.apply(params, x, method=model.one_electron_log_factors), dtype=np.float64))
    targets = [np.asarray(t, dtype=np.float64)[:, 0] for t in cast(tuple, target.apply({}, x))]
    k = chi.shape[-1]
    for name, rows, tgt, now in (("coeff_up", slice(0, nu), targets[0], current[0]),
                                 ("coeff_down", slice(nu, None), targets[1], current[1])):
        n_orb = tgt.shape[-1]
        if n_orb == 0:
            continue
        residual = (tgt * scale[:, rows, None] - now).reshape(-1, n_orb)
        delta = np.linalg.lstsq(chi[:, rows].reshape(-1, k), residual, rcond=None)[0].T  # (n_orb, K)
        params = _replace_leaf(params, name, lambda c, delta=delta: c + jnp.asarray(delta, c.dtype)[None])
    return params


def _path_names(path) -> list[str]:
    """The names along a pytree key path (dictionary keys or attribute names)."""
    return [str(getattr(k, "key", getattr(k, "name", k))) for k in path]


def held_mask(params, hold: tuple[str, ...]):
    """Pytree of booleans like ``params``: True for leaves under a submodule named in ``hold``."""
    hold = tuple(hold)
    return jax.tree_util.tree_map_with_path(lambda path, _: any(n in hold for n in _path_names(path)), params)


def _module_names(params) -> set[str]:
    names: set[str] = set()
    for path, _ in jax.tree_util.tree_flatten_with_path(params)[0]:
        names.update(_path_names(path))
    return names


def pretrain_orbitals(model, params, hf: HartreeFock, key: jax.Array, n_steps: int = 200, n_walkers: int = 256,
                      learning_rate: float = 3e-3, sweeps_per_step: int = 1, hold: tuple[str, ...] | None = None,
                      refits: int = 3, fit_walkers: int = 2048):
    """Fit ``model``'s orbital matrices to Hartree-Fock ones (see module docstring).

    Two stages: ``n_steps`` Adam steps on :func:`orbital_loss` (all parameters but the held
    ones: the exponents, the coefficients, the Jastrow's electron–nucleus lengths), then, when
    the orbital layer is linear in coefficients (it has ``basis_values``), ``refits`` exact
    least-squares solves for them (:func:`fit_orbital_coefficients`). Each solve uses
    ``fit_walkers`` walkers from |ψ_HF|² and as many from the current |ψ_θ|²: fitted on HF's
    walkers alone, the orbitals are free where HF has no weight, and the fitted state put its
    weight there (LiH: 319 mHa above E_HF with HF's walkers only, 42 mHa with both).

    Args:
        model: a :class:`SlaterJastrow` (anything with an ``orbital_matrices`` method).
        params: its variables (only the orbital part changes in practice).
        hf: the result of :func:`hartree_fock`.
        n_steps, n_walkers, learning_rate: Adam iterations, walkers per step, step size.
        sweeps_per_step: Metropolis sweeps on |ψ_HF|² between steps.
        hold: names of submodules whose parameters keep their starting values (default: the
            backflow displacement ``"backflow"`` of :class:`~psiloom.electrons.BackflowOrbitals`
            where there is one, which starts at ξ = 0, and the range of the ``"cusp_map"``
            (:class:`~psiloom.electrons.NuclearCuspMap`); ``()`` trains everything). The target
            orbitals depend on r_i alone; on LiH (4 determinants, widths 32, after the refits)
            the start was 42 mHa above E_HF held and 184 mHa freed.
        refits: number of least-squares solves after the Adam steps (0: none).
        fit_walkers: walkers drawn from each distribution for every solve.
    Returns:
        ``(params, losses)`` with the loss of every Adam step (NumPy array).
    """
    n_steps = positive_int("n_steps", n_steps)
    refits = nonnegative_int("refits", refits)
    fit_walkers = positive_int("fit_walkers", fit_walkers)
    system = hf.orbitals.system
    sampler = ElectronSampler(system, n_chains=n_walkers, burn_in=0, equilibrate=50)
    hf_log = lambda x: cast(jax.Array, hf.state.apply({}, x))
    k_init, k_run, k_fit = jax.random.split(key, 3)
    walkers = sampler.init(k_init, hf_log)
    present = _module_names(params)
    if hold is None:
        hold = tuple(name for name in ("backflow", "cusp_map") if name in present)
    hold = (hold,) if isinstance(hold, str) else tuple(hold)
    unknown = set(hold) - present
    if unknown:
        raise ValueError(f"hold names {sorted(unknown)} match no submodule of the parameters")
    mask = held_mask(params, hold)
    opt = optax.chain(optax.adam(learning_rate),
                      optax.masked(optax.set_to_zero(), mask)) if any(jax.tree_util.tree_leaves(mask)) \
        else optax.adam(learning_rate)
    opt_state = opt.init(params)
    target = hf.orbitals

    @jax.jit
    def step(carry, k):
        params, opt_state, walkers = carry
        _, _, walkers, _ = sampler.sample(k, walkers, hf_log, sweeps_per_step)
        loss, grad = jax.value_and_grad(lambda p: orbital_loss(model, p, target, walkers.x))(params)
        updates, opt_state = opt.update(grad, opt_state, params)
        return (optax.apply_updates(params, updates), opt_state, walkers), loss

    carry = (params, opt_state, walkers)
    losses = []
    for k in jax.random.split(k_run, n_steps):
        carry, loss = step(carry, k)
        losses.append(loss)
    params = carry[0]
    if refits and hasattr(model, "orbital_basis_values") and hasattr(getattr(model, "orbitals", None), "basis_values"):
        fit_sampler = ElectronSampler(system, n_chains=fit_walkers, burn_in=0, equilibrate=100)
        k_hf, k_model = jax.random.split(k_fit)
        x_hf = np.asarray(fit_sampler.init(k_hf, hf_log).x)
        for k in jax.random.split(k_model, refits):
            # the parameters as an argument of the compiled program, not captured constants
            # (ElectronSampler.init; DEVELOPERS.md, "Two draws of one LiH config, and captured
            # constants")
            x_model = np.asarray(fit_sampler.init(k, BoundState(model, params)).x)
            params = fit_orbital_coefficients(model, params, target, np.concatenate([x_hf, x_model]))
    return params, np.asarray(jnp.stack(losses))
