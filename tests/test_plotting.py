"""Plot helpers: the figures hold the data they claim to show (Agg backend, no display)."""

import re

import matplotlib

matplotlib.use("Agg")

import jax

jax.config.update("jax_enable_x64", True)

import matplotlib.pyplot as plt
import numpy as np
import pytest
from matplotlib.collections import PolyCollection
from matplotlib.image import AxesImage

import psiloom as pl
from psiloom import plotting


@pytest.fixture(autouse=True)
def close_figures():
    yield
    plt.close("all")


def fake_history():
    steps = np.arange(20)
    energy = -4.0 - 2.0 * (1 - np.exp(-steps / 5.0))
    return {"step": steps, "energy": energy, "error": np.full(20, 0.05)}


def test_energy_history_line_band_and_exact_line():
    history = fake_history()
    ax = plotting.plot_energy_history(history, exact=-6.0)
    lines = ax.get_lines()
    np.testing.assert_allclose(lines[0].get_xdata(), history["step"])
    np.testing.assert_allclose(lines[0].get_ydata(), history["energy"])
    exact_line = [ln for ln in lines if ln.get_label() == "exact"]
    assert len(exact_line) == 1 and np.allclose(exact_line[0].get_ydata(), -6.0)
    bands = [c for c in ax.collections if isinstance(c, PolyCollection)]
    assert len(bands) == 1
    # the band spans energy ± error
    vertices = bands[0].get_paths()[0].vertices
    assert vertices[:, 1].min() == pytest.approx((history["energy"] - 0.05).min())
    assert vertices[:, 1].max() == pytest.approx((history["energy"] + 0.05).max())


def test_energy_history_relative_error_on_log_axis():
    history = fake_history()
    ax = plotting.plot_energy_history(history, exact=-6.0, relative=True)
    assert ax.get_yscale() == "log"
    np.testing.assert_allclose(ax.get_lines()[0].get_ydata(), np.abs(history["energy"] + 6.0) / 6.0)
    with pytest.raises(ValueError, match="exact"):
        plotting.plot_energy_history(history, relative=True)
    with pytest.raises(ValueError, match="error"):
        plotting.plot_energy_history({"step": [0], "energy": [1.0]})


def test_energy_history_from_a_training_history():
    history = pl.train.History()
    for k, col in fake_history().items():
        history.columns[k] = list(col)
    ax = plotting.plot_energy_history(history)
    assert len(ax.get_lines()) == 1
    assert ax.get_lines()[0].get_ydata()[-1] == pytest.approx(fake_history()["energy"][-1])


def test_trace_draws_one_line_per_chain():
    values = np.random.default_rng(0).normal(size=(50, 3))
    ax = plotting.plot_trace(values, label="m")
    assert len(ax.get_lines()) == 3
    np.testing.assert_allclose(ax.get_lines()[2].get_ydata(), values[:, 2])
    assert ax.get_ylabel() == "m"
    ax = plotting.plot_trace(np.random.default_rng(1).normal(size=(10, 20)), max_chains=4)
    assert len(ax.get_lines()) == 4
    with pytest.raises(ValueError, match="values"):
        plotting.plot_trace(np.zeros((2, 3, 4)))


def test_autocorrelation_plot_of_an_ar1_chain():
    # AR(1) with coefficient ρ: autocorrelation ρ^t and τ_int = (1+ρ)/(1−ρ) (textbook)
    rho, n = 0.6, 20_000
    rng = np.random.default_rng(3)
    x = np.empty((n, 2))
    x[0] = rng.normal(size=2)
    for t in range(1, n):
        x[t] = rho * x[t - 1] + np.sqrt(1 - rho**2) * rng.normal(size=2)
    ax = plotting.plot_autocorrelation(x, max_lag=5)
    line = ax.get_lines()[0]
    np.testing.assert_allclose(line.get_xdata(), np.arange(6))
    np.testing.assert_allclose(line.get_ydata(), rho ** np.arange(6), atol=0.03)
    # the legend's τ_int matches (1 + 0.6)/(1 − 0.6) = 4 within 4σ, σ/τ ≈ sqrt(2(2M+1)/N), M ≈ 5τ (Sokal 1997)
    tau = float(re.search(r"τ_int = ([0-9.]+)", line.get_label()).group(1))
    assert abs(tau - 4.0) < 4 * 4.0 * np.sqrt(2 * (2 * 20 + 1) / x.size)


def test_snapshot_strip_of_a_chain():
    samples = np.where(np.random.default_rng(0).random((30, 2, 8)) < 0.5, 1.0, -1.0)
    ax = plotting.plot_snapshots(samples, chain=1, every=3)
    images = [a for a in ax.get_children() if isinstance(a, AxesImage)]
    assert len(images) == 1
    data = np.asarray(images[0].get_array())
    assert data.shape == (8, 10)  # sites × snapshots
    np.testing.assert_array_equal(data, samples[::3, 1].T)
    with pytest.raises(ValueError, match="chain"):
        plotting.plot_snapshots(samples, chain=2)


def test_snapshots_of_a_square_lattice_are_images():
    lat = pl.lattices.square(3, 2)  # Lx = 3, Ly = 2, site i = x + 3y
    samples = np.where(np.random.default_rng(1).random((4, 6)) < 0.5, 1.0, -1.0)
    ax = plotting.plot_snapshots(samples, lattice=lat)
    images = [a for a in ax.get_children() if isinstance(a, AxesImage)]
    data = np.asarray(np.ma.getdata(images[0].get_array()))
    assert data.shape == (2, 4 * 3 + 3)  # Ly rows, 4 tiles of Lx columns plus 3 separators
    first = data[:, :3]
    np.testing.assert_array_equal(first, samples[0].reshape(2, 3))
    np.testing.assert_array_equal(data[:, 4:7], samples[1].reshape(2, 3))
    assert np.all(np.isnan(data[:, 3]))
    ax = plotting.plot_configuration(samples[2], lat)
    img = [a for a in ax.get_children() if isinstance(a, AxesImage)][0]
    np.testing.assert_array_equal(np.asarray(img.get_array()), samples[2].reshape(2, 3))
    with pytest.raises(ValueError, match="sites"):
        plotting.plot_configuration(np.ones(5), lat)
    with pytest.raises(ValueError, match="2-D"):
        plotting.plot_configuration(np.ones(6), pl.lattices.chain(6))


def test_plots_draw_into_given_axes():
    fig, axes = plt.subplots(1, 2)
    assert plotting.plot_trace(np.zeros(5), ax=axes[1]) is axes[1]
    assert plotting.plot_energy_history(fake_history(), ax=axes[0]) is axes[0]


def test_missing_matplotlib_gives_a_clear_import_error(monkeypatch):
    import sys

    monkeypatch.setitem(sys.modules, "matplotlib.pyplot", None)  # makes "import matplotlib.pyplot" fail
    with pytest.raises(ImportError, match="pip install matplotlib"):
        plotting.plot_trace(np.zeros(5))


def test_learning_curve_draws_the_nll_columns_and_the_infidelity():
    history = {"step": [1, 2, 3], "train_nll": [3.0, 2.5, 2.4], "validation_nll": [3.1, 2.6, 2.5],
               "fidelity": [0.9, 0.99, 0.999]}
    ax = plotting.plot_learning_curve(history)
    ys = [line.get_ydata() for line in ax.get_lines()]
    np.testing.assert_allclose(ys[0], history["train_nll"])
    np.testing.assert_allclose(ys[1], history["validation_nll"])
    twin = [a for a in ax.figure.axes if a is not ax][0]
    np.testing.assert_allclose(twin.get_lines()[0].get_ydata(), [0.1, 0.01, 0.001])
    with pytest.raises(ValueError, match="no finite values"):
        plotting.plot_learning_curve({"step": [1], "train_nll": [np.nan], "validation_nll": [np.nan]})
