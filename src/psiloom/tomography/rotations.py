"""Amplitudes in rotated local bases.

Measuring site i in the eigenbasis of σ^{b_i} (b ∈ {Z, X, Y}) with outcome s_i = ±1 projects on
the eigenvector |s_i⟩_b. With configurations x_i = ±1 in the σᶻ basis, the amplitude of the
outcome string s in the product basis b is

    ψ_b(s) = Σ_x Π_i U^{b_i}[s_i, x_i] ψ(x),        U^{b}[s, x] = ⟨s|_b x⟩,

with the single-site overlaps (rows s = +1, −1; columns x = +1, −1)

    U^Z = [[1, 0], [0, 1]],   U^X = [[1, 1], [1, −1]]/√2,   U^Y = [[1, −i], [1, i]]/√2,

from |±⟩_X = (|↑⟩ ± |↓⟩)/√2 and |±⟩_Y = (|↑⟩ ± i|↓⟩)/√2 (the eigenvectors of σˣ and σʸ with
eigenvalue ±1). U^Z is diagonal, so only the k non-Z sites of a shot are summed over: ψ_b(s)
is a sum of 2^k amplitudes of configurations that agree with s on the Z sites. Every U^b is
unitary, so Σ_s |ψ_b(s)|² = Σ_x |ψ(x)|² in every basis (the normaliser does not depend on b).

* :func:`rotate_vector` applies the rotation to a whole state vector (exact references).
* :func:`shot_tables` prepares, once per record, the non-Z sites of every shot and their
  overlap factors; :func:`rotated_log_amplitudes` then evaluates ``log ψ_b(s)`` of a trial
  state for a batch of shots at the cost of ``2^K`` evaluations per shot, K the largest number
  of non-Z sites in the record (shots with fewer are padded with factors 1 and 0).
"""

from __future__ import annotations

from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from psiloom.tomography.records import MeasurementRecord, basis_codes

_SQ = 1.0 / np.sqrt(2.0)
#: ⟨s|_b x⟩ indexed [basis code, outcome index (0: +1, 1: −1), x index (0: +1, 1: −1)].
OVERLAPS = np.array([
    [[1.0, 0.0], [0.0, 1.0]],
    [[_SQ, _SQ], [_SQ, -_SQ]],
    [[_SQ, -1j * _SQ], [_SQ, 1j * _SQ]],
], dtype=np.complex128)

#: Largest number of non-Z sites per shot that :func:`shot_tables` accepts (2^K evaluations per shot).
MAX_ROTATED_SITES = 12

__all__ = ["OVERLAPS", "MAX_ROTATED_SITES", "rotate_vector", "ShotTables", "shot_tables", "rotated_log_amplitudes"]


def rotate_vector(vector, bases) -> np.ndarray:
    """The amplitudes ``ψ_b(s)`` of a state vector in the product basis ``bases`` (a string).

    ``vector`` holds ψ over all ``2^N`` configurations in the order of
    ``SpinSpace(N).configurations()`` (site 0 most significant, up = 1); the result has the
    same order with outcomes in place of configurations (s_i = +1 where x_i = +1 was).
    """
    v = np.asarray(vector)
    if v.ndim != 1 or v.size < 2 or v.size & (v.size - 1):
        raise ValueError(f"a state vector over all configurations has 2^N entries, got shape {v.shape}")
    n = v.size.bit_length() - 1
    codes = basis_codes(bases, n)
    psi = v.astype(np.complex128).reshape((2,) * n)
    for site, code in enumerate(codes):
        if code == 0:
            continue
        # tensor index 1 is up (x = +1), 0 is down; OVERLAPS index 0 is +1
        u = OVERLAPS[code][::-1, ::-1]
        psi = np.moveaxis(np.tensordot(u, psi, axes=([1], [site])), 0, site)
    return psi.reshape(-1)


class ShotTables(NamedTuple):
    """Per-shot arrays for :func:`rotated_log_amplitudes` (leading axis: shots).

    outcomes: (S, N) float ±1; sites: (S, K) int32 non-Z sites padded with −1;
    factors: (S, K, 2) complex ⟨s_site|_b x⟩ for x = +1, −1 (padding: 1, 0).
    """

    outcomes: np.ndarray
    sites: np.ndarray
    factors: np.ndarray

    @property
    def n_rotated(self) -> int:
        return int(self.sites.shape[1])


def shot_tables(record: MeasurementRecord, n_rotated: int | None = None) -> ShotTables:
    """The :class:`ShotTables` of a record; ``n_rotated`` pads to at least that many slots."""
    if not isinstance(record, MeasurementRecord):
        raise TypeError(f"expected a MeasurementRecord, got {type(record).__name__}")
    k = record.max_rotated_sites()
    if n_rotated is not None:
        k = max(k, int(n_rotated))
    if k > MAX_ROTATED_SITES:
        raise ValueError(f"a shot measures {k} sites outside Z; the likelihood sums 2^{k} amplitudes per "
                         f"shot, more than the limit of 2^{MAX_ROTATED_SITES}")
    s, n = record.outcomes.shape
    sites = np.full((s, k), -1, np.int32)
    factors = np.zeros((s, k, 2), np.complex128)
    factors[:, :, 0] = 1.0
    rows, cols = np.nonzero(record.bases)  # row-major: rows ascending
    slots = np.arange(rows.size) - np.searchsorted(rows, rows)  # position of each entry within its row
    sites[rows, slots] = cols
    outcome_index = (record.outcomes[rows, cols] < 0).astype(np.int64)
    factors[rows, slots] = OVERLAPS[record.bases[rows, cols], outcome_index]
    return ShotTables(record.outcomes.astype(np.float64), sites, factors)


def rotated_log_amplitudes(log_amplitude, outcomes, sites, factors):
    """``log ψ_b(s)`` (complex) for a batch of shots given by :class:`ShotTables` arrays.

    ``log_amplitude``: batched ``log ψ``, ``(B, N) -> (B,)``. With K = 0 (only Z shots) this is
    ``log ψ(s)`` itself. Otherwise ``log ψ_b(s) = m + log Σ_c w_c e^{log ψ(x_c) − m}`` over the
    ``2^K`` assignments c of the non-Z sites (``m`` the largest ``Re log ψ`` with ``w_c ≠ 0``);
    an exactly vanishing sum gives ``−inf``.
    """
    outcomes = jnp.asarray(outcomes)
    k = sites.shape[-1]
    if k == 0:
        return log_amplitude(outcomes)
    b, n = outcomes.shape
    combos = 1 - 2 * ((jnp.arange(2**k)[:, None] >> jnp.arange(k)[None, :]) & 1)  # (C, K): ±1
    idx = jnp.where(sites >= 0, sites, n)  # padding writes into a dropped extra column
    padded = jnp.concatenate([outcomes, jnp.zeros((b, 1), outcomes.dtype)], axis=1)

    def configuration(c):
        x = padded.at[jnp.arange(b)[:, None], idx].set(c.astype(outcomes.dtype)[None, :])
        return x[:, :n]

    xs = jax.vmap(configuration)(combos)  # (C, B, N)
    logs = log_amplitude(xs.reshape(-1, n)).reshape(2**k, b)
    which = (combos < 0).astype(jnp.int32)  # (C, K): 0 for +1, 1 for −1
    w = jnp.prod(jnp.take_along_axis(factors[None, :, :, :], which[:, None, :, None], axis=-1)[..., 0], axis=-1)
    live = w != 0
    real = jnp.where(live, jnp.real(logs), -jnp.inf)
    m = jnp.max(real, axis=0)
    m = jnp.where(jnp.isfinite(m), m, 0.0)
    terms = jnp.where(live, w * jnp.exp(logs - m), 0.0)
    return m + jnp.log(jnp.sum(terms, axis=0))
