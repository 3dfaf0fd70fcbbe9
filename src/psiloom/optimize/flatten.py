"""Flattening parameter pytrees to real vectors.

Stochastic reconfiguration works in a space of *real* parameters. A complex leaf θ = a + ib
is treated as the two real leaves (a, b); this is exact for non-holomorphic trial states too.
The matching gradient convention used throughout psiloom is

    grad of a complex leaf = ∂E/∂a + i ∂E/∂b ,

so that ``θ ← θ − η·grad`` descends in both real directions, and ``ravel_real(grad)`` gives
exactly the real gradient vector (∂E/∂a, ∂E/∂b).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
from jax.flatten_util import ravel_pytree
import optax


def _split(tree):
    return jax.tree_util.tree_map(lambda l: (jnp.real(l), jnp.imag(l)) if jnp.iscomplexobj(l) else l, tree)


def ravel_real(tree):
    """``(vector, unravel)``: a real 1-D vector of all parameters (complex split in re/im)."""
    vec, unravel_split = ravel_pytree(_split(tree))

    def unravel(v):
        parts = unravel_split(v)
        return jax.tree_util.tree_map(
            lambda orig, p: jax.lax.complex(p[0], p[1]).astype(orig.dtype) if jnp.iscomplexobj(orig) else p,
            tree,
            parts,
        )

    return vec, unravel


def conj_complex_leaves(tree):
    """Conjugate complex leaves: converts JAX's gradient of a real function of a complex leaf,
    ∂f/∂a − i ∂f/∂b, to psiloom's convention ∂f/∂a + i ∂f/∂b."""
    return jax.tree_util.tree_map(lambda l: jnp.conj(l) if jnp.iscomplexobj(l) else l, tree)


def tree_norm(tree):
    """Euclidean norm of all real components of a pytree, (Σ |leaf entries|²)^{1/2} (Optax's)."""
    return optax.tree_utils.tree_norm(tree)
