"""Initial states for time evolution: product states written exactly as RBM parameters.

A product state |ψ⟩ = ⊗_i (u_i |↑⟩ + d_i |↓⟩) has log ψ(x) = Σ_i log φ_i(x_i) with φ_i(+1) = u_i,
φ_i(−1) = d_i, i.e. up to a constant

    log ψ(x) = Σ_i a_i x_i,        a_i = ½ log(u_i / d_i)      (complex log for complex ratios).

An RBM, log ψ(x) = a·x + Σ_j log 2cosh(b_j + Σ_i W_ij x_i), represents it exactly with W = 0 and
any hidden biases b. But W = 0 is a singular point of the family: every derivative
∂ log ψ/∂W_ij = x_i tanh(b_j + ·) is then linear in x, the tangent space holds no pair terms, and
the TDVP could never build correlations (the product state would stay a product state). Hence
``kernel_scale`` (default 1e-3) draws small random weights W, the hidden biases b are drawn at
random (scale ``hidden_scale``), and the visible bias absorbs the part of the hidden units that is
linear in W, a_i = ½ log(u_i/d_i) − Σ_j W_ij tanh b_j; what is left,
½ Σ_j sech² b_j (Σ_i W_ij x_i)² + O(W³), changes log ψ by ~ α N² kernel_scale²/2 at most
(``kernel_scale=0`` gives the exact product state). Amplitudes must be non-zero
(a basis state such as the Néel state is approached with a small d_i, e.g. 1e-3: the weight of the
configurations off it is then ~ (1e-3)² per flipped site).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import finite_real

__all__ = ["product_state_rbm"]


def product_state_rbm(model, amplitudes, key: jax.Array, hidden_scale: float = 1.0, kernel_scale: float = 1e-3):
    """RBM variables ``{"params": ...}`` of the product state with site amplitudes ``amplitudes``.

    Args:
        model: a :class:`psiloom.states.RBM` (with ``visible_bias=True``; complex parameters for
            complex amplitude ratios).
        amplitudes: ``(n_sites, 2)`` amplitudes ``(u_i, d_i)`` of ↑ (x = +1) and ↓ (x = −1) per site.
        key: PRNG key for the hidden biases.
        hidden_scale: standard deviation of the hidden biases (> 0).
        kernel_scale: standard deviation of the weights W (≥ 0; see the module docstring).
    """
    from psiloom.states.rbm import RBM

    if not isinstance(model, RBM):
        raise TypeError(f"model must be an RBM, got {type(model).__name__}")
    if not model.visible_bias or not model.hidden_bias:
        raise ValueError("product_state_rbm needs an RBM with visible_bias=True and hidden_bias=True")
    amp = np.asarray(amplitudes)
    if amp.ndim != 2 or amp.shape[1] != 2 or amp.shape[0] < 1:
        raise ValueError(f"amplitudes must have shape (n_sites, 2), got {amp.shape}")
    if not np.all(np.isfinite(amp)) or np.any(amp == 0):
        raise ValueError("amplitudes must be finite and non-zero (use a small amplitude instead of 0)")
    scale = finite_real("hidden_scale", hidden_scale)
    if scale <= 0:
        raise ValueError(f"hidden_scale must be positive, got {hidden_scale!r}")
    kscale = finite_real("kernel_scale", kernel_scale, minimum=0.0)
    n = amp.shape[0]
    variables = model.init(key, jnp.ones((1, n)))
    params = variables["params"]
    dtype = params["visible_bias"].dtype
    ratio = amp[:, 0].astype(complex) / amp[:, 1]
    a = 0.5 * np.log(ratio)
    if not jnp.iscomplexobj(params["visible_bias"]):
        if np.any(np.abs(a.imag) > 1e-14):
            raise ValueError("complex amplitude ratios need an RBM with complex parameters (complex_params=True)")
        a = a.real
    k_b, k_w = jax.random.split(key)
    b = scale * jax.random.normal(k_b, params["hidden_bias"].shape)
    w = kscale * jax.random.normal(k_w, params["kernel"].shape)
    a = jnp.asarray(a) - w @ jnp.tanh(b)
    new = {"kernel": w.astype(dtype), "hidden_bias": b.astype(dtype), "visible_bias": a.astype(dtype)}
    return {**variables, "params": {**params, **new}}
