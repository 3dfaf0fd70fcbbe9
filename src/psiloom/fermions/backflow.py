"""Neural backflow determinant: orbitals that depend on the whole configuration.

After Luo & Clark, PRL 122, 226401 (2019): the determinant of :mod:`psiloom.fermions.determinants`
with orbital matrices

    Φσ(n) = Φσ + ΔΦσ(n),     ΔΦσ(n) = reshape_σ( W_out · g(n) ),

where Φσ are mean-field orbitals (parameters, started from a guess such as Hartree-Fock) and
g is a feed-forward feature map of the occupations. The layer design here is psiloom's own:
the occupations enter as s = 2n − 1 ∈ {−1, +1}, each hidden layer is a tanh layer
h_{l+1} = tanh(W_l h_l + b_l) of width ``hidden`` (default 2 × the number of spin-orbitals),
and the last hidden layer feeds **one output head per spin** with its own gain: the heads
``W_σ`` start at zero, so the state starts as the plain Slater determinant of its guess (a
backflow that starts as mean field). The optional density-density Jastrow factor of
:class:`~psiloom.fermions.SlaterDensityJastrow` can be multiplied in (``jastrow=True``).

Cost: O(B · (P·H + H·M·N)) for the orbitals and O(B·N³) for the determinants; no fast updates
(every change of n changes every orbital).
"""

from __future__ import annotations

import flax.linen as nn
import jax.numpy as jnp

from psiloom._validation import boolean, positive_int
from psiloom.fermions.determinants import DeterminantState
from psiloom.states.base import default_real_dtype


class BackflowDeterminant(DeterminantState):
    """Backflow determinant (module docstring). Attributes: ``space``, ``guess``, ``hidden``
    (width; 0 means 2 × spin-orbitals), ``layers`` (number of tanh layers, ≥ 1), ``jastrow``."""

    hidden: int = 0
    layers: int = 1
    jastrow: bool = False

    def orbital_matrices(self, x):
        s = self.space
        positive_int("layers", self.layers)
        boolean("jastrow", self.jastrow)
        width = positive_int("hidden", self.hidden) if self.hidden else 2 * s.n_spin_orbitals
        dtype = default_real_dtype()
        phi_up, phi_dn = self.mean_field_orbitals()
        h = 2.0 * x - 1.0
        for layer in range(self.layers):
            h = jnp.tanh(nn.Dense(width, param_dtype=dtype, name=f"hidden_{layer}")(h))
        out = []
        for name, phi in (("up", phi_up), ("down", phi_dn)):
            m, n = phi.shape
            if n == 0:
                out.append(jnp.broadcast_to(phi, (x.shape[0], m, 0)))
                continue
            head = nn.Dense(m * n, use_bias=True, kernel_init=nn.initializers.zeros, param_dtype=dtype,
                            name=f"head_{name}")(h)
            out.append(phi[None] + head.reshape(x.shape[0], m, n))
        return tuple(out)

    def log_correlator(self, x):
        if not self.jastrow:
            return 0.0
        m = self.space.n_orbitals
        w = self.param("jastrow", nn.initializers.zeros, (m, m), default_real_dtype())
        dens = x[:, :m] if self.space.spinless else x[:, :m] + x[:, m:]
        return -0.25 * jnp.einsum("bi,ij,bj->b", dens, w + w.T, dens)
