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

Matrix-free products with X (for iterative solvers) never form X or S:

    X v  = centred jvp of θ ↦ [Re log ψ_θ(x_s); Im log ψ_θ(x_s)]_s along v, divided by √n,
    Xᵀu = vjp of the same map with the centred cotangent u − ⟨u⟩ (per block), divided by √n,

so S v = Xᵀ(X v) costs about one forward and one backward pass over the batch.

Exact sums (:mod:`psiloom.sampling.enumeration`): with probabilities w_s of the rows in place
of 1/n, every mean is Σ_s w_s (·) and X = diag(√w) (O − Σ_s w_s O_s), ε = √w (E_loc − E), so
S = XᵀX and F = Xᵀε are the exact tensor and force; the transpose of the weighted centring is
u ↦ √w u − w Σ_s √w_s u_s (for w = 1/n both reduce to the formulas above).
"""

from __future__ import annotations

from typing import Callable

import jax
import jax.numpy as jnp

from psiloom.optimize.flatten import conj_complex_leaves, ravel_real
from psiloom.reduce import sample_mean, sample_sum


def energy_gradient(apply_fn: Callable, params, x: jax.Array, e_loc: jax.Array, weights: jax.Array | None = None):
    """``(E, ∇E)``: mean local energy and its parameter gradient (pytree like ``params``).

    Args:
        apply_fn: ``apply_fn(params, x) -> log ψ(x)`` batched over the leading axis.
        x: samples ``(n, n_sites)`` drawn from |ψ|².
        e_loc: local energies ``(n,)`` at ``x``.
        weights: optional probabilities ``(n,)`` of the rows (exact sums); ``None``: 1/n each.
    """
    w = None if weights is None else jax.lax.stop_gradient(weights)

    def mean(v):
        return sample_mean(v) if w is None else jnp.sum(w * v)
    energy = mean(e_loc)
    de = jax.lax.stop_gradient(e_loc - energy)

    def surrogate(p):
        return 2.0 * mean(jnp.real(jnp.conj(apply_fn(p, x)) * de))

    grad = conj_complex_leaves(jax.grad(surrogate)(params))
    return energy, grad


class SampleGeometry:
    """Per-sample log-derivatives of a batch, evaluated lazily (see module docstring).

    Only lives inside a traced step: it is passed to optax transformations as the extra
    keyword argument ``geometry``.

    ``sign_only_phase=True`` (from the trial state's :attr:`~psiloom.states.TrialState.sign_only_phase`)
    declares that Im log ψ only carries a sign (0 or π, as for determinants of real orbitals).
    With real parameters its derivative is then zero wherever ψ ≠ 0, and X = Re ΔO/√n,
    ε = Re ΔE/√n exactly: half the rows and one gradient per sample instead of two. Complex
    parameters ignore the flag.
    """

    def __init__(self, apply_fn: Callable, params, x: jax.Array, e_loc: jax.Array, chunk: int | None = None,
                 weights: jax.Array | None = None, sign_only_phase: bool = False):
        self.weights = None if weights is None else jax.lax.stop_gradient(weights)
        self.apply_fn = apply_fn
        self.params = params
        self.x = x
        self.e_loc = e_loc
        self.chunk = chunk
        self.n_samples = x.shape[0]
        self.param_vector, self.unravel = ravel_real(params)
        out = jax.eval_shape(apply_fn, params, x[:1])
        # a complex log ψ whose imaginary part is only a sign (0 or π) has ∂ Im log ψ/∂θ = 0 for
        # real θ: the Im rows of X are zero, so they are neither computed nor stored
        real_parameters = not any(jnp.iscomplexobj(leaf) for leaf in jax.tree_util.tree_leaves(params))
        self.complex_output = (jnp.issubdtype(out.dtype, jnp.complexfloating)
                               and not (sign_only_phase and real_parameters))

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

        if not self._chunked():
            return jax.vmap(one)(self.x)
        return jax.lax.map(one, self.x, batch_size=self.chunk)  # chunks of rows, one at a time

    def jacobian(self) -> jax.Array:
        """X = [Re ΔO; Im ΔO]/√n, real, shape ``(n, P)`` or ``(2n, P)`` for complex ψ."""
        o = self.log_derivatives()
        if self.weights is not None:
            d = (o - self.weights @ o) * jnp.sqrt(self.weights)[:, None]
        else:
            d = (o - sample_mean(o)) / jnp.sqrt(self.n_samples)
        if self.complex_output:
            return jnp.concatenate([jnp.real(d), jnp.imag(d)], axis=0)
        return d

    # ------------------------------------------------------------ matrix-free products
    def _real_outputs(self, vec, xs):
        """θ ↦ [Re log ψ; Im log ψ] (complex ψ) or Re log ψ (real ψ), a real vector."""
        out = self._log_psi_of_vector(vec, xs)
        if self.complex_output:
            return jnp.concatenate([jnp.real(out), jnp.imag(out)])
        return jnp.real(out)

    def _centre(self, u):
        """Subtract the sample mean in each block (Re / Im) of a row vector and scale by 1/√n
        (with weights: subtract Σ w u and scale by √w)."""
        blocks = u.reshape(-1, self.n_samples).T  # (n, 1 or 2): sample axis leading
        if self.weights is not None:
            w = self.weights[:, None]
            return ((blocks - jnp.sum(w * blocks, axis=0)) * jnp.sqrt(w)).T.reshape(-1)
        blocks = blocks - sample_mean(blocks)
        return blocks.T.reshape(-1) / jnp.sqrt(self.n_samples)

    def _centre_transposed(self, u):
        """The transpose of :meth:`_centre` (equal to it without weights): √w u − w Σ √w u."""
        if self.weights is None:
            return self._centre(u)
        blocks = u.reshape(-1, self.n_samples).T
        w = self.weights[:, None]
        y = jnp.sqrt(w) * blocks
        return (y - w * jnp.sum(y, axis=0)).T.reshape(-1)

    def _linearized(self):
        """``(f_jvp, f_vjp)`` of θ ↦ real outputs at the current parameters.

        Built afresh on each call (a cached linearisation would leak tracers between traces);
        :meth:`s_operator` builds it once and reuses it for every product.
        """
        f = lambda v: self._real_outputs(v, self.x)
        _, f_jvp = jax.linearize(f, self.param_vector)
        f_vjp = jax.linear_transpose(f_jvp, self.param_vector)
        return f_jvp, lambda u: f_vjp(u)[0]

    def _chunked_rows(self, a, fill):
        """Split the sample axis into ``(n_chunks, chunk, ...)`` blocks, padding with ``fill`` rows."""
        n, chunk = self.n_samples, self.chunk
        n_chunks = -(-n // chunk)
        pad = n_chunks * chunk - n
        if pad:
            a = jnp.concatenate([a, jnp.broadcast_to(fill, (pad, *a.shape[1:])).astype(a.dtype)], axis=0)
        return a.reshape(n_chunks, chunk, *a.shape[1:])

    def _chunked(self) -> bool:
        return self.chunk is not None and self.chunk < self.n_samples

    def jvp(self, v: jax.Array) -> jax.Array:
        """X v for a real parameter vector ``v`` of shape ``(P,)``; returns ``(n,)`` or ``(2n,)``."""
        v = jnp.asarray(v, self.param_vector.dtype)
        if not self._chunked():
            return self._centre(self._linearized()[0](v))
        xs = self._chunked_rows(self.x, self.x[0])  # padding repeats a valid configuration

        def one(xc):
            return jax.jvp(lambda p: self._real_outputs(p, xc).reshape(-1, xc.shape[0]),
                           (self.param_vector,), (v,))[1]

        out = jax.lax.map(one, xs)  # (n_chunks, blocks, chunk)
        raw = jnp.moveaxis(out, 1, 0).reshape(out.shape[1], -1)[:, : self.n_samples].reshape(-1)
        return self._centre(raw)

    def vjp(self, u: jax.Array) -> jax.Array:
        """Xᵀ u for a real row vector ``u`` of shape ``(n,)`` (``(2n,)`` for complex ψ); returns ``(P,)``."""
        u = self._centre_transposed(jnp.asarray(u, self.param_vector.dtype))
        if not self._chunked():
            return self._linearized()[1](u)
        cot = u.reshape(-1, self.n_samples).T  # (n, blocks)
        xs = self._chunked_rows(self.x, self.x[0])
        cs = self._chunked_rows(cot, jnp.zeros((), cot.dtype))  # padded rows get zero cotangent

        def body(acc, args):
            xc, cc = args
            _, pull = jax.vjp(lambda p: self._real_outputs(p, xc), self.param_vector)
            return acc + pull(cc.T.reshape(-1))[0], None

        total, _ = jax.lax.scan(body, jnp.zeros_like(self.param_vector), (xs, cs))
        return total

    def s_matvec(self, v: jax.Array) -> jax.Array:
        """S v = Xᵀ (X v) without forming X or S."""
        return self.vjp(self.jvp(v))

    def s_operator(self) -> Callable[[jax.Array], jax.Array]:
        """``v ↦ S v`` for repeated use (iterative solvers): linearises log ψ once, up front.

        Without chunking the forward pass is linearised here and each product costs one jvp and
        one transposed jvp; with chunking every product re-runs the forward pass chunk by chunk
        (memory bounded by one chunk).
        """
        if self._chunked():
            return self.s_matvec
        f_jvp, f_vjp = self._linearized()
        dtype = self.param_vector.dtype
        # X v = C(J v)/√n and Xᵀu = Jᵀ C(u)/√n with C the (idempotent) centring
        return lambda v: f_vjp(self._centre_transposed(self._centre(f_jvp(jnp.asarray(v, dtype)))))

    def s_diagonal(self) -> jax.Array:
        """diag S = Σ_rows X², shape ``(P,)`` (forms X)."""
        x = self.jacobian()
        return sample_sum(x * x)

    def residual(self) -> jax.Array:
        """ε = [Re ΔE; Im ΔE]/√n (real part only for real ψ), so that Xᵀ ε = ½ ∇E."""
        if self.weights is not None:
            de = (self.e_loc - jnp.sum(self.weights * self.e_loc)) * jnp.sqrt(self.weights)
        else:
            de = (self.e_loc - sample_mean(self.e_loc)) / jnp.sqrt(self.n_samples)
        if self.complex_output:
            return jnp.concatenate([jnp.real(de), jnp.imag(de)])
        return jnp.real(de)
