"""Exact sums over a whole (small) configuration space in place of Monte Carlo samples.

For a space of K configurations x_1 … x_K (``space.configurations()``: a
:class:`~psiloom.spaces.SpinSpace` sector or a :class:`~psiloom.fermions.FermionSpace`), every
average of variational Monte Carlo is a weighted sum with the exact Born weights

    w_k = |ψ(x_k)|² / Σ_j |ψ(x_j)|² ,      ⟨f⟩ = Σ_k w_k f(x_k) ,

so the energy, its gradient and the geometric tensor S of stochastic reconfiguration carry no
statistical noise. :class:`ExactEnumeration` follows the sampler protocol of
:mod:`psiloom.sampling.base` so that :class:`psiloom.train.GroundStateSearch` trains with it
unchanged: the "chains" are the K configurations (``n_chains = K``; one draw per chain per
step), ``sample`` returns all of them, and the step weights every average by :meth:`weights`
(the sampler's ``exact`` flag tells :func:`psiloom.vmc.vmc` to do so).

Local energies come from the sparse matrix of the Hamiltonian in the same basis order
(:meth:`local_energies`): with φ_k = ψ(x_k)/max_j|ψ(x_j)|,

    E_loc(x_k) = Σ_j H_kj φ_j / φ_k ,

one evaluation of ψ over the space instead of one per connected configuration. Where φ_k = 0
the local energy is set to 0 (its weight is 0). Cost per step: K evaluations of ψ, one sparse
product (K × longest row operations) and the log-derivatives of K configurations; memory K × n_sites plus
the matrix. Meant for spaces up to ~10⁵ configurations (larger ones raise ``ValueError``).
"""

from __future__ import annotations

from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from psiloom._validation import positive_int
from psiloom.sampling.base import evaluate_log_amplitudes
from psiloom.sampling.metropolis import ChainState

#: Largest space :class:`ExactEnumeration` accepts (configurations).
MAX_CONFIGURATIONS = 1 << 18


class EnumerationInfo(NamedTuple):
    """Info of an exact step (every configuration is always "accepted")."""
    accepted: jax.Array  # (n_chains,) all True


def born_weights(logs: jax.Array) -> jax.Array:
    """w_k = |ψ_k|²/Σ_j|ψ_j|² from log ψ_k (any shape; normalised over all entries), computed
    stably as a softmax of 2 Re log ψ; configurations with ψ = 0 (log = −inf) get weight 0."""
    r = 2.0 * jnp.real(logs)
    r = r - jnp.max(r)
    e = jnp.where(jnp.isfinite(r), jnp.exp(r), 0.0)
    return e / jnp.sum(e)


class ExactEnumeration:
    """Every configuration of ``space`` with its exact weight (module docstring).

    Args:
        space: a space with ``configurations()`` (enumeration order) and ``n_sites``.

    ``n_chains`` is the number of configurations, so ``GroundStateSearch(..., n_samples=K)``
    with K = ``n_chains`` uses each configuration once per step (a multiple repeats them, which
    changes nothing but the cost).
    """

    #: the training step weights its averages with :meth:`weights` instead of 1/n
    exact = True

    def __init__(self, space: Any):
        if not callable(getattr(space, "configurations", None)):
            raise TypeError(f"exact enumeration needs a space with configurations(), got {space!r}")
        size = int(getattr(space, "size", 0) or 0)
        if size > MAX_CONFIGURATIONS:
            raise ValueError(f"{space!r} has {size} configurations; exact enumeration is limited to "
                             f"{MAX_CONFIGURATIONS} (use a Markov-chain sampler)")
        self.space = space
        self.configurations = np.asarray(space.configurations(), dtype=np.float64)
        self.n_chains = positive_int("number of configurations", self.configurations.shape[0])
        self._matrices: dict[int, tuple[Any, Any]] = {}

    # ------------------------------------------------------------------ the sampler protocol
    def _x(self, dtype=None):
        return jnp.asarray(self.configurations, dtype or jnp.result_type(float))

    def init(self, key: jax.Array, log_amplitude) -> ChainState:
        """All configurations with log ψ (the key is not used)."""
        x = self._x()
        return ChainState(x, evaluate_log_amplitudes(log_amplitude, x))

    def refresh(self, state: ChainState, log_amplitude) -> ChainState:
        """Recompute log ψ of every configuration for new parameters."""
        return ChainState(state.x, evaluate_log_amplitudes(log_amplitude, state.x))

    def step(self, key: jax.Array, state: ChainState, log_amplitude):
        """Nothing moves: ``(state, EnumerationInfo)``."""
        return state, EnumerationInfo(jnp.ones((self.n_chains,), bool))

    def sample(self, key: jax.Array, state: ChainState, log_amplitude, n_per_chain: int):
        """All configurations, ``n_per_chain`` times: ``(xs (n_per_chain, K, n_sites), log ψ,
        state, acceptance = 1)``."""
        n_per_chain = positive_int("n_per_chain", n_per_chain)
        xs = jnp.broadcast_to(state.x, (n_per_chain, *state.x.shape))
        logs = jnp.broadcast_to(state.log_amp, (n_per_chain, *state.log_amp.shape))
        return xs, logs, state, jnp.ones((), jnp.float32)

    # ------------------------------------------------------------------ exact averages
    @staticmethod
    def weights(logs: jax.Array) -> jax.Array:
        """Born weights of the rows (:func:`born_weights`), normalised over all of them."""
        return born_weights(logs)

    def _matrix(self, hamiltonian):
        """``(values (K, G), cols (K, G))``: the non-zero entries of each row of ``hamiltonian``'s
        matrix in the enumeration order, padded with zeros to the longest row (G entries), as
        NumPy arrays (built once on the host; NumPy, so that a first call inside a trace caches
        no tracers). A gather per row, no scatter."""
        key = id(hamiltonian)
        if key not in self._matrices:
            if not callable(getattr(hamiltonian, "sparse_matrix", None)):
                raise TypeError(f"exact local energies need a Hamiltonian with sparse_matrix(space), got "
                                f"{type(hamiltonian).__name__}")
            mat = hamiltonian.sparse_matrix(self.space).tocsr()
            if mat.shape != (self.n_chains, self.n_chains):
                raise ValueError(f"the Hamiltonian's matrix has shape {mat.shape}, the space has "
                                 f"{self.n_chains} configurations")
            counts = np.diff(mat.indptr)
            width = max(1, int(counts.max(initial=0)))
            values = np.zeros((self.n_chains, width), dtype=mat.dtype)
            cols = np.zeros((self.n_chains, width), dtype=np.int32)
            slot = np.arange(mat.nnz) - np.repeat(mat.indptr[:-1], counts)
            rows = np.repeat(np.arange(self.n_chains), counts)
            values[rows, slot] = mat.data
            cols[rows, slot] = mat.indices
            self._matrices[key] = (hamiltonian, (values, cols))
        return self._matrices[key][1]

    def local_energies(self, hamiltonian, logs: jax.Array) -> jax.Array:
        """E_loc of every configuration (rows of ``logs``: ``(K,)`` or ``(n, K)`` repeats) from the
        sparse matrix (module docstring)."""
        values, cols = self._matrix(hamiltonian)
        flat = logs.reshape(-1, self.n_chains)[0]
        shift = jnp.max(jnp.real(flat))
        phi = jnp.where(jnp.isfinite(jnp.real(flat)), jnp.exp(flat - shift), 0.0)
        h_phi = jnp.sum(jnp.asarray(values) * phi[jnp.asarray(cols)], axis=1)
        nonzero = jnp.abs(phi) > 0
        e = jnp.where(nonzero, h_phi / jnp.where(nonzero, phi, 1.0), 0.0)
        return jnp.broadcast_to(e, logs.shape).reshape(-1)

    def __repr__(self) -> str:
        return f"ExactEnumeration({self.space!r}, {self.n_chains} configurations)"
