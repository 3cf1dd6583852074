"""Tests of msmkit.plots: each function returns a matplotlib Figure with labelled axes that carry
the physical unit; figure_png gives PNG bytes (PNG signature: the PNG specification, ISO/IEC
15948, section 5.2 (from memory)). Pixels are not compared.
"""
import subprocess
import sys
import warnings

import numpy as np
import pytest

from msmkit.errors import DiagnosticWarning
from msmkit.lagscan import lag_scan
from msmkit.model import MarkovModel
from msmkit.plots import figure_png, plot_populations, plot_timescales

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def scan(sample_chain):
    X = np.array([[900.0, 30, 2], [30, 500, 25], [2, 25, 400]])
    runs = sample_chain(X / X.sum(axis=1, keepdims=True), 400, n_runs=6, seed=0)
    return lag_scan(runs, [1, 2, 4, 8], dt=0.2, unit="ns", n_processes=2, n_samples=5, seed=0)


def test_timescales_figure(scan):
    from matplotlib.figure import Figure
    fig = plot_timescales(scan, selected_lag=2)
    assert isinstance(fig, Figure)
    (ax,) = fig.axes
    assert ax.get_xlabel() == "lag time τ [ns]"
    assert ax.get_ylabel() == "implied timescale [ns]"
    assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "process 1" in labels and "process 2" in labels
    assert any(t.startswith("chosen lag (0.4 ns)") for t in labels)
    if scan.suggested_lag is not None:
        assert any(t.startswith(f"suggested lag ({scan.suggested_lag * 0.2:g} ns)") for t in labels)
    # the plotted points are the scan's numbers in physical units
    line = next(ln for ln in ax.get_lines() if ln.get_label() == "process 1")
    np.testing.assert_allclose(line.get_xdata(), scan.lag_times)
    np.testing.assert_allclose(line.get_ydata(), scan.timescales[:, 0])
    assert "95% bootstrap" in ax.get_title()
    png = figure_png(fig)
    assert png.startswith(PNG_SIGNATURE) and len(png) > 1000
    assert fig._repr_png_().startswith(PNG_SIGNATURE)


def test_timescales_figure_without_bootstrap_and_one_process(sample_chain):
    runs = sample_chain([[0.9, 0.1], [0.2, 0.8]], 300, n_runs=3, seed=1)
    scan = lag_scan(runs, [1], dt=1.0, unit="ps", n_processes=1)
    fig = plot_timescales(scan, processes=1)
    ax = fig.axes[0]
    assert ax.get_xlabel() == "lag time τ [ps]" and "bootstrap" not in ax.get_title()
    assert figure_png(fig).startswith(PNG_SIGNATURE)


def test_populations_figure(scan):
    model = scan.model(2)
    fig = plot_populations(model)
    left, right = fig.axes
    assert left.get_xlabel() == "state (original label)"
    assert left.get_ylabel() == "stationary population"
    assert right.get_ylabel() == "free energy [kT]"
    heights = [p.get_height() for p in left.patches]
    np.testing.assert_allclose(heights, model.equilibrium)
    assert "0.4 ns" in left.get_title()
    fig = plot_populations(model, temperature=300)
    assert fig.axes[1].get_ylabel() == "free energy [kJ/mol]"
    assert figure_png(fig).startswith(PNG_SIGNATURE)


def test_populations_figure_shows_original_labels_and_caps_states():
    rng = np.random.default_rng(0)
    n = 8
    X = rng.random((n, n)) + np.eye(n)
    X = X + X.T
    labels = np.arange(n) * 10 + 5
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        model = MarkovModel.from_transition_matrix(X / X.sum(axis=1, keepdims=True), dt=1.0, unit="fs",
                                                   states=labels)
    fig = plot_populations(model, max_states=5)
    ax = fig.axes[0]
    assert len(ax.patches) == 5
    shown = [int(t.get_text()) for t in ax.get_xticklabels()]
    top5 = sorted(labels[np.argsort(-model.equilibrium)[:5]].tolist())
    assert shown == top5
    assert "5 most populated of 8" in ax.get_title()


def test_import_msmkit_does_not_import_matplotlib():
    code = "import sys, msmkit, msmkit.plots, msmkit.model\nassert 'matplotlib' not in sys.modules, sorted(sys.modules)\n"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr


def test_plots_do_not_use_pyplot(scan):
    if "matplotlib.pyplot" in sys.modules:
        pytest.skip("another test imported pyplot already in this process")
    figure_png(plot_timescales(scan))
    figure_png(plot_populations(scan.model(1)))
    assert "matplotlib.pyplot" not in sys.modules
