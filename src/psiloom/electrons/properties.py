"""One-electron properties with error bars: densities, the dipole moment, energy differences.

All estimators average a per-sample quantity over samples x of |ψ|² given as
``(n_time, n_chains, N, 3)`` (bohr), with the autocorrelation-corrected error of
:func:`psiloom.stats.estimate`.

Radial density about a centre c (atoms): with bin edges r_0 < r_1 < … (bohr),

    ρ(r̄_k) = ⟨Σ_i 1[r_k ≤ |r_i − c| < r_{k+1}]⟩ / V_k,      V_k = 4π (r_{k+1}³ − r_k³) / 3,

the spherically averaged density in electrons per bohr³, so Σ_k V_k ρ_k = N when the bins
cover all electrons.

Axial density of a diatomic (along the line from nucleus A to nucleus B, unit vector n):
the density integrated over planes perpendicular to the axis,

    λ(s̄_k) = ⟨Σ_i 1[s_k ≤ (r_i − R_A)·n < s_{k+1}]⟩ / (s_{k+1} − s_k)      (electrons per bohr).

Dipole moment (atomic units, e·bohr; 1 e·bohr = 2.541746 D, CODATA, from memory):

    μ = Σ_I Z_I R_I − ⟨Σ_i r_i⟩,

independent of the origin for a neutral system.

Where the local-energy variance comes from (:func:`local_energy_spread`): each sample is
labelled by its closest coalescence, d(x) = min_{i,I} |r_i − R_I| (``by="nucleus"``) or
min_{i<j} |r_i − r_j| (``by="pair"``), and binned by d with edges d_0 < d_1 < …; bin k reports
its share of the samples, its mean local energy and its share of the total spread,

    s_k = Σ_{x: d_k ≤ d(x) < d_{k+1}} (E_L(x) − Ē)² / Σ_x (E_L(x) − Ē)²,

with Ē the mean over all samples. A share far above the bin's share of samples points to the
region where the trial state is worst (e.g. a cusp or the core).

Energy differences (bond curves, ionisation energies): for two series of local energies
E_a(t, c), E_b(t, c) drawn from the *same* chains at the same times (correlated sampling) the
difference series E_a − E_b is estimated directly, which counts their covariance; for
independent runs the errors add in quadrature, σ² = σ_a² + σ_b².
"""

from __future__ import annotations

from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from psiloom import stats
from psiloom.electrons.system import Molecule

#: debye per atomic unit of dipole moment (e·bohr) (CODATA 2018, from memory).
DEBYE_PER_AU = 2.541746473


class Profile(NamedTuple):
    """A binned density: bin centres, edges, values and their standard errors."""

    centres: np.ndarray
    edges: np.ndarray
    values: np.ndarray
    errors: np.ndarray


class Difference(NamedTuple):
    """An energy difference ``a − b`` (hartree) with its standard error."""

    value: float
    error: float
    correlated: bool  # True: estimated from paired samples (covariance included)

    def format(self) -> str:
        """The difference in parenthesis notation, e.g. ``0.19812(43)`` (hartree)."""
        return stats.parenthesis_notation(self.value, self.error)

    def __str__(self) -> str:
        return self.format()


def _check_samples(samples, n_electrons: int | None = None):
    samples = np.asarray(samples)
    if samples.ndim != 4 or samples.shape[-1] != 3:
        raise ValueError(f"samples must have shape (n_time, n_chains, n_electrons, 3), got {samples.shape}")
    if n_electrons is not None and samples.shape[2] != n_electrons:
        raise ValueError(f"samples hold {samples.shape[2]} electrons, the system has {n_electrons}")
    if samples.shape[0] * samples.shape[1] == 0:
        raise ValueError(f"samples are empty: shape {samples.shape}")
    return samples


def check_edges(edges, name: str = "edges", nonnegative: bool = False) -> np.ndarray:
    """Validated bin edges: a 1-d, finite, strictly increasing array of at least two values."""
    try:
        edges = np.asarray(edges, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be numbers (bohr), got {edges!r}") from None
    if edges.ndim != 1 or edges.size < 2:
        raise ValueError(f"{name} must be a 1-d grid of at least two bin edges (bohr), got shape {edges.shape}")
    if not np.all(np.isfinite(edges)):
        raise ValueError(f"{name} must be finite, got {edges.tolist()}")
    if np.any(np.diff(edges) <= 0):
        raise ValueError(f"{name} must increase strictly, got {edges.tolist()}")
    if nonnegative and edges[0] < 0:
        raise ValueError(f"{name} of a radial grid must be ≥ 0, got {edges[0]}")
    return edges


def _binned(values, edges, widths, per_sample_shape):
    """Estimates of per-sample bin counts / widths; ``values`` ``(T, C, N)`` positions."""
    t, c = per_sample_shape
    idx = np.digitize(values, edges) - 1  # bin of each electron, −1 or n_bins outside
    n_bins = edges.size - 1
    counts = np.zeros((t, c, n_bins))
    for k in range(n_bins):
        counts[..., k] = np.sum(idx == k, axis=-1)
    est = _estimate_columns(counts / widths)
    return np.asarray(est.mean, dtype=np.float64), np.asarray(est.error, dtype=np.float64)


def _estimate_columns(values) -> stats.Estimate:
    """:func:`psiloom.stats.estimate` of each column of ``(T, C, K)`` values (fields of shape ``(K,)``).

    One column at a time (``lax.map``, not ``vmap``): the estimate's autocorrelation of all K
    columns at once asked for 29.5 GB on 2²⁴ He samples with 20 bins."""
    return jax.lax.map(stats.estimate, jnp.moveaxis(jnp.asarray(values), 2, 0))


def radial_density(samples, edges, centre=(0.0, 0.0, 0.0)) -> Profile:
    """Spherically averaged one-electron density ρ(r) about ``centre`` (module docstring)."""
    samples = _check_samples(samples)
    edges = check_edges(edges, "radial edges", nonnegative=True)
    centre = np.asarray(centre, dtype=np.float64)
    if centre.shape != (3,) or not np.all(np.isfinite(centre)):
        raise ValueError(f"centre must be a finite 3-vector (bohr), got {centre!r}")
    r = np.linalg.norm(samples - centre, axis=-1)
    volumes = 4.0 * np.pi * (edges[1:] ** 3 - edges[:-1] ** 3) / 3.0
    values, errors = _binned(r, edges, volumes, samples.shape[:2])
    return Profile(0.5 * (edges[1:] + edges[:-1]), edges, values, errors)


def axial_density(samples, system: Molecule, edges, nuclei: tuple[int, int] = (0, 1)) -> Profile:
    """Density integrated over planes perpendicular to the axis from nucleus ``nuclei[0]``
    (s = 0) toward ``nuclei[1]``, per bohr of axis (module docstring)."""
    if system.n_nuclei < 2:
        raise ValueError(f"an axial density needs two nuclei, {system.formula} has {system.n_nuclei}")
    a, b = nuclei
    if not (0 <= a < system.n_nuclei and 0 <= b < system.n_nuclei and a != b):
        raise ValueError(f"nuclei must be two different indices below {system.n_nuclei}, got {nuclei!r}")
    samples = _check_samples(samples, system.n_electrons)
    edges = check_edges(edges, "axial edges")
    axis = system.positions[b] - system.positions[a]
    axis = axis / np.linalg.norm(axis)
    s = np.einsum("tcix,x->tci", samples - system.positions[a], axis)
    values, errors = _binned(s, edges, np.diff(edges), samples.shape[:2])
    return Profile(0.5 * (edges[1:] + edges[:-1]), edges, values, errors)


def dipole_moment(samples, system: Molecule) -> stats.Estimate:
    """Dipole moment μ = Σ Z_I R_I − ⟨Σ_i r_i⟩ (e·bohr): an Estimate with 3 components."""
    samples = _check_samples(samples, system.n_electrons)
    nuclear = np.sum(system.charges[:, None] * system.positions, axis=0)
    per_sample = nuclear - np.sum(samples, axis=2)  # (T, C, 3)
    return _estimate_columns(per_sample)


class Spread(NamedTuple):
    """Local-energy spread binned by the closest coalescence (:func:`local_energy_spread`)."""

    edges: np.ndarray  # bin edges (bohr)
    fraction: np.ndarray  # share of the samples in each bin
    mean: np.ndarray  # mean local energy in each bin (hartree; NaN where empty)
    share: np.ndarray  # share of Σ (E_L − Ē)² from each bin
    outside: float  # share of Σ (E_L − Ē)² from samples outside the edges
    variance: float  # variance of all local energies (hartree²)


def local_energy_spread(samples, local_energies, system: Molecule, edges, by: str = "nucleus") -> Spread:
    """Bin the local energies by the closest electron–nucleus or electron–electron distance.

    Args:
        samples: ``(n_time, n_chains, N, 3)`` configurations (bohr).
        local_energies: ``(n_time, n_chains)`` their local energies (hartree; real part used).
        system: the molecule.
        edges: bin edges of the distance (bohr).
        by: ``"nucleus"`` (min_{i,I} |r_i − R_I|) or ``"pair"`` (min_{i<j} |r_i − r_j|).
    """
    samples = _check_samples(samples, system.n_electrons)
    edges = check_edges(edges, "spread edges", nonnegative=True)
    energies = np.real(np.asarray(local_energies)).astype(np.float64)
    if energies.shape != samples.shape[:2]:
        raise ValueError(f"local_energies must have shape {samples.shape[:2]} (n_time, n_chains), got {energies.shape}")
    if not np.all(np.isfinite(energies)):
        raise ValueError("local energies must be finite")
    if by == "nucleus":
        d = np.linalg.norm(samples[..., :, None, :] - system.positions, axis=-1).min(axis=(-2, -1))
    elif by == "pair":
        if system.n_electrons < 2:
            raise ValueError(f"by='pair' needs two electrons or more, {system.formula} has {system.n_electrons}")
        diff = np.linalg.norm(samples[..., :, None, :] - samples[..., None, :, :], axis=-1)
        upper = np.triu(np.ones((system.n_electrons,) * 2, bool), k=1)
        d = diff[..., upper].min(axis=-1)
    else:
        raise ValueError(f"by must be 'nucleus' or 'pair', got {by!r}")
    d, energies = d.ravel(), energies.ravel()
    squares = (energies - energies.mean()) ** 2
    total = squares.sum()
    idx = np.digitize(d, edges) - 1
    n_bins = edges.size - 1
    inside = (idx >= 0) & (idx < n_bins)
    counts = np.bincount(idx[inside], minlength=n_bins)
    sums = np.bincount(idx[inside], weights=energies[inside], minlength=n_bins)
    shares = np.bincount(idx[inside], weights=squares[inside], minlength=n_bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
        share = shares / total if total > 0 else np.zeros(n_bins)
        outside = float(squares[~inside].sum() / total) if total > 0 else 0.0
    return Spread(edges, counts / d.size, mean, share, outside, float(total / d.size))


def energy_difference(a, b) -> Difference:
    """``a − b`` with its error (hartree).

    ``a`` and ``b`` are either local-energy series ``(n_time, n_chains)`` drawn from the same
    chains at the same times (correlated: the difference series is estimated, covariance
    included) or :class:`psiloom.stats.Estimate` objects of independent runs (quadrature).
    """
    if isinstance(a, stats.Estimate) and isinstance(b, stats.Estimate):
        value = float(np.real(np.asarray(a.mean))) - float(np.real(np.asarray(b.mean)))
        return Difference(value, float(np.hypot(float(a.error), float(b.error))), False)
    a, b = np.asarray(a), np.asarray(b)
    if a.ndim != 2 or a.shape != b.shape:
        raise ValueError("energy_difference needs two Estimates (independent runs) or two local-energy series "
                         f"of equal shape (n_time, n_chains) from shared chains, got shapes {a.shape} and {b.shape}")
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))):
        raise ValueError("local energies must be finite")
    est = stats.estimate(jnp.asarray(np.real(a - b)))
    return Difference(float(np.real(np.asarray(est.mean))), float(np.asarray(est.error)), True)
