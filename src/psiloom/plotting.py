"""Plots that show how a run and its chains behave (matplotlib, an optional dependency).

* :func:`plot_energy_history` — energy per optimisation step with a ±1 standard-error band,
  optionally against an exact energy (or as the relative error |E − E₀|/|E₀| on a log axis).
* :func:`plot_trace` — an observable along each chain (time on the horizontal axis).
* :func:`plot_autocorrelation` — the normalised autocorrelation ρ(t) pooled over chains, with
  the integrated autocorrelation time τ = 1 + 2 Σ_{t=1}^{M} ρ(t) (Sokal window, see
  :mod:`psiloom.stats`) in the legend.
* :func:`plot_snapshots` — a strip of configurations along one chain: for a chain (or no
  lattice) an image with sites on the vertical axis and time on the horizontal one; for a
  square lattice a row of Lx × Ly images, one per snapshot.
* :func:`plot_configuration` — one configuration of a square lattice as an image.
* :func:`plot_learning_curve` — training and held-out negative log-likelihood per epoch of a
  state learned from shots (:mod:`psiloom.tomography`), with 1 − fidelity when recorded.

Spin values are drawn as +1 (up, σᶻ = +1) and −1 (down). Every function draws into ``ax``
(a new figure when omitted) and returns the Axes. matplotlib is imported only when a function
is called; without it, an ImportError says how to install it.
"""

from __future__ import annotations

import numpy as np

from psiloom import stats
from psiloom._validation import integer, nonnegative_int, positive_int

SPIN_CMAP = "coolwarm"  # −1 blue, +1 red


def _pyplot():
    try:
        import matplotlib.pyplot as plt
    except ImportError as err:  # pragma: no cover - depends on the environment
        raise ImportError(
            "psiloom.plotting needs matplotlib, an optional dependency: "
            "pip install matplotlib (or install psiloom with the 'plot' extra)"
        ) from err
    return plt


def _axes(ax):
    if ax is not None:
        return ax
    _, ax = _pyplot().subplots()
    return ax


def _column(history, name: str) -> np.ndarray:
    try:
        col = history[name]
    except (KeyError, TypeError, IndexError) as err:
        raise ValueError(f"history has no '{name}' column (expected a History or a mapping of columns)") from err
    return np.real(np.asarray(col)).astype(float)


def plot_energy_history(history, exact: float | None = None, ax=None, relative: bool = False,
                        label: str = "VMC", exact_label: str = "exact"):
    """Energy per step with a ±1 standard-error band, and the exact energy as a line.

    Args:
        history: a :class:`psiloom.train.History` or a mapping with ``step``, ``energy`` and
            ``error`` columns.
        exact: exact (or reference) energy E₀, drawn as a horizontal line.
        relative: plot |E − E₀|/|E₀| on a logarithmic axis instead (needs ``exact`` ≠ 0);
            the band then spans |E ± error − E₀|/|E₀|.
    """
    step, energy, error = (_column(history, k) for k in ("step", "energy", "error"))
    if not (len(step) == len(energy) == len(error)):
        raise ValueError(f"history columns differ in length: step {len(step)}, energy {len(energy)}, error {len(error)}")
    ax = _axes(ax)
    if relative:
        if exact is None or exact == 0:
            raise ValueError(f"relative=True needs a non-zero exact energy, got exact={exact!r}")
        scale = abs(exact)
        rel = np.abs(energy - exact) / scale
        lo = np.abs(energy - error - exact) / scale
        hi = np.abs(energy + error - exact) / scale
        ax.plot(step, rel, label=label)
        ax.fill_between(step, np.minimum(lo, hi), np.maximum(lo, hi), alpha=0.3, linewidth=0)
        ax.set_yscale("log")
        ax.set_ylabel("relative error |E − E₀|/|E₀|")
    else:
        ax.plot(step, energy, label=label)
        ax.fill_between(step, energy - error, energy + error, alpha=0.3, linewidth=0)
        if exact is not None:
            ax.axhline(exact, color="k", linestyle="--", linewidth=1, label=exact_label)
        ax.set_ylabel("energy")
    ax.set_xlabel("step")
    ax.legend()
    return ax


def _as_time_by_chain(values, name: str = "values") -> np.ndarray:
    arr = np.real(np.asarray(values))
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[0] < 1 or arr.shape[1] < 1:
        raise ValueError(f"{name} must have shape (n_time,) or (n_time, n_chains), got {np.shape(values)}")
    return arr


def plot_trace(values, ax=None, label: str = "observable", max_chains: int = 8):
    """Trace of an observable along each chain: one line per chain (at most ``max_chains``).

    Args:
        values: shape ``(n_time,)`` or ``(n_time, n_chains)``.
    """
    arr = _as_time_by_chain(values)
    max_chains = positive_int("max_chains", max_chains)
    ax = _axes(ax)
    t = np.arange(arr.shape[0])
    for c in range(min(arr.shape[1], max_chains)):
        ax.plot(t, arr[:, c], linewidth=0.8, label=f"chain {c}")
    ax.set_xlabel("sample along the chain")
    ax.set_ylabel(label)
    return ax


def plot_autocorrelation(values, ax=None, max_lag: int | None = None):
    """Autocorrelation ρ(t) of an observable, pooled over chains, for t = 0 … max_lag.

    The legend gives τ (Sokal window, :func:`psiloom.stats.integrated_autocorrelation_time`);
    ``max_lag`` defaults to min(n_time − 1, max(10, 5τ)).
    """
    arr = _as_time_by_chain(values)
    rho = np.asarray(stats.autocorrelation(arr))
    tau = float(stats.integrated_autocorrelation_time(arr))
    if max_lag is None:
        max_lag = int(min(arr.shape[0] - 1, max(10, np.ceil(5 * tau))))
    else:
        max_lag = nonnegative_int("max_lag", max_lag)
    max_lag = min(int(max_lag), arr.shape[0] - 1)
    ax = _axes(ax)
    lags = np.arange(max_lag + 1)
    ax.plot(lags, rho[: max_lag + 1], marker="o", markersize=3, label=f"ρ(t),  τ_int = {tau:.3g}")
    ax.axhline(0.0, color="k", linewidth=0.8)
    ax.set_xlabel("lag t (samples)")
    ax.set_ylabel("autocorrelation ρ(t)")
    ax.legend()
    return ax


def _lattice_image(x: np.ndarray, lattice) -> np.ndarray:
    """Values of one configuration on the (Ly, Lx) grid of a 2-D lattice (row = y, column = x)."""
    lx, ly = lattice.shape
    img = np.full((ly, lx), np.nan)
    img[lattice.coords[:, 1], lattice.coords[:, 0]] = x
    return img


def _check_square(lattice, n_sites: int):
    if getattr(lattice, "dim", None) != 2:
        raise ValueError(f"expected a 2-D (square) lattice, got {lattice!r}")
    if lattice.n_sites != n_sites:
        raise ValueError(f"configurations have {n_sites} sites, the lattice has {lattice.n_sites}")


def plot_configuration(x, lattice, ax=None):
    """One configuration of a square lattice as an Ly × Lx image (+1 red, −1 blue)."""
    x = np.real(np.asarray(x)).reshape(-1)
    _check_square(lattice, x.shape[0])
    ax = _axes(ax)
    ax.imshow(_lattice_image(x, lattice), cmap=SPIN_CMAP, vmin=-1, vmax=1, origin="lower", interpolation="nearest")
    ax.set_xlabel("x")
    ax.set_ylabel("y")
    return ax


def plot_snapshots(samples, lattice=None, chain: int = 0, every: int = 1, max_snapshots: int = 64, ax=None):
    """A strip of configurations along one chain.

    Args:
        samples: ``(n_time, n_chains, n_sites)`` (as returned by the samplers) or
            ``(n_time, n_sites)`` for a single chain.
        lattice: a 2-D lattice draws each snapshot as an Ly × Lx image, side by side
            (separated by a blank column); otherwise one image with sites vertically and
            time horizontally.
        chain: which chain to show.
        every: show every ``every``-th sample; at most ``max_snapshots`` are shown.
    """
    arr = np.real(np.asarray(samples))
    if arr.ndim == 2:
        arr = arr[:, None, :]
    if arr.ndim != 3:
        raise ValueError(f"samples must have shape (n_time, n_chains, n_sites) or (n_time, n_sites), got {np.shape(samples)}")
    for name, value, low in (("chain", chain, 0), ("every", every, 1), ("max_snapshots", max_snapshots, 1)):
        integer(name, value, minimum=low)
    if chain >= arr.shape[1]:
        raise ValueError(f"chain={chain} but samples hold {arr.shape[1]} chains")
    times = np.arange(0, arr.shape[0], every)[:max_snapshots]
    frames = arr[times, chain]  # (K, n_sites)
    ax = _axes(ax)
    if lattice is not None and getattr(lattice, "dim", 1) == 2:
        _check_square(lattice, arr.shape[2])
        tiles = []
        for k, frame in enumerate(frames):
            if k:
                tiles.append(np.full((lattice.shape[1], 1), np.nan))
            tiles.append(_lattice_image(frame, lattice))
        ax.imshow(np.concatenate(tiles, axis=1), cmap=SPIN_CMAP, vmin=-1, vmax=1, origin="lower",
                  interpolation="nearest")
        lx = lattice.shape[0]
        ax.set_xticks([k * (lx + 1) + (lx - 1) / 2 for k in range(len(times))])
        ax.set_xticklabels([str(t) for t in times])
        ax.set_yticks([])
        ax.set_xlabel("sample along the chain")
    else:
        if lattice is not None and lattice.n_sites != arr.shape[2]:
            raise ValueError(f"configurations have {arr.shape[2]} sites, the lattice has {lattice.n_sites}")
        ax.imshow(frames.T, cmap=SPIN_CMAP, vmin=-1, vmax=1, aspect="auto", origin="lower", interpolation="nearest",
                  extent=(times[0] - every / 2, times[-1] + every / 2, -0.5, arr.shape[2] - 0.5))
        ax.set_xlabel("sample along the chain")
        ax.set_ylabel("site")
    ax.set_title(f"chain {chain}")
    return ax


def plot_learning_curve(history, ax=None, columns=("train_nll", "validation_nll"), fidelity: bool = True):
    """Negative log-likelihood per epoch of :func:`psiloom.tomography.learn_from_shots` (and the
    infidelity 1 − F on a second, logarithmic axis when the history has a finite ``fidelity``).

    Args:
        history: a :class:`psiloom.history.History` (or mapping of columns) with ``step`` and the
            named ``columns``; columns that hold only NaN are skipped.
        fidelity: draw 1 − F when present.
    Returns:
        The Axes of the NLL curves.
    """
    step = _column(history, "step")
    ax = _axes(ax)
    drawn = 0
    for name in columns:
        values = _column(history, name)
        if len(values) != len(step):
            raise ValueError(f"history columns differ in length: step {len(step)}, {name} {len(values)}")
        if np.any(np.isfinite(values)):
            ax.plot(step, values, marker=".", label=name.replace("_", " "))
            drawn += 1
    if not drawn:
        raise ValueError(f"history has no finite values in the columns {list(columns)}")
    ax.set_xlabel("epoch")
    ax.set_ylabel("negative log-likelihood per shot")
    handles, labels = ax.get_legend_handles_labels()
    if fidelity:
        try:
            f = _column(history, "fidelity")
        except ValueError:
            f = np.array([])
        if f.size and np.any(np.isfinite(f)):
            twin = ax.twinx()
            line = twin.plot(step, np.clip(1.0 - f, 1e-16, None), color="k", linestyle="--", label="1 − fidelity")
            twin.set_yscale("log")
            twin.set_ylabel("infidelity 1 − F")
            handles += line
            labels += ["1 − fidelity"]
    ax.legend(handles, labels)
    return ax
