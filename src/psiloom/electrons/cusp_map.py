"""Nuclear cusp map: the coordinates at which the determinants are evaluated, chosen so that the
non-spherical parts of ψ also have their electron–nucleus cusps.

Kato's condition (Kato 1957) fixes the spherical average of ψ at a nucleus of charge Z; its
generalisation to every angular component (Pack & Byers Brown, J. Chem. Phys. 45, 556 (1966),
from memory) is: the part of ψ with angular momentum l about the nucleus behaves as

    ψ_l(u) = r^l Y_l(û) [c_l (1 − Z r / (l + 1)) + O(r²)],      u = r_i − R_I, r = |u|.

psiloom's states are ψ = e^{J} D with a smooth part D (the determinants and the smooth Jastrow
terms) and the cusp Jastrow's e^{−Z r}. Then D's l = 1 part g·u becomes g·u (1 − Z r): slope −Z
where −Z/2 is exact, and the local energy keeps a direction-dependent step Z r̂·∇_i log D at the
nucleus (it does not vanish as r → 0; from −½|∇ log ψ|², with ∇J → −Z r̂). This map removes that
step: D is evaluated at mapped electron coordinates x̃,

    r̃_i = r_i + Σ_I (Z_I / 2) r_iI w(r_iI / ℓ_I) u_iI,      w(t) = (1 − t²)³ for t < 1, else 0,

so that near nucleus I every linear term g·u of the smooth D becomes g·u (1 + Z r/2 + O(r²)),
which e^{−Z r} turns into the exact (1 − Z r/2); D's s part changes only at O(r³) (no cusp), and
its l = 2 part's slope becomes 0 instead of −Z (exact: −Z/3). The cutoff w is twice continuously
differentiable (the local energy stays continuous) and vanishes beyond ℓ_I, which is kept below
half the distance to the nearest other nucleus, so near each nucleus only its own term acts and
the result is exact. Each electron is mapped on its own, the same way for all electrons, so the
map commutes with permutations (ψ stays antisymmetric) and keeps the one-electron sparsity the
forward Laplacian uses. Smooth away from the nuclei; |r̃_i − r_i| ≤ 0.053 Z_I ℓ_I². How each
Jastrow term uses x̃ (the electron–nucleus term sees x̃ less its own nucleus's term, the
electron–electron term a blend that keeps its cusps): :mod:`psiloom.electrons.jastrow`.

The range ℓ_I = ℓ_max,I σ(θ_I) is learned (σ the logistic function), with ℓ_max,I the smaller
of 4/Z_I, which keeps the radial map r ↦ r (1 + (Z/2) r w) monotonic (slope ≥ 1 − 0.18 Z ℓ),
and half the distance to the nearest other nucleus. It starts at min(1/Z_I, ℓ_max,I / 2), about
a 1s shell.
"""

from __future__ import annotations

from typing import NamedTuple

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np

from psiloom.electrons.features import electron_nuclear, safe_distance
from psiloom.electrons.system import Molecule

MAX_RANGE_TIMES_Z = 4.0  # ℓ_I < 4/Z_I keeps the radial map monotonic (module docstring)


class MappedCoordinates(NamedTuple):
    """The map's output: ``coordinates`` x̃ ``(B, N, 3)`` and each nucleus's own term ``shifts``
    ``(B, N, M, 3)``, (Z_I/2) r_iI w(r_iI/ℓ_I) u_iI, with x̃ = x + Σ_I shifts[..., I, :]."""

    coordinates: jax.Array
    shifts: jax.Array

    def without_own_term(self):
        """``(B, N, M, 3)``: x̃ less nucleus I's own term, the coordinates a function centred on
        nucleus I should see: unmapped near I (a cusp term −Z_I r_iI keeps its exact form, with no
        extra curvature −(Z_I²/2) r² there) and mapped near every other nucleus."""
        return self.coordinates[..., None, :] - self.shifts


def maximum_ranges(system: Molecule) -> np.ndarray:
    """``(M,)`` ℓ_max,I = min(4/Z_I, half the distance to the nearest other nucleus) in bohr."""
    z = np.asarray(system.charges, dtype=np.float64)
    limit = MAX_RANGE_TIMES_Z / z
    positions = np.asarray(system.positions, dtype=np.float64)
    if len(z) > 1:
        distances = np.linalg.norm(positions[:, None] - positions[None], axis=-1)
        np.fill_diagonal(distances, np.inf)
        limit = np.minimum(limit, 0.5 * distances.min(axis=1))
    return limit


def starting_ranges(system: Molecule) -> np.ndarray:
    """``(M,)`` the ranges ℓ_I the map starts with, min(1/Z_I, ℓ_max,I/2) in bohr."""
    z = np.asarray(system.charges, dtype=np.float64)
    return np.minimum(1.0 / z, 0.5 * maximum_ranges(system))


def pair_blend_range(system: Molecule) -> float:
    """s = half the smallest starting range (bohr): below this distance the electron–electron
    cusp term of :class:`~psiloom.electrons.CuspJastrow` uses the unmapped separation (its cusp
    stays exact), above it the mapped one."""
    return float(0.5 * np.min(starting_ranges(system)))


def cutoff(t):
    """w(t) = (1 − t²)³ for |t| < 1, else 0: w(0) = 1, and w, w′, w″ vanish at t = 1."""
    return jnp.where(t < 1.0, (1.0 - jnp.minimum(t, 1.0) ** 2) ** 3, 0.0)


class NuclearCuspMap(nn.Module):
    """Mapped coordinates ``x̃`` ``(B, N, 3)`` (bohr) of a batch ``x`` ``(B, N, 3)`` (module docstring).

    Attributes:
        system: the molecule (nuclear charges Z_I and positions R_I).
    """

    system: Molecule

    def __call__(self, x):
        """x̃ ``(B, N, 3)``."""
        return self.mapped(x).coordinates

    @nn.compact
    def mapped(self, x) -> MappedCoordinates:
        """x̃ and each nucleus's term (:class:`MappedCoordinates`)."""
        dtype = x.dtype
        z = np.asarray(self.system.charges, dtype=np.float64)
        longest = maximum_ranges(self.system)
        start = starting_ranges(self.system) / longest  # σ(θ) at the start
        theta = self.param("cusp_range", lambda k: jnp.asarray(np.log(start / (1.0 - start)), dtype))
        length = jnp.asarray(longest, dtype) * nn.sigmoid(theta)  # (M,)
        u, r2 = electron_nuclear(x, self.system.positions)  # (B, N, M, 3), (B, N, M)
        r = safe_distance(r2)
        scale = 0.5 * jnp.asarray(z, dtype) * r * cutoff(r / length)  # (B, N, M)
        shifts = scale[..., None] * u
        return MappedCoordinates(x + jnp.sum(shifts, axis=-2), shifts)
