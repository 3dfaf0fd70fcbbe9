"""Quench dynamics of the transverse-field Ising ring by free fermions.

Hamiltonian with **Pauli** matrices on a periodic ring of even length L (as in
:mod:`psiloom.reference.tfim`):

    H(h) = −J Σ_i σᶻ_i σᶻ_{i+1} − h Σ_i σˣ_i .

The system starts in the ground state of H(h0) and evolves with H(h1) from t = 0 (ħ = 1, times in
units of 1/J). The transverse magnetisation per site is (Barouch & McCoy, PRA 3, 786 (1971);
Calabrese, Essler & Fagotti, J. Stat. Mech. P07016 (2012); derived here in the same way)

    ⟨σˣ⟩(t) = (1/L) Σ_k [ cos θ¹_k cos Δ_k + (cos θ⁰_k − cos θ¹_k cos Δ_k) cos(2 ε¹_k t) ] ,

with, for h ∈ {h0, h1},

    ε_k = 2 sqrt(J² + h² − 2 J h cos k),   cos θ_k = 2 (h − J cos k)/ε_k,   sin θ_k = 2 J sin k/ε_k,

Δ_k = θ⁰_k − θ¹_k, and the momenta of the even-fermion-parity sector (antiperiodic fermions)

    k_n = π (2n + 1 − L) / L,   n = 0, …, L − 1.

Why this is exact at finite L: the Jordan-Wigner fermions of the periodic spin ring obey
antiperiodic boundary conditions in the even-parity sector and periodic ones in the odd sector;
H commutes with the parity Π σˣ_i, the ground state of an even ring lies in the even sector
(for h0 ≠ 0 it is unique; at h0 = 0 the even combination of the two ferromagnets is the one meant),
so the whole evolution stays there and only the momenta above enter. Each pair (k, −k) is a
two-level system {|0⟩, |k,−k⟩} whose pseudo-spin precesses about the h1 axis at angular frequency
2 ε¹_k; its projection on the σˣ direction is the bracket above. At t = 0 the formula gives the
ground-state value (1/L) Σ_k cos θ⁰_k, i.e. −(1/L) ∂E_0/∂h.
"""

from __future__ import annotations

import numpy as np

from psiloom._validation import finite_real
from psiloom.reference.evolution import check_time_grid
from psiloom.reference.tfim import _check_even_ring_size

__all__ = ["tfim_ring_quench_sx"]


def _angles(k: np.ndarray, J: float, h: float):
    re = h - J * np.cos(k)
    im = J * np.sin(k)
    r = np.hypot(re, im)
    if np.any(r == 0):
        raise ValueError(f"h = {h!r} = J closes the gap at one of the ring's momenta; the angle is undefined")
    return re / r, im / r, 2.0 * r


def tfim_ring_quench_sx(n_sites: int, h0: float, h1: float, times, J: float = 1.0) -> np.ndarray:
    """⟨σˣ_i⟩(t) after the quench h0 → h1 of the periodic TFIM ring (module docstring).

    Args:
        n_sites: even ring length L ≥ 2.
        h0: field of the initial ground state; h1: field of the evolution; J: Ising coupling.
        times: times ≥ 0 (any order is fine; each is evaluated independently).

    Returns:
        ``(len(times),)`` float array, the same value on every site (translation invariance).
    """
    n = _check_even_ring_size(n_sites)
    h0 = finite_real("h0", h0)
    h1 = finite_real("h1", h1)
    J = finite_real("J", J)
    t = np.asarray(times, dtype=float).reshape(-1)
    if t.size == 0 or not np.all(np.isfinite(t)):
        raise ValueError(f"times must be a non-empty sequence of finite numbers, got {times!r}")
    k = np.pi * (2 * np.arange(n) + 1 - n) / n
    c0, s0, _ = _angles(k, J, h0)
    c1, s1, eps1 = _angles(k, J, h1)
    cos_delta = c0 * c1 + s0 * s1
    steady = c1 * cos_delta
    amplitude = c0 - c1 * cos_delta
    return np.mean(steady[None, :] + amplitude[None, :] * np.cos(2.0 * eps1[None, :] * t[:, None]), axis=1)
