"""Determinant trial states for fermions in an orbital basis.

For occupations ``n`` of a :class:`~psiloom.fermions.FermionSpace` with ``N↑`` up and ``N↓``
down electrons, let ``r↑_1 < … < r↑_{N↑}`` be the occupied up orbitals and ``r↓_k`` the occupied
down ones. A determinant state with orbital matrices ``Φ↑`` (M × N↑) and ``Φ↓`` (M × N↓) is

    ψ(n) = det[Φ↑_{r↑_k, a}]_{k,a} · det[Φ↓_{r↓_k, a}]_{k,a} · exp(J(n)),

rows taken in increasing orbital order, which is exactly the amplitude ⟨n|Π_a b†_{a↑} Π_a b†_{a↓}|0⟩
of the product of the orbital creators b†_{aσ} = Σ_i Φσ_{ia} c†_{iσ} in the sign convention of
:mod:`psiloom.fermions.space` (up spin-orbitals before down ones). ``log ψ`` is returned as a
complex number: log|ψ| + iπ for a negative amplitude.

* :class:`SlaterDeterminant` — the mean field: Φ↑, Φ↓ are parameters (unrestricted), started
  from given orbitals (:class:`OrbitalGuess`, e.g. Hartree-Fock or the U = 0 band) or at random.
* :class:`SlaterDensityJastrow` — times the density-density Jastrow factor
  J(n) = −½ Σ_{ij} v_ij n_i n_j with n_i = n_i↑ + n_i↓ and v symmetric; its diagonal is the
  Gutzwiller factor (n_i² = n_i + 2 n_i↑ n_i↓).

Subclass :class:`DeterminantState` and override :meth:`DeterminantState.orbital_matrices`
(configuration-dependent orbitals, as :class:`~psiloom.fermions.BackflowDeterminant` does) or
:meth:`DeterminantState.log_correlator` (any symmetric factor).

Fast updates (:mod:`psiloom.states.fast`): :class:`SlaterDeterminant` offers the rank-1
Sherman-Morrison update of a hop (one electron moves between orbitals of one spin): the cache
holds the occupations, the row of each orbital in the matrix and the inverse matrices, and the
ratio is det(A')/det(A) = (Φ_{j,:} A⁻¹)_k · (−1)^{#occupied orbitals strictly between i and j}
(the rows stay in increasing order after the sign). The generic path is the reference.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar
import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np

from psiloom.fermions.space import FermionSpace
from psiloom.states.base import TrialState, normal_init, default_real_dtype
from psiloom.states.fast import FastUpdates


def _as_tuple(matrix, rows: int, cols: int, what: str) -> tuple:
    arr = np.asarray(matrix, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[0] != rows or arr.shape[1] < cols:
        raise ValueError(f"{what} must have shape ({rows}, ≥{cols}) (orbitals × occupied columns), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{what} must be finite")
    return tuple(tuple(float(v) for v in row[:cols]) for row in arr)


@dataclass(frozen=True)
class OrbitalGuess:
    """Starting orbitals of a determinant (hashable, so a Flax attribute): nested tuples of the
    ``(M, N↑)`` and ``(M, N↓)`` matrices. Build with :meth:`from_arrays`."""

    up: tuple
    down: tuple

    @classmethod
    def from_arrays(cls, space: FermionSpace, up, down=None) -> "OrbitalGuess":
        """Columns beyond ``N↑`` (``N↓``) are dropped; ``down`` defaults to ``up`` (restricted)."""
        down = up if down is None else down
        m = space.n_orbitals
        return cls(_as_tuple(up, m, space.n_up, "up orbitals"),
                   _as_tuple(down, m, space.n_down, "down orbitals") if space.n_down else ())

    def arrays(self, space: FermionSpace):
        """``(up (M, N↑), down (M, N↓))`` as NumPy arrays."""
        m = space.n_orbitals
        up = np.asarray(self.up, dtype=np.float64).reshape(m, space.n_up)
        down = np.asarray(self.down, dtype=np.float64).reshape(m, space.n_down)
        return up, down


def lowest_orbitals(space: FermionSpace, one_body_up, one_body_down=None) -> OrbitalGuess:
    """The lowest eigenvectors of one-body matrices (e.g. the hopping matrix of
    :func:`~psiloom.fermions.one_body_matrix`): the exact ground state at U = 0 when the shell is
    closed. Real symmetric matrices only."""
    h_up = np.asarray(one_body_up, dtype=np.float64)
    h_dn = h_up if one_body_down is None else np.asarray(one_body_down, dtype=np.float64)
    _, v_up = np.linalg.eigh(h_up)
    _, v_dn = np.linalg.eigh(h_dn)
    return OrbitalGuess.from_arrays(space, v_up, v_dn)


def occupied_orbitals(x: jax.Array, n_orbitals: int, n_up: int, n_down: int):
    """``(rows↑ (B, N↑), rows↓ (B, N↓))``: the occupied orbitals of each spin in increasing order."""
    def rows(block, k):
        return jax.vmap(lambda r: jnp.nonzero(r > 0.5, size=k, fill_value=0)[0])(block)

    up = rows(x[:, :n_orbitals], n_up)
    down = rows(x[:, n_orbitals:2 * n_orbitals], n_down) if n_down else jnp.zeros((x.shape[0], 0), jnp.int32)
    return up, down


#: Real matrices up to this size go through :func:`eliminate_slogdet` instead of LAPACK.
SMALL_DETERMINANT = 12


def eliminate_slogdet(a: jax.Array) -> tuple[jax.Array, jax.Array]:
    """``(sign, log|det|)`` of real ``(..., n, n)`` matrices by Gaussian elimination with partial
    pivoting in plain ``jnp`` (n static, the loop unrolled): det = Π_k (±) u_kk. Differentiable;
    a singular matrix gives sign 0 and log|det| = −inf.

    Why not ``jnp.linalg.slogdet``: on the CPU its batched LU (LAPACK getrf through jaxlib's FFI)
    splits a large batch over XLA's intra-op thread pool and waits for the parts; with two such
    calls running at once (the up and the down determinant) on a 2-thread pool both threads wait
    and the program never finishes (observed with jaxlib 0.10.2 for batches of a few thousand
    matrices: a step of the 3136-configuration N2 sector hung with every thread in a futex wait).
    For the small matrices of determinant states this elimination is also cheaper.
    """
    n = a.shape[-1]
    rows = jnp.arange(n)
    sign = jnp.ones(a.shape[:-2], a.dtype)
    logabs = jnp.zeros(a.shape[:-2], a.dtype)
    for k in range(n):
        p = jnp.argmax(jnp.abs(a[..., k:, k]), axis=-1) + k  # pivot row
        perm = jnp.where(rows == k, p[..., None], jnp.where(rows == p[..., None], k, rows))
        a = jnp.take_along_axis(a, perm[..., :, None], axis=-2)
        pivot = a[..., k, k]
        sign = sign * jnp.where(p == k, 1.0, -1.0) * jnp.sign(pivot)
        logabs = logabs + jnp.log(jnp.abs(pivot))
        if k + 1 < n:
            safe = jnp.where(pivot == 0, 1.0, pivot)
            factors = a[..., k + 1:, k] / safe[..., None]
            a = a.at[..., k + 1:, :].add(-factors[..., :, None] * a[..., k, None, :])
    return sign, logabs


def log_det(matrices: jax.Array) -> jax.Array:
    """``log det`` of a batch of square matrices as a complex number (log|det| + iπ if det < 0);
    0 for 0 × 0 matrices. Real matrices up to :data:`SMALL_DETERMINANT` use
    :func:`eliminate_slogdet`, others ``jnp.linalg.slogdet``."""
    if matrices.shape[-1] == 0:
        return jnp.zeros(matrices.shape[:-2], dtype=jnp.result_type(matrices.dtype, jnp.complex64))
    if matrices.shape[-1] <= SMALL_DETERMINANT and not jnp.iscomplexobj(matrices):
        sign, logabs = eliminate_slogdet(matrices)
    else:
        sign, logabs = jnp.linalg.slogdet(matrices)
    if jnp.iscomplexobj(sign):
        return logabs + jnp.log(sign)
    return logabs + jnp.where(sign < 0, 1j * jnp.pi, 0.0)


class DeterminantState(TrialState):
    """Base of the determinant states (module docstring). Attributes: ``space`` (the
    :class:`~psiloom.fermions.FermionSpace`), ``guess`` (an :class:`OrbitalGuess` or ``None``:
    random orbitals, standard normal)."""

    space: FermionSpace
    guess: OrbitalGuess | None = None
    #: log ψ = log|ψ| + iπ·[ψ < 0] with real parameters (TrialState.sign_only_phase); a subclass
    #: with a parameter-dependent complex phase must set this back to False
    sign_only_phase: ClassVar[bool] = True

    def check_attributes(self):
        """Raise TypeError for a ``space`` that is not a FermionSpace or a bad ``guess``."""
        if not isinstance(self.space, FermionSpace):
            raise TypeError(f"{type(self).__name__}.space must be a FermionSpace, got {self.space!r}")
        if self.guess is not None and not isinstance(self.guess, OrbitalGuess):
            raise TypeError(f"{type(self).__name__}.guess must be an OrbitalGuess or None, got {self.guess!r}")

    def mean_field_orbitals(self):
        """The parameters ``orbitals_up`` (M, N↑) and ``orbitals_down`` (M, N↓)."""
        s = self.space
        dtype = default_real_dtype()
        if self.guess is not None:
            up0, dn0 = self.guess.arrays(s)

            def init_up(key, shape, dtype=dtype):
                return jnp.asarray(up0, dtype)

            def init_dn(key, shape, dtype=dtype):
                return jnp.asarray(dn0, dtype)
        else:
            init_up = init_dn = normal_init(1.0)
        up = self.param("orbitals_up", init_up, (s.n_orbitals, s.n_up), dtype)
        down = self.param("orbitals_down", init_dn, (s.n_orbitals, s.n_down), dtype)
        return up, down

    def orbital_matrices(self, x):
        """Orbitals seen by configuration x: ``(Φ↑ (B, M, N↑), Φ↓ (B, M, N↓))`` or unbatched
        ``(M, N↑), (M, N↓)`` when they do not depend on x."""
        return self.mean_field_orbitals()

    def log_correlator(self, x):
        """log of a positive symmetric factor (default 0)."""
        return 0.0

    @nn.compact
    def log_amplitude(self, x):
        self.check_attributes()
        s = self.space
        if x.shape[-1] != s.n_spin_orbitals:
            raise ValueError(f"{type(self).__name__} was built for {s.n_spin_orbitals} spin-orbitals, got "
                             f"configurations of {x.shape[-1]} (shape {tuple(x.shape)})")
        phi_up, phi_dn = self.orbital_matrices(x)
        rows_up, rows_dn = occupied_orbitals(x, s.n_orbitals, s.n_up, s.n_down)
        out = 0.0
        for phi, rows in ((phi_up, rows_up), (phi_dn, rows_dn)):
            if phi.ndim == 2:
                mats = phi[rows]  # (B, N, N)
            else:
                mats = jnp.take_along_axis(phi, rows[:, :, None], axis=1)
            out = out + log_det(mats)
        return out + self.log_correlator(x)


class SlaterDeterminant(DeterminantState):
    """ψ(n) = det Φ↑[occupied ↑] · det Φ↓[occupied ↓] with Φ↑, Φ↓ parameters (module docstring);
    offers fast updates for hops."""

    def fast_updates(self) -> FastUpdates:
        """Sherman-Morrison hop updates (:func:`determinant_fast_updates`)."""
        params = self.variables["params"]
        return determinant_fast_updates(self.space, params["orbitals_up"], params["orbitals_down"])


class SlaterDensityJastrow(DeterminantState):
    """Slater determinant times the density-density (Gutzwiller on the diagonal) Jastrow factor
    exp(−½ Σ_ij v_ij n_i n_j), v = (w + wᵀ)/2 with the parameter ``jastrow`` w (M × M, zeros)."""

    def log_correlator(self, x):
        m = self.space.n_orbitals
        w = self.param("jastrow", nn.initializers.zeros, (m, m), default_real_dtype())
        v = 0.5 * (w + w.T)
        dens = x[:, :m] if self.space.spinless else x[:, :m] + x[:, m:]
        return -0.5 * jnp.einsum("bi,ij,bj->b", dens, v, dens)


# ---------------------------------------------------------------------------- fast updates
def determinant_fast_updates(space: FermionSpace, phi_up, phi_dn) -> FastUpdates:
    """Sherman-Morrison updates of a Slater determinant for proposals that move one electron of
    one spin (a hop: two changed spin-orbitals of the same spin, one emptied and one filled).

    Cache (sample axis leading): ``x`` (B, P), the inverse matrices ``inv_up`` (B, N↑, N↑) and
    ``inv_dn`` (B, N↓, N↓), and ``rows`` (B, P) the row of each occupied spin-orbital in its
    matrix. Each spin may see one hop per proposal (a :class:`~psiloom.fermions.SpinExchange`
    moves one up and one down electron); proposals that change nothing give Δ = 0. Any other
    change (two electrons of one spin moved) gets Δ = −inf (never accepted): use the generic
    path (``fast=False``) with such moves.
    """
    m, n_up, n_dn = space.n_orbitals, space.n_up, space.n_down
    phis = (phi_up, phi_dn)
    dtype = phi_up.dtype

    def init(x):
        rows_up, rows_dn = occupied_orbitals(x, m, n_up, n_dn)
        inv = []
        for phi, rows in zip(phis, (rows_up, rows_dn)):
            mats = phi[rows]
            inv.append(jnp.linalg.inv(mats) if mats.shape[-1] else mats)
        pos = jnp.zeros(x.shape, jnp.int32)
        b = jnp.arange(x.shape[0])[:, None]
        pos = pos.at[b, rows_up].set(jnp.arange(n_up, dtype=jnp.int32)[None, :])
        if n_dn:
            pos = pos.at[b, rows_dn + m].set(jnp.arange(n_dn, dtype=jnp.int32)[None, :])
        return {"x": x, "rows": pos, "inv_up": inv[0], "inv_dn": inv[1]}

    def update(old, cache, sites, new):
        x = cache["x"]
        b, p = x.shape
        if sites.ndim == 1:
            sites = jnp.broadcast_to(sites, (b, sites.shape[0]))
        valid = sites >= 0
        idx = jnp.where(valid, sites, 0)
        changed = valid & (old != new)
        rows_all = jnp.arange(b)
        log_ratio = jnp.zeros(b, dtype=jnp.result_type(dtype, jnp.complex64))
        ok = jnp.ones(b, dtype=bool)
        out = dict(cache)
        orbital = jnp.arange(p)[None, :]
        for spin, (phi, name) in enumerate(zip(phis, ("inv_up", "inv_dn"))):
            inv = cache[name]
            n = inv.shape[-1]
            here = changed & ((idx // m) == spin)
            count = jnp.sum(here, axis=1)
            if n == 0:
                ok &= count == 0
                continue
            # the emptied (src) and the filled (dst) spin-orbital of this spin's hop
            src = jnp.max(jnp.where(here & (old > 0.5), idx, -1), axis=1)
            dst = jnp.max(jnp.where(here & (new > 0.5), idx, -1), axis=1)
            hop = (count == 2) & (src >= 0) & (dst >= 0)
            ok &= hop | (count == 0)
            src, dst = jnp.where(hop, src, spin * m), jnp.where(hop, dst, spin * m)
            k = jnp.clip(cache["rows"][rows_all, src], 0, n - 1)  # row of the moving electron
            lo, hi = jnp.minimum(src, dst), jnp.maximum(src, dst)
            between = jnp.sum(jnp.where((orbital > lo[:, None]) & (orbital < hi[:, None]), x, 0.0), axis=1)
            new_row = phi[dst - spin * m]  # (B, N)
            u = jnp.einsum("bn,bnk->bk", new_row, inv)  # new_row · A⁻¹
            ratio = u[rows_all, k] * (1.0 - 2.0 * jnp.mod(between, 2.0))
            # A'⁻¹ = A⁻¹ − A⁻¹ e_k (u − e_k)ᵀ / u_k   (row k of A replaced by new_row)
            col = inv[rows_all, :, k]
            e_k = jax.nn.one_hot(k, n, dtype=inv.dtype)
            inv_new = inv - col[:, :, None] * (u - e_k)[:, None, :] / u[rows_all, k][:, None, None]
            safe = jnp.where(hop, ratio, 1.0)
            log_ratio = log_ratio + jnp.log(jnp.abs(safe)) + jnp.where(safe < 0, 1j * jnp.pi, 0.0)
            out[name] = jnp.where(hop[:, None, None], inv_new, inv)
            out["rows"] = out["rows"].at[rows_all, dst].set(jnp.where(hop, k, out["rows"][rows_all, dst]))
        delta = jnp.where(ok, log_ratio, -jnp.inf)
        kept = jnp.take_along_axis(x, idx, 1)
        out["x"] = x.at[rows_all[:, None], idx].set(jnp.where(valid & ok[:, None], new, kept))
        for key in ("inv_up", "inv_dn", "rows"):
            out[key] = jnp.where(ok.reshape((b,) + (1,) * (out[key].ndim - 1)), out[key], cache[key])
        return delta, out

    return FastUpdates(init, update)
