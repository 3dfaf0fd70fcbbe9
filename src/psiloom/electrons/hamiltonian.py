"""The non-relativistic Coulomb Hamiltonian of electrons and fixed nuclei (atomic units).

    H = −½ Σ_i ∇_i² − Σ_{i,I} Z_I / |r_i − R_I| + Σ_{i<j} 1 / |r_i − r_j| + Σ_{I<J} Z_I Z_J / |R_I − R_J|

(hartree, bohr). For a real trial state ψ with f = log|ψ| the local energy
E_L = Hψ/ψ splits into the kinetic part

    T_L = −½ Σ_i (∇_i² f + |∇_i f|²)

and the potential V(x) (electron–nucleus, electron–electron and the constant nuclear
repulsion). Derivatives of f come from :func:`psiloom.electrons.laplacian.value_grad_laplacian`
with the method chosen by ``laplacian`` (``"forward"``, ``"hessian"`` or ``"folx"``).
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp

from psiloom.batching import map_in_chunks
from psiloom.electrons.features import electron_electron, electron_nuclear
from psiloom.electrons.laplacian import METHODS, value_grad_laplacian
from psiloom.electrons.system import Molecule


class EnergyParts(NamedTuple):
    """Per-sample pieces of the local energy (hartree), each of shape ``(n_samples,)``."""

    kinetic: jax.Array  # T_L = −½ (∇² log|ψ| + |∇ log|ψ||²)
    electron_nuclear: jax.Array  # −Σ Z_I / r_iI
    electron_electron: jax.Array  # Σ_{i<j} 1 / r_ij
    nuclear: jax.Array  # Σ_{I<J} Z_I Z_J / R_IJ (constant)

    @property
    def potential(self) -> jax.Array:
        """Potential energy V = V_en + V_ee + V_nn (hartree)."""
        return self.electron_nuclear + self.electron_electron + self.nuclear

    @property
    def total(self) -> jax.Array:
        """Local energy E_L = T + V (hartree)."""
        return self.kinetic + self.potential


def potential_parts(system: Molecule, x):
    """``(V_en, V_ee)`` of configurations ``x`` ``(n, N, 3)``, each ``(n,)``."""
    _, r2n = electron_nuclear(x, system.positions)
    v_en = -jnp.sum(jnp.asarray(system.charges, x.dtype) / jnp.sqrt(r2n), axis=(-2, -1))
    n = x.shape[-2]
    if n < 2:
        return v_en, jnp.zeros_like(v_en)
    _, r2 = electron_electron(x)
    iu, ju = jnp.triu_indices(n, k=1)
    v_ee = jnp.sum(1.0 / jnp.sqrt(r2[..., iu, ju]), axis=-1)
    return v_en, v_ee


def potential_energy(system: Molecule, x):
    """V(x) = V_en + V_ee + V_nn for configurations ``(n, N, 3)``; returns ``(n,)`` hartree."""
    v_en, v_ee = potential_parts(system, x)
    return v_en + v_ee + system.nuclear_repulsion()


def kinetic_energy(log_amp_fn: Callable, x, method: str = "forward"):
    """T_L(x) = −½ (∇² log|ψ| + |∇ log|ψ||²) for a batch ``(n, N, 3)``; returns ``(n,)``."""
    shape = x.shape[1:]

    def one(xi):
        f = lambda r: jnp.real(log_amp_fn(r.reshape(1, *shape))[0])
        _, grad, lap = value_grad_laplacian(f, xi, method)
        return -0.5 * (lap + jnp.sum(grad * grad))

    return jax.vmap(one)(x)


class CoulombHamiltonian:
    """Local energies of the Coulomb Hamiltonian of ``system`` (see module docstring).

    Args:
        system: the molecule (nuclei and electron counts).
        laplacian: ``"forward"`` (psiloom's forward Laplacian), ``"hessian"`` (jvp of the
            gradient) or ``"folx"`` (the optional package).
    """

    def __init__(self, system: Molecule, laplacian: str = "forward"):
        if not isinstance(system, Molecule):
            raise ValueError(f"system must be a psiloom.electrons.Molecule, got {type(system).__name__}")
        if laplacian not in METHODS:
            raise ValueError(f"unknown laplacian {laplacian!r}; available: {', '.join(METHODS)}")
        if laplacian == "folx":
            try:
                import folx  # noqa: F401
            except ImportError as err:
                raise ValueError("laplacian='folx' needs the optional package folx (pip install folx)") from err
        self.system = system
        self.laplacian = laplacian
        self.nuclear_repulsion = system.nuclear_repulsion()

    def _check(self, x):
        x = jnp.asarray(x)
        if x.ndim != 3 or x.shape[1:] != (self.system.n_electrons, 3):
            raise ValueError(
                f"configurations must have shape (n_samples, {self.system.n_electrons}, 3), got {x.shape}"
            )
        return x

    def local_energy_parts(self, log_amp_fn: Callable, x, chunk: int | None = None) -> EnergyParts:
        """Kinetic and potential parts of E_L at each sample (hartree)."""
        x = self._check(x)

        def parts(xs):
            t = kinetic_energy(log_amp_fn, xs, self.laplacian)
            v_en, v_ee = potential_parts(self.system, xs)
            return t, v_en, v_ee

        t, v_en, v_ee = map_in_chunks(parts, chunk, x)
        return EnergyParts(t, v_en, v_ee, jnp.full_like(t, self.nuclear_repulsion))

    def local_energy(self, log_amp_fn: Callable, x, log_amp_x=None, chunk: int | None = None):
        """E_L(x) = T_L(x) + V(x), shape ``(n_samples,)`` (``log_amp_x`` is not needed)."""
        del log_amp_x
        return self.local_energy_parts(log_amp_fn, x, chunk).total

    def __repr__(self) -> str:
        return f"CoulombHamiltonian({self.system!r}, laplacian={self.laplacian!r})"
