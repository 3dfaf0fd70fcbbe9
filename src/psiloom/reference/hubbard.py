"""Exact ground-state energy per site of the infinite one-dimensional Hubbard chain at half filling.

For H = −t Σ_{i,σ} (c†_{iσ} c_{i+1,σ} + h.c.) + U Σ_i n_{i↑} n_{i↓} with one electron per site,
the Bethe-ansatz solution of Lieb & Wu (PRL 20, 1445 (1968)) gives, for U ≥ 0,

    E/L = −4t ∫_0^∞ dω  J_0(ω) J_1(ω) / ( ω [1 + exp(ω U / (2t))] ),

with Bessel functions J_0, J_1. Limits: E/L = −4t/π at U = 0 (free band) and
E/L → −(4t²/U) ln 2 for U ≫ t (the Heisenberg chain with J = 4t²/U; Hulthén 1938).
"""

from __future__ import annotations

import numpy as np

from psiloom._validation import finite_real, positive_real


def hubbard_chain_energy_per_site(U: float, t: float = 1.0) -> float:
    """The Lieb-Wu half-filled ground-state energy per site (module docstring), U ≥ 0, t > 0."""
    import scipy.integrate  # imported on use
    import scipy.special

    U = finite_real("U", U, minimum=0.0)
    t = positive_real("t", t)
    u = U / t

    def integrand(w):
        if w == 0.0:
            return 0.5 / (1.0 + 1.0)  # J0 J1 / ω → 1/2 as ω → 0
        return scipy.special.j0(w) * scipy.special.j1(w) / (w * (1.0 + np.exp(min(w * u / 2.0, 700.0))))

    if u == 0.0:
        return -4.0 * t / np.pi
    # pieces of width π up to ω = 400 (the integrand then is below exp(−200 U/t)): about 1e-9
    # accuracy for U ≥ 0.1 t; smaller U converges slowly (the free limit is returned at U = 0)
    edges = np.arange(0.0, 400.0 + 1e-9, np.pi)
    total = sum(scipy.integrate.quad(integrand, a, b, limit=200, epsabs=1e-14)[0] for a, b in zip(edges[:-1], edges[1:]))
    return float(-4.0 * t * total)
