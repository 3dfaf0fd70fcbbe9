"""Ground-state energy of the spin-1/2 antiferromagnetic Heisenberg ring from the Bethe ansatz.

Hamiltonian, written with **spin-1/2** operators S = σ/2 (not Pauli matrices):

    H = J Σ_{i=1}^{L} S_i · S_{i+1},        S_{L+1} ≡ S_1,   J > 0.

Starting from the fully polarised state (energy J L/4), an eigenstate with M flipped spins is
described by rapidities λ_1 … λ_M that solve the Bethe equations (Bethe 1931), in logarithmic
form

    L · 2 arctan(2 λ_j) = 2π I_j + Σ_{k≠j} 2 arctan(λ_j − λ_k),

with energy

    E = J L/4 − Σ_j 2J / (4 λ_j² + 1).

(Each rapidity is a magnon of momentum p with λ = ½ cot(p/2), whose energy is
−J (1 − cos p) = −2J/(4λ² + 1).) The antiferromagnetic ground state for even L has
M = L/2 and consecutive quantum numbers I_j = −(M−1)/2, …, (M−1)/2 (integers for odd M,
half-odd integers for even M). For L = 4 this gives λ = ±1/(2√3) and E = −2J exactly.

For L → ∞ the energy per site tends to J (1/4 − ln 2) (Hulthén 1938).

If the model is written with Pauli matrices instead, J Σ σ_i·σ_{i+1} = 4J Σ S_i·S_{i+1}.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from psiloom._validation import finite_real, integer

__all__ = [
    "HULTHEN_ENERGY_PER_SITE",
    "heisenberg_ring_energy",
    "heisenberg_ring_rapidities",
]

#: Ground-state energy per site of the infinite spin-1/2 Heisenberg chain, in units of J,
#: for H = J Σ S_i·S_{i+1} (Hulthén 1938).
HULTHEN_ENERGY_PER_SITE: float = 0.25 - math.log(2)


def _check_ring_size(n_sites) -> int:
    n = integer("n_sites", n_sites)
    if n < 4:
        raise ValueError(
            f"n_sites must be at least 4, got {n_sites!r}: a ring of 2 sites would count its "
            "single bond twice and a smaller ring has no bond, so neither is supported"
        )
    if n % 2:
        raise ValueError(
            f"n_sites must be even, got {n_sites!r}: the ground state used here has M = L/2 "
            "magnons (total spin 0), which exists only for even rings"
        )
    return n


def _residual(lam: np.ndarray, n: int, quantum: np.ndarray) -> np.ndarray:
    """Logarithmic Bethe equations divided by 2: L·atan(2λ_j) − π I_j − Σ_k atan(λ_j − λ_k)."""
    diff = lam[:, None] - lam[None, :]
    return n * np.arctan(2.0 * lam) - np.pi * quantum - np.arctan(diff).sum(axis=1)


def _jacobian(lam: np.ndarray, n: int, quantum: np.ndarray) -> np.ndarray:
    diff = lam[:, None] - lam[None, :]
    w = 1.0 / (1.0 + diff * diff)  # d atan(x)/dx at x = λ_j − λ_k; the diagonal term cancels
    jac = w.copy()  # ∂/∂λ_k of −atan(λ_j − λ_k) is +w_jk for k ≠ j
    np.fill_diagonal(jac, 0.0)
    diag = 2.0 * n / (1.0 + 4.0 * lam * lam) - (w.sum(axis=1) - 1.0)
    jac[np.diag_indices_from(jac)] = diag
    return jac


@functools.lru_cache(maxsize=64)
def _ground_state_rapidities(n: int) -> np.ndarray:
    m = n // 2
    quantum = np.arange(m, dtype=float) - (m - 1) / 2.0

    # Starting point: the thermodynamic-limit counting function of the ground state,
    # I/L = ∫_0^λ dμ / (2 cosh πμ) = arctan(sinh πλ) / (2π)  (root density of Hulthén 1938),
    # inverted as λ = arcsinh(tan(2π I / L)) / π. Since |I| ≤ (L−2)/4 the tangent is finite.
    lam = np.arcsinh(np.tan(2.0 * np.pi * quantum / n)) / np.pi

    # A few damped fixed-point sweeps λ_j ← ½ tan((π I_j + Σ_k atan(λ_j − λ_k)) / L). The
    # argument stays inside (−π/2, π/2): |I_j| ≤ (M−1)/2 and |Σ_k atan| < (M−1)π/2.
    damping = 0.5
    for _ in range(20):
        phase = (np.pi * quantum + np.arctan(lam[:, None] - lam[None, :]).sum(axis=1)) / n
        new = 0.5 * np.tan(phase)
        step = np.max(np.abs(new - lam))
        lam = (1.0 - damping) * lam + damping * new
        if step < 1e-8:
            break

    # Newton polishing of the full set of equations.
    from scipy import optimize  # imported on use: ~0.3 s of every import of psiloom otherwise

    sol = optimize.root(
        _residual,
        lam,
        args=(n, quantum),
        jac=_jacobian,
        method="hybr",
        options={"xtol": 1e-13},
    )
    lam = np.sort(sol.x)
    res = np.max(np.abs(_residual(lam, n, quantum)))
    if not np.all(np.isfinite(lam)) or res > 1e-9 * n:
        raise RuntimeError(
            f"Bethe equations for n_sites={n} did not converge (max residual {res:.3g})"
        )
    lam.setflags(write=False)
    return lam


def heisenberg_ring_rapidities(n_sites: int) -> np.ndarray:
    """Rapidities λ_1 < … < λ_M (M = L/2) of the Heisenberg-ring ground state.

    Solves the logarithmic Bethe equations
    ``L·2 arctan(2λ_j) = 2π I_j + Σ_{k≠j} 2 arctan(λ_j − λ_k)`` with
    ``I_j = −(M−1)/2, …, (M−1)/2`` (Bethe 1931) by damped fixed-point iteration followed by
    Newton polishing. The rapidities do not depend on J; they come back sorted and
    symmetric about zero.

    Raises:
        ValueError: if ``n_sites`` is not an even integer ≥ 4.
        RuntimeError: if the solver fails to converge.
    """
    n = _check_ring_size(n_sites)
    return _ground_state_rapidities(n).copy()


def heisenberg_ring_energy(n_sites: int, J: float = 1.0) -> float:
    """Ground-state energy of the antiferromagnetic spin-1/2 Heisenberg ring.

    ``H = J Σ_i S_i · S_{i+1}`` with spin-1/2 operators S = σ/2 and periodic boundary
    conditions, J ≥ 0. From the Bethe ansatz (Bethe 1931)::

        E_0 = J L/4 − Σ_{j=1}^{L/2} 2J / (4 λ_j² + 1),

    with the rapidities of :func:`heisenberg_ring_rapidities`. ``n_sites`` must be even and
    ≥ 4 (the 2-site ring would count its single bond twice, so it is excluded rather than
    given a convention). For L = 4 the result is −2J; per site it tends to
    ``J * HULTHEN_ENERGY_PER_SITE`` as L → ∞.

    Raises:
        ValueError: if ``n_sites`` is not an even integer ≥ 4, or J is negative or not a
            finite real (for J < 0 the ground state is the ferromagnetic one, E = J L/4,
            which this function does not describe).
    """
    n = _check_ring_size(n_sites)
    J = finite_real("J", J)
    if J < 0:
        raise ValueError(
            f"J must be >= 0 (antiferromagnetic), got {J!r}: for J < 0 the ground state is "
            "ferromagnetic with E = J L/4"
        )
    J = float(J)
    lam = _ground_state_rapidities(n)
    return J * (n / 4.0 - math.fsum(2.0 / (4.0 * lam * lam + 1.0)))
