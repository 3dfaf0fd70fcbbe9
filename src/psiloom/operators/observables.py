"""Observables of lattice spin states with error bars, all measured on the same Monte Carlo samples.

Every quantity here is the mean of per-sample *local values* (``psiloom.operators.local``)
over samples ``x ∼ |ψ|²``; errors, autocorrelation times and R̂ come from
:func:`psiloom.stats.estimate`. Samples must keep the Markov-chain layout of
:meth:`psiloom.sampling.MetropolisChains.sample`: shape ``(n_time, n_chains, n_sites)``, with
``log ψ`` of shape ``(n_time, n_chains)`` when already known.

Conventions (spin-1/2 operators ``S = σ/2``, ``ħ = 1``):

* magnetisation per site ``m = (1/N) Σ_i Sᶻ_i`` and its square ``m² = (1/N²)(Σ_i Sᶻ_i)²``;
  staggered ``m_s = (1/N) Σ_i ε_i Sᶻ_i`` with ``ε_i = ±1`` on the two sublattices, and ``m_s²``;
* spin correlations by displacement ``r``,
  ``C(r) = (1/N) Σ_i ⟨S_i · S_{i+r}⟩`` (so ``C(0) = 3/4``), or one component
  ``C_aa(r) = (1/N) Σ_i ⟨S^a_i S^a_{i+r}⟩`` (a = x, y, z), also averaged over shells of equal
  minimum-image distance ``|r|``; on open lattices ``C(r)`` averages the ``N_r`` pairs that
  exist and the shells use plain distances;
* static structure factor on all lattice momenta ``q`` (:func:`psiloom.symmetry.momenta`),
  ``S(q) = (1/N) Σ_{ij} e^{iq·(r_i − r_j)} ⟨S_i·S_j⟩ = Σ_r cos(q·r) C(r)``, obeying the sum rule
  ``(1/N) Σ_q S(q) = C(0) = ⟨S_i·S_i⟩ = 3/4`` and ``S(0) = S_tot(S_tot + 1)/N``;
* energy variance ``Var E = ⟨|E_loc − E|²⟩`` and the V-score (Wu et al., Science 2024)
  ``V = N · Var E / (E − E_∞)²`` with ``E_∞ = Tr H / dim`` the infinite-temperature energy
  over the configuration space used (a fixed-magnetisation sector changes it).

Marshall sign rule: a state optimised for a Hamiltonian built with ``marshall_basis=True`` lives in
the rotated basis ``U = Π_{i∈B} σᶻ_i``. Pass ``marshall_basis=True`` here too; then ``S_i·S_j`` on
pairs joining the two sublattices is rotated the same way (``SˣSˣ + SʸSʸ → −(…)``), giving the
correlations of the physical, unrotated state. Diagonal observables are unaffected.
"""

from __future__ import annotations

from math import comb
from typing import Any, Callable, Mapping, NamedTuple, Sequence

import jax
import jax.numpy as jnp
import numpy as np

from psiloom import stats
from psiloom._validation import one_of
from psiloom.batching import map_in_chunks
from psiloom.lattices import Lattice
from psiloom.operators.local import check_spin_configurations
from psiloom.operators.models import magnetization_z, staggered_magnetization_z
from psiloom.operators.pauli import PauliSum, pauli, total
from psiloom.spaces import SpinSpace
from psiloom.symmetry import momenta as lattice_momenta

__all__ = [
    "measure", "local_value_table", "correlation_operators", "spin_correlations", "SpinCorrelations", "COMPONENTS",
    "magnetizations", "energy_statistics", "EnergyStatistics", "infinite_temperature_energy", "v_score",
    "operator_scale",
]

LogAmplitudeFn = Callable[[jax.Array], jax.Array]


# ---------------------------------------------------------------------- plumbing
def _check_samples(samples, log_amps):
    check_spin_configurations(samples, "samples")  # concrete samples only (not under jit)
    x = jnp.asarray(samples)
    if x.ndim != 3:
        raise ValueError(
            f"samples must have shape (n_time, n_chains, n_sites) as returned by the sampler, got {x.shape}"
        )
    if log_amps is not None:
        log_amps = jnp.asarray(log_amps)
        if log_amps.shape != x.shape[:2]:
            raise ValueError(f"log_amps must have shape {x.shape[:2]} (n_time, n_chains), got {log_amps.shape}")
    return x, log_amps


class _Stacked:
    """Several operators viewed as one: concatenated connections and an assignment matrix, so
    that one evaluation of ``log ψ`` on all connected configurations serves every operator."""

    def __init__(self, operators, n_sites: int):
        self.operators = list(operators)
        if not self.operators:
            raise ValueError("need at least one operator")
        for op in self.operators:
            if getattr(op, "n_sites", n_sites) != n_sites:
                raise ValueError(f"operator acts on {op.n_sites} sites, the samples have {n_sites}")
        sizes = [int(op.n_connections) for op in self.operators]
        self.n_connections = sum(sizes)
        assign = np.zeros((self.n_connections, len(sizes)))
        assign[np.arange(self.n_connections), np.repeat(np.arange(len(sizes)), sizes)] = 1.0
        self.assign = assign

    def local_block(self, log_amplitude, x, log_amp_x):
        conns, mels = zip(*(op.connections(x) for op in self.operators))
        dtype = jnp.result_type(*[m.dtype for m in mels])
        x_conn = jnp.concatenate(conns, axis=1)  # (B, ΣG, N)
        mels = jnp.concatenate([m.astype(dtype) for m in mels], axis=1)
        b, g, n = x_conn.shape
        log_conn = log_amplitude(x_conn.reshape(b * g, n)).reshape(b, g)
        ratio = jnp.exp(log_conn - log_amp_x[:, None])
        terms = jnp.where(mels != 0, mels * ratio, 0)
        return terms @ jnp.asarray(self.assign, dtype=jnp.real(terms).dtype)  # (B, K)


#: Default bound on connected configurations held at once (entries of the (chunk, ΣG, N) batch).
_MAX_ENTRIES = 1 << 24


def local_value_table(log_amplitude: LogAmplitudeFn, operators, samples, log_amps=None, chunk: int | None = None):
    """Local values of several operators on the same samples: ``(n_time, n_chains, n_ops)``.

    ``O_loc(x) = Σ_x' ⟨x|O|x'⟩ ψ(x')/ψ(x)`` exactly as :func:`psiloom.operators.local.local_estimates`,
    for all operators at once: their connected configurations are concatenated so that
    ``log ψ`` is evaluated in one call (one compilation) and ``log ψ(x)`` is shared. Without
    ``chunk``, samples are processed in chunks holding at most ~16 M configuration entries.
    """
    x, log_amps = _check_samples(samples, log_amps)
    t, c, n = x.shape
    stacked = _Stacked(operators, n)
    if chunk is None:
        chunk = max(1, _MAX_ENTRIES // max(1, stacked.n_connections * n))

    @jax.jit
    def table(flat, logs):
        if logs is None:
            logs = map_in_chunks(log_amplitude, chunk, flat)
        return map_in_chunks(lambda xs, ls: stacked.local_block(log_amplitude, xs, ls), chunk, flat, logs)

    logs = None if log_amps is None else log_amps.reshape(-1)
    return table(x.reshape(t * c, n), logs).reshape(t, c, len(stacked.operators))


_estimate_columns = jax.vmap(stats.estimate, in_axes=(2, 0))


def operator_scale(operator) -> float:
    """``Σ_t |c_t|``, the size of the terms a PauliSum's local value is summed from (0 for other
    operators). Its local values carry rounding noise of about eps times this, so
    :func:`psiloom.stats.estimate` treats values equal within ``TIE_RTOL`` of it as ties; e.g.
    m², exactly 0 in the Sᶻ = 0 sector, is then constant instead of showing a spurious R̂."""
    terms = getattr(operator, "terms", None)
    if not isinstance(terms, dict):
        return 0.0
    return float(sum(abs(c) for c in terms.values()))


def _estimates(table, scales=None) -> stats.Estimate:
    """Estimate of every column of a ``(n_time, n_chains, K)`` table (Estimate fields of shape (K,)).

    ``scales``: per-column size of the summed terms (:func:`operator_scale`), default 0.
    """
    scales = np.zeros(table.shape[2]) if scales is None else np.asarray(scales, dtype=float)
    est = _estimate_columns(table, jnp.asarray(scales, dtype=jnp.real(table).dtype))
    return est._replace(n_time=table.shape[0])


def measure(log_amplitude: LogAmplitudeFn, operators: Mapping[str, Any], samples, log_amps=None,
            chunk: int | None = None) -> dict[str, stats.Estimate]:
    """Expectation values with error bars of named operators from the same samples.

    Args:
        log_amplitude: batched ``log ψ``, ``(B, N) -> (B,)``.
        operators: ``{name: operator}``; anything with ``connections`` (e.g. a PauliSum).
        samples: ``(n_time, n_chains, n_sites)`` Markov-chain samples of ``|ψ|²``.
        log_amps: ``log ψ`` of the samples, ``(n_time, n_chains)`` (saves one evaluation).
        chunk: evaluate at most this many samples at a time.
    Returns:
        ``{name: Estimate}`` (complex means for non-Hermitian operators or complex ψ).
    """
    names = list(operators)
    ops = [operators[k] for k in names]
    table = local_value_table(log_amplitude, ops, samples, log_amps, chunk)
    est = _estimates(table, [operator_scale(op) for op in ops])
    return {name: jax.tree_util.tree_map(lambda a, k=k: a[k] if np.ndim(a) else a, est)
            for k, name in enumerate(names)}


# ---------------------------------------------------------------------- magnetisations
def magnetizations(log_amplitude: LogAmplitudeFn, lattice: Lattice, samples, log_amps=None,
                   chunk: int | None = None) -> dict[str, stats.Estimate]:
    """``m``, ``m²`` and (bipartite lattices) ``m_s``, ``m_s²`` per site, see module docstring.

    Keys: ``"m"``, ``"m2"``, ``"m_stag"``, ``"m_stag2"``.
    """
    n = lattice.n_sites
    mz = magnetization_z(n) / n
    ops = {"m": mz, "m2": mz * mz}
    if lattice.is_bipartite:
        ms = staggered_magnetization_z(lattice) / n
        ops.update(m_stag=ms, m_stag2=ms * ms)
    return measure(log_amplitude, ops, samples, log_amps, chunk)


# ---------------------------------------------------------------------- correlations
#: Components of the spin correlation — the full S_i·S_j or one of its diagonal parts S^a_i S^a_j.
COMPONENTS = ("all", "xx", "yy", "zz")


def _pair_operator(n: int, i: int, j: int, coef: float, flip_xy: bool, component: str = "all") -> PauliSum:
    letters = "XYZ" if component == "all" else component[0].upper()
    return total([pauli(n, a + a, (i, j), (-1.0 if flip_xy and a in "XY" else 1.0) * coef) for a in letters], n)


def correlation_operators(lattice: Lattice, marshall_basis: bool = False,
                          component: str = "all") -> tuple[np.ndarray, list[PauliSum]]:
    """``(displacements, operators)`` for the spin correlation by displacement ``r``.

    ``component="all"``: ``C(r) = (1/N_r) Σ_i S_i·S_{i+r}`` (so ``C(0) = 3/4``);
    ``"xx"``, ``"yy"``, ``"zz"``: ``C_aa(r) = (1/N_r) Σ_i S^a_i S^a_{i+r}`` (``C_aa(0) = 1/4``).
    The sum runs over the ``N_r`` sites ``i`` whose partner ``i + r`` lies on the lattice:
    all ``N`` sites on a periodic lattice, ``Π_a (L_a − r_a)`` on an open one (where ``C(r)`` is
    the average over the pairs that exist and is not translation invariant).

    Displacement ``k`` is ``coords[k]`` (so ``k = 0`` is ``r = 0``): on an open lattice these
    are the displacements with non-negative components (in 2-D, directions such as
    ``(1, −1)`` are not included). With ``marshall_basis`` the exchange (xx, yy) part of pairs
    joining the two sublattices changes sign (see module docstring).
    """
    if not isinstance(lattice, Lattice):
        raise ValueError(f"expected a psiloom Lattice, got {lattice!r}")
    component = one_of("component", component, COMPONENTS)
    if marshall_basis and not lattice.is_bipartite:
        raise ValueError(f"marshall_basis=True needs a bipartite lattice; {lattice!r} is not bipartite")
    n = lattice.n_sites
    coords = lattice.coords
    dims = np.asarray(lattice.shape)
    per_component = 0.75 if component == "all" else 0.25
    ops = []
    sublattice = lattice.sublattice
    for r in coords:
        starts: Sequence[int]
        if lattice.periodic:
            starts = range(n)
        else:
            starts = [i for i in range(n) if np.all(coords[i] + r < dims)]
        weight = 1.0 / len(starts)
        terms = []
        for i in starts:
            j = lattice.site_index(*(coords[i] + r))
            if i == j:
                terms.append(PauliSum.identity(n, per_component * weight))
                continue
            flip = bool(marshall_basis and sublattice is not None and sublattice[i] != sublattice[j])
            terms.append(_pair_operator(n, i, j, 0.25 * weight, flip, component))
        ops.append(total(terms, n))
    return coords.copy(), ops


def _minimum_image(lattice: Lattice, displacements: np.ndarray) -> np.ndarray:
    if not lattice.periodic:
        return np.sqrt(np.sum(displacements.astype(float) ** 2, axis=-1))
    ext = np.asarray(lattice.shape)
    d = np.mod(displacements, ext)
    d = np.minimum(d, ext - d)
    return np.sqrt(np.sum(d.astype(float) ** 2, axis=-1))


class SpinCorrelations(NamedTuple):
    """Spin correlations and the structure factor measured on one set of samples.

    Attributes:
        displacements: ``(N, dim)`` integer displacement vectors ``r``.
        correlation: :class:`~psiloom.stats.Estimate` of ``C(r)``, fields of shape ``(N,)``.
        distances: ``(K,)`` distinct distances ``|r|`` (minimum image when periodic; ascending).
        shell: Estimate of the shell average of ``C(r)`` over ``|r| = distances[k]``, ``(K,)``.
        momenta: ``(N, dim)`` lattice momenta ``q`` (``(0, dim)`` on open lattices).
        structure_factor: Estimate of ``S(q)``, fields of shape ``(N,)`` (``None`` on open
            lattices, which have no lattice momenta).
        component: ``"all"`` (S·S) or ``"xx"``, ``"yy"``, ``"zz"``.
    """

    displacements: np.ndarray
    correlation: stats.Estimate
    distances: np.ndarray
    shell: stats.Estimate
    momenta: np.ndarray
    structure_factor: stats.Estimate | None
    component: str = "all"


def spin_correlations(log_amplitude: LogAmplitudeFn, lattice: Lattice, samples, log_amps=None,
                      marshall_basis: bool = False, chunk: int | None = None,
                      component: str = "all") -> SpinCorrelations:
    """``C(r)`` for all displacements, its shell averages, and ``S(q)`` on all lattice momenta.

    All come from one table of local values ``C_loc(r; x)``; the per-sample
    ``S_loc(q; x) = Σ_r cos(q·r) C_loc(r; x)`` and shell averages are formed before
    estimating, so their error bars account for correlations between displacements.
    ``component`` selects ``S·S`` (``"all"``) or one part ``S^a S^a`` (``"xx"``, ``"yy"``,
    ``"zz"``; then ``S(q)`` is the structure factor of that component). On an open lattice
    ``C(r)`` averages the pairs that exist (:func:`correlation_operators`), shells use plain
    distances and there is no ``S(q)``.
    """
    disp, ops = correlation_operators(lattice, marshall_basis, component)
    table = jnp.real(local_value_table(log_amplitude, ops, samples, log_amps, chunk))  # (T, C, N)
    scales = np.array([operator_scale(op) for op in ops])
    if lattice.periodic:
        q = lattice_momenta(lattice)
        phase = np.cos(q @ disp.T)  # (n_q, n_r)
        sq = table @ jnp.asarray(phase.T, dtype=table.dtype)
        structure = _estimates(sq, np.abs(phase) @ scales)
    else:
        q = np.zeros((0, lattice.dim))
        structure = None
    dist = _minimum_image(lattice, disp)
    rounded = np.round(dist, 10)
    distances, shell_of = np.unique(rounded, return_inverse=True)
    weights = np.zeros((len(disp), len(distances)))
    weights[np.arange(len(disp)), shell_of] = 1.0
    weights /= weights.sum(axis=0, keepdims=True)
    shells = table @ jnp.asarray(weights, dtype=table.dtype)
    return SpinCorrelations(disp, _estimates(table, scales), distances, _estimates(shells, weights.T @ scales),
                            q, structure, component)


# ---------------------------------------------------------------------- energy variance and V-score
def _z_string_average(k: int, n: int, n_up: int | None) -> float:
    """Mean of ``Π_{i∈m} x_i`` over all configurations of the space, ``|m| = k``."""
    if k == 0:
        return 1.0
    if n_up is None:
        return 0.0
    n_down = n - n_up
    total_ = comb(n, n_down)
    acc = 0
    for j in range(max(0, n_down - (n - k)), min(k, n_down) + 1):  # j of the k sites down
        acc += (-1) ** j * comb(k, j) * comb(n - k, n_down - j)
    return acc / total_


def infinite_temperature_energy(operator: PauliSum, space: SpinSpace | None = None) -> float:
    """``E_∞ = Tr O / dim`` over ``space`` (default: all ``2^N`` configurations).

    Only Pauli strings of Z letters have diagonal elements; on a fixed-magnetisation sector
    with ``n_up`` up spins a Z string on ``k`` sites averages to
    ``Σ_j (−1)^j C(k, j) C(N − k, n_down − j) / C(N, n_down)``.
    """
    if not isinstance(operator, PauliSum):
        raise ValueError(f"infinite_temperature_energy needs a PauliSum, got {type(operator).__name__}")
    n = operator.n_sites
    if space is not None and space.n_sites != n:
        raise ValueError(f"space has {space.n_sites} sites, the operator acts on {n}")
    n_up = None if space is None else space.n_up
    acc: complex = 0.0
    for string, coef in operator.terms.items():
        if all(letter == "Z" for _, letter in string):
            acc += coef * _z_string_average(len(string), n, n_up)
    return float(np.real(acc))


def v_score(energy: float, variance: float, n_sites: int, e_inf: float) -> float:
    """``V = N · Var E / (E − E_∞)²`` (Wu et al., Science 2024)."""
    if not n_sites >= 1:
        raise ValueError(f"n_sites must be >= 1, got {n_sites!r}")
    gap = float(energy) - float(e_inf)
    if gap == 0.0:
        raise ValueError("the energy equals E_∞: the V-score is undefined")
    return float(n_sites) * float(variance) / gap**2


class EnergyStatistics(NamedTuple):
    """Energy, its variance and the V-score from one set of samples.

    ``v_score_error`` propagates the errors of ``E`` and ``Var E`` to first order:
    ``δV = V · sqrt((δVar/Var)² + (2 δE/(E − E_∞))²)``.
    """

    energy: stats.Estimate
    variance: stats.Estimate
    e_inf: float
    v_score: float
    v_score_error: float
    n_sites: int


def energy_statistics(log_amplitude: LogAmplitudeFn, hamiltonian, samples, log_amps=None,
                      space: SpinSpace | None = None, e_inf: float | None = None,
                      chunk: int | None = None) -> EnergyStatistics:
    """Energy, energy variance (with error bar) and V-score from the same samples.

    ``E_∞`` is computed by :func:`infinite_temperature_energy` over ``space`` unless given.
    The variance estimate is the mean of ``|E_loc − Ē|²`` (its error treats Ē as fixed).
    """
    table = local_value_table(log_amplitude, [hamiltonian], samples, log_amps, chunk)[..., 0]
    energy = stats.estimate(table, scale=operator_scale(hamiltonian))
    dev = jnp.abs(table - energy.mean) ** 2
    variance = stats.estimate(dev)
    n = int(jnp.asarray(samples).shape[-1])
    if e_inf is None:
        e_inf = infinite_temperature_energy(hamiltonian, space)
    e = float(jnp.real(energy.mean))
    var = float(jnp.real(variance.mean))
    v = v_score(e, var, n, e_inf)
    rel_var = float(variance.error) / var if var > 0 else 0.0
    rel_gap = 2.0 * float(energy.error) / abs(e - e_inf)
    return EnergyStatistics(energy, variance, float(e_inf), v, abs(v) * float(np.hypot(rel_var, rel_gap)), n)
