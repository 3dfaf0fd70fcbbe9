"""The energy gradient in covariance form and the sample geometry used by preconditioners.

For real parameters θ_k (complex ones split into real and imaginary parts) and
O_k(x) = ∂_{θ_k} log ψ(x), the gradient of E = ⟨H⟩ is

    ∂E/∂θ_k = 2 Re ⟨ O_k(x)* (E_loc(x) − E) ⟩_{|ψ|²} ,

computed here as one reverse-mode pass through the surrogate
L(θ) = 2 mean_s Re[ conj(log ψ_θ(x_s)) · stopgrad(E_loc(x_s) − E) ].

:class:`SampleGeometry` exposes the centred, scaled log-derivative matrix

    X = [Re ΔO; Im ΔO] / √n   (rows: samples, columns: real parameters),

with ΔO = O − ⟨O⟩, so that the quantum geometric tensor (real part) is S = Xᵀ X, and the
residual ε = [Re ΔE; Im ΔE] / √n with F = Xᵀ ε = ½ ∇E. Preconditioners ask for what they need;
unused pieces are never computed (everything is traced lazily inside ``jax.jit``).
"""

from __future__ import annotations

from typing import Callable

import jax
import jax.numpy as jnp

from psiloom.batching import map_in_chunks
from psiloom.optimize.flatten import conj_complex_leaves, ravel_real
from psiloom.reduce import sample_mean


def energy_gradient(apply_fn: Callable, params, x: jax.Array, e_loc: jax.Array):
    """``(E, ∇E)``: mean local energy and its parameter gradient (pytree like ``params``).

    Args:
        apply_fn: ``apply_fn(params, x) -> log ψ(x)`` batched over the leading axis.
        x: samples ``(n, n_sites)`` drawn from |ψ|².
        e_loc: local energies ``(n,)`` at ``x``.
    """
    energy = sample_mean(e_loc)
    de = jax.lax.stop_gradient(e_loc - energy)

    def surrogate(p):
        return 2.0 * sample_mean(jnp.real(jnp.conj(apply_fn(p, x)) * de))

    grad = conj_complex_leaves(jax.grad(surrogate)(params))
    return energy, grad


class SampleGeometry:
    """Per-sample log-derivatives of a batch, evaluated lazily (see module docstring).

    Only lives inside a traced step: it is passed to optax transformations as the extra
    keyword argument ``geometry``.
    """

    def __init__(self, apply_fn: Callable, params, x: jax.Array, e_loc: jax.Array, chunk: int | None = None):
        self.apply_fn = apply_fn
        self.params = params
        self.x = x
        self.e_loc = e_loc
        self.chunk = chunk
        self.n_samples = x.shape[0]
        self.param_vector, self.unravel = ravel_real(params)
        out = jax.eval_shape(apply_fn, params, x[:1])
        self.complex_output = jnp.issubdtype(out.dtype, jnp.complexfloating)

    def _log_psi_of_vector(self, vec, xs):
        return self.apply_fn(self.unravel(vec), xs)

    def log_derivatives(self) -> jax.Array:
        """O = ∂ log ψ / ∂θ (real parameters): ``(n, P)``, complex if ψ is complex."""
        vec = self.param_vector

        def one(xi):
            if self.complex_output:
                re = jax.grad(lambda v: jnp.real(self._log_psi_of_vector(v, xi[None])[0]))(vec)
                im = jax.grad(lambda v: jnp.imag(self._log_psi_of_vector(v, xi[None])[0]))(vec)
                return re + 1j * im
            return jax.grad(lambda v: self._log_psi_of_vector(v, xi[None])[0].real)(vec)

        return map_in_chunks(jax.vmap(one), self.chunk, self.x)

    def jacobian(self) -> jax.Array:
        """X = [Re ΔO; Im ΔO]/√n, real, shape ``(n, P)`` or ``(2n, P)`` for complex ψ."""
        o = self.log_derivatives()
        d = (o - sample_mean(o)) / jnp.sqrt(self.n_samples)
        if self.complex_output:
            return jnp.concatenate([jnp.real(d), jnp.imag(d)], axis=0)
        return d

    def residual(self) -> jax.Array:
        """ε = [Re ΔE; Im ΔE]/√n (real part only for real ψ), so that Xᵀ ε = ½ ∇E."""
        de = (self.e_loc - sample_mean(self.e_loc)) / jnp.sqrt(self.n_samples)
        if self.complex_output:
            return jnp.concatenate([jnp.real(de), jnp.imag(de)])
        return jnp.real(de)
