"""Tests of msmkit.plots: each figure's content is checked against the data it draws (points,
bars, lines and printed numbers), not the pixels. figure_png gives PNG bytes (PNG signature: the
PNG specification, ISO/IEC 15948, section 5.2 (from memory)).

External references:
- the resolution limit of an implied timescale is t = tau: a process relaxing faster than the lag
  time cannot be resolved at that lag (Prinz et al., J. Chem. Phys. 134, 174105 (2011), Sec. IV.C);
- the 97.5 % quantile of the standard normal distribution is 1.959964 (standard normal tables,
  from memory), so a central 95 % interval spans 2 x 1.96 sigma of a normal estimate;
- a percentile interval contains the model value exactly when the model lies no further from the
  estimate than the half of the interval on that side (definition of an interval, common practice);
- Chapman–Kolmogorov data of a Markov chain agree with the model; a lumped projection of a
  Markov chain is in general not Markovian, so the test fails on it (Prinz et al. 2011,
  Sec. IV.D; Kemeny & Snell, Finite Markov Chains (1960), Ch. 6 (from memory)).
"""
import subprocess
import sys
import warnings

import numpy as np
import pytest

from msmkit.errors import DiagnosticWarning, InputError
from msmkit.lagscan import LagScan, lag_scan
from msmkit.model import MarkovModel, build_model
from msmkit.plots import (_dodge, _log_ticks, ck_deviations, figure_png, plot_chapman_kolmogorov,
                          plot_chapman_kolmogorov_pair, plot_populations, plot_timescales)
from msmkit.validate import chapman_kolmogorov

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
Z_975 = 1.959964  # standard normal tables (from memory)


def quiet(func, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        return func(*args, **kw)


@pytest.fixture(scope="module")
def scan(sample_chain):
    X = np.array([[900.0, 30, 2], [30, 500, 25], [2, 25, 400]])
    runs = sample_chain(X / X.sum(axis=1, keepdims=True), 400, n_runs=6, seed=0)
    return lag_scan(runs, [1, 2, 4, 8], dt=0.2, unit="ns", n_processes=2, n_samples=5, seed=0)


def handmade_scan(**kw):
    """A LagScan with numbers chosen by hand: process 2 falls below the lag at lags 4 and 8
    (0.5 ps steps: lag times 0.5, 1, 2, 4 ps), process 1 has an interval wider than the value at lag 8."""
    values = dict(lags=np.array([1, 2, 4, 8]),
                  timescales=np.array([[10.0, 0.8], [12.0, 1.5], [13.0, 1.9], [13.5, 3.0]]),
                  lower=np.array([[9.0, 0.6], [10.5, 1.1], [11.0, 1.2], [4.0, 1.0]]),
                  upper=np.array([[11.0, 1.0], [13.0, 1.8], [15.0, 2.6], [20.0, 5.0]]),
                  samples=np.full((4, 10, 2), np.nan), dt=0.5, unit="ps", confidence=0.95, n_samples=10,
                  suggested_lag=2, reason="chosen by hand")
    values.update(kw)
    return LagScan(**values)


def points_of(ax):
    """{legend name of the process: (x, y, hollow)} of the plotted timescale points."""
    out = {}
    for line in ax.get_lines():
        if line.get_gid() != "timescale points":
            continue
        label = line.get_label()
        hollow = label.startswith("_")
        name = label.lstrip("_").split(", ")[0]
        x, y, h = out.get(name, (np.empty(0), np.empty(0), np.empty(0, bool)))
        out[name] = (np.append(x, line.get_xdata()), np.append(y, line.get_ydata()),
                     np.append(h, np.full(len(line.get_xdata()), hollow)))
    return out


def test_timescales_figure_draws_every_value_with_the_interval(scan):
    from matplotlib.figure import Figure
    fig = plot_timescales(scan, selected_lag=2)
    assert isinstance(fig, Figure)
    (ax,) = fig.axes
    assert ax.get_xlabel() == "lag time τ [ns]" and ax.get_ylabel() == "implied timescale [ns]"
    assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
    L, k = scan.timescales.shape
    assert np.all(np.isfinite(scan.timescales))
    pts = points_of(ax)
    assert sorted(pts) == ["process 1 (slowest)", "process 2"]
    assert sum(len(x) for x, _, _ in pts.values()) == L * k  # one point per lag and process
    shift = _dodge(k)
    for p, name in enumerate(["process 1 (slowest)", "process 2"]):
        x, y, _ = pts[name]
        order = np.argsort(x)
        np.testing.assert_allclose(x[order], scan.lags * 0.2 * shift[p])  # lag times in ns, set apart by shift
        np.testing.assert_allclose(y[order], scan.timescales[:, p])
    # one vertical bar per point, from the lower to the upper bound of the interval
    segments = np.concatenate([c.get_segments() for c in ax.collections])
    assert len(segments) == L * k
    bars = {(round(s[0, 0], 9), round(s[0, 1], 9)): s[1, 1] for s in segments}
    for p in range(k):
        for i in range(L):
            key = (round(scan.lag_times[i] * shift[p], 9), round(scan.lower[i, p], 9))
            assert bars[key] == pytest.approx(scan.upper[i, p])
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert labels[:2] == ["process 1 (slowest)", "process 2"]
    assert "chosen lag (0.4 ns)" in labels  # the workbench moves this marker by the label
    if scan.suggested_lag is not None:
        assert f"suggested lag ({scan.suggested_lag * 0.2:g} ns)" in labels
    assert "95% bootstrap interval (5 samples)" in ax.get_title()
    png = figure_png(fig)
    assert png.startswith(PNG_SIGNATURE) and len(png) > 1000
    assert fig._repr_png_().startswith(PNG_SIGNATURE)


def test_resolution_limit_is_the_line_timescale_equals_lag_time():
    scan = handmade_scan()
    ax = plot_timescales(scan).axes[0]
    (line,) = [ln for ln in ax.get_lines() if ln.get_label().startswith("timescale = lag time")]
    x, y = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
    np.testing.assert_allclose(y, x)  # t = tau on an axis in physical time: lag * dt
    np.testing.assert_allclose(x, ax.get_xlim())  # across the whole view
    assert line.get_linestyle() == "--"
    words = [t.get_text() for t in ax.texts]
    assert "timescale = lag time: below this, not resolved" in words
    assert not ax.patches and not any(type(c).__name__ == "PolyCollection" for c in ax.collections)  # no fill


def test_hollow_points_are_the_unresolved_or_uncertain_ones():
    scan = handmade_scan()
    ax = plot_timescales(scan).axes[0]
    pts = points_of(ax)
    lag_times = scan.lags * scan.dt
    # by hand: process 1 at lag 8 (interval 16 ps wide, value 13.5 ps); process 2 at lags 4 and 8
    # (1.9 <= 2 ps, 3 <= 4 ps) and at lag 2 is resolved (1.5 > 1 ps, interval 0.7 ps)
    expected = {"process 1 (slowest)": [False, False, False, True], "process 2": [False, False, True, True]}
    for p, name in enumerate(expected):
        x, y, hollow = pts[name]
        order = np.argsort(x)
        assert hollow[order].tolist() == expected[name]
        rule = (scan.timescales[:, p] <= lag_times) | (scan.upper[:, p] - scan.lower[:, p] > scan.timescales[:, p])
        assert hollow[order].tolist() == rule.tolist()
    hollow_lines = [ln for ln in ax.get_lines() if ln.get_gid() == "timescale points" and ln.get_label()[0] == "_"]
    assert all(ln.get_markerfacecolor() == "white" for ln in hollow_lines)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "hollow: below the lag time, or interval wider than the value" in labels
    assert "suggested lag (1 ps)" in labels


def test_timescale_ticks_are_round_and_few():
    ax = plot_timescales(handmade_scan()).axes[0]
    # lags 0.5, 1, 2, 4 ps: at least a factor 1.5 apart, so the ticks are the scanned lag times
    assert [t.get_text() for t in ax.get_xticklabels()] == ["0.5", "1", "2", "4"]
    ticks = ax.get_yticks()
    assert 2 <= len(ticks) <= 7 and not len(ax.yaxis.get_minorticklocs())
    assert all(float(t.get_text()) == v for t, v in zip(ax.get_yticklabels(), ticks))
    # worked by hand: 0.07 .. 5.6 holds 0.1, 0.2, 0.5, 1, 2, 5 of the 1-2-5 series
    np.testing.assert_allclose(_log_ticks(0.07, 5.6), [0.1, 0.2, 0.5, 1, 2, 5])
    # seven decades: the 1-2-5 and 1-3 series would crowd, whole decades remain
    np.testing.assert_allclose(_log_ticks(1e-3, 1e3), 10.0 ** np.arange(-3, 4))
    assert len(_log_ticks(1e-6, 1e6)) <= 7
    # a short span, 2.1 .. 8.4, holds only 5 of the 1-2-5 series: the finer series gives 3, 4, 5, 7
    np.testing.assert_allclose(_log_ticks(2.1, 8.4), [3, 4, 5, 7])


def test_timescales_figure_without_bootstrap_and_one_process(sample_chain):
    runs = sample_chain([[0.9, 0.1], [0.2, 0.8]], 300, n_runs=3, seed=1)
    scan = lag_scan(runs, [1], dt=1.0, unit="ps", n_processes=1)
    fig = plot_timescales(scan, processes=1)
    ax = fig.axes[0]
    assert ax.get_xlabel() == "lag time τ [ps]" and "no bootstrap" in ax.get_title()
    assert not ax.collections  # no interval, no bars
    assert sum(len(x) for x, _, _ in points_of(ax).values()) == 1
    assert figure_png(fig).startswith(PNG_SIGNATURE)


# --------------------------------------------------------------------------- Chapman–Kolmogorov

def true_chain():
    X = np.array([[900.0, 30, 2], [30, 500, 25], [2, 25, 400]])  # detailed balance by construction
    return X / X.sum(axis=1, keepdims=True)


def flicker_chain(p=0.2, q=0.02):
    """Hidden A1 - A2 - B2 - B1, observed only as A or B: memory at short lags."""
    return np.array([[1 - q, q, 0, 0], [q, 1 - q - p, p, 0], [0, p, 1 - q - p, q], [0, 0, q, 1 - q]])


@pytest.fixture(scope="module")
def markov_ck(sample_chain):
    runs = sample_chain(true_chain(), 1000, n_runs=20, seed=101)
    model = quiet(build_model, runs, 1, dt=0.5, unit="ns")
    return quiet(chapman_kolmogorov, model, runs, n_sets=3, multiples=5, seed=0)


@pytest.fixture(scope="module")
def lumped_runs(sample_chain):
    return [(h >= 2).astype(np.int32) for h in sample_chain(flicker_chain(), 1000, n_runs=20, seed=201)]


@pytest.fixture(scope="module")
def lumped_ck(lumped_runs):
    model = quiet(build_model, lumped_runs, 1, dt=0.1, unit="ns")
    return quiet(chapman_kolmogorov, model, lumped_runs, multiples=5, seed=0)


def printed(fig):
    """The numbers printed in the summary's cells, row by row, as (prefix, value)."""
    out = []
    for t in fig.axes[0].texts:
        if t.get_gid() == "ck cell":
            text = t.get_text().replace("\u2212", "-")
            prefix = text[0] if text.startswith("Δ") else ""
            out.append((prefix, float("nan") if text == "n/a" else float(text[len(prefix):])))
    return out


def z_by_hand(ck):
    """z = (estimate - model) / sigma, sigma = the interval's half on the model's side / 1.96."""
    est, pred, lo, hi = ck.estimated, ck.predicted, ck.lower, ck.upper
    half = np.where(pred >= est, hi - est, est - lo)
    return (est - pred) / (half / Z_975)


def test_ck_summary_prints_z_computed_from_the_result(markov_ck):
    ck = markov_ck
    fig = plot_chapman_kolmogorov(ck)
    ax = fig.axes[0]
    m, K = ck.n_sets, len(ck.multiples)
    cells = printed(fig)
    assert len(cells) == m * m * K
    assert not ck.used_tolerance.any() and np.all(np.isfinite(ck.estimated))
    z = z_by_hand(ck)
    rows = [(a, b) for a in range(m) for b in range(m)]
    expected = [round(float(z[k, a, b]), 1) for a, b in rows for k in range(K)]
    got = [v for _, v in cells]
    np.testing.assert_allclose(got, expected, atol=0.051)  # printed to one decimal
    assert all(prefix == "" for prefix, _ in cells)
    # the pass limit on |z| is the model leaving the 95 % interval
    inside = (ck.predicted >= ck.lower) & (ck.predicted <= ck.upper)
    assert np.array_equal(np.abs(z) <= Z_975 + 1e-9, inside)
    computed, limit = ck_deviations(ck)
    np.testing.assert_allclose(computed, z, rtol=1e-6)
    assert limit == pytest.approx(Z_975, abs=1e-6)
    assert [t.get_text() for t in ax.get_yticklabels()] == [f"{a} → {b}" for a, b in rows]
    assert [t.get_text() for t in ax.get_xticklabels()] == [f"k = {k}\n{0.5 * k:g} ns" for k in range(1, K + 1)]
    assert ax.get_xlabel() == "lag multiple k and lag time kτ [ns]"
    assert "fails when |z| > 1.96" in ax.get_title() and "95% bootstrap interval" in ax.get_title()
    assert fig.get_suptitle().startswith("Chapman–Kolmogorov test passed: 0 of 45 cells fail")
    colorbar = fig.axes[1]
    assert "[σ of the estimate]" in colorbar.get_ylabel()
    assert "1.96 pass limit" in [t.get_text() for t in colorbar.get_yticklabels()]
    assert figure_png(fig).startswith(PNG_SIGNATURE)


def test_ck_summary_frames_every_failing_cell(lumped_ck):
    ck = lumped_ck
    fig = plot_chapman_kolmogorov(ck)
    ax = fig.axes[0]
    n_fail = int((~ck.within & np.isfinite(ck.estimated)).sum())
    assert n_fail > 0 and not ck.passed
    framed = [p for p in ax.patches if p.get_gid() == "ck failed cell"]
    assert len(framed) == n_fail
    # frame positions are the failing (pair, k) cells: row a * m + b, column k - 1
    m = ck.n_sets
    where = sorted((round(p.get_y() + p.get_height() / 2), round(p.get_x() + p.get_width() / 2)) for p in framed)
    k, a, b = np.nonzero(~ck.within & np.isfinite(ck.estimated))
    assert where == sorted(zip((a * m + b).tolist(), k.tolist()))
    assert fig.get_suptitle().startswith(f"Chapman–Kolmogorov test failed: {n_fail} of {m * m * 5} cells fail")


def test_ck_summary_without_bootstrap_prints_differences(lumped_runs):
    model = quiet(build_model, lumped_runs, 1, dt=0.1, unit="ns")
    ck = quiet(chapman_kolmogorov, model, lumped_runs, multiples=3, n_samples=0, tolerance=0.01)
    fig = plot_chapman_kolmogorov(ck)
    cells = printed(fig)
    m = ck.n_sets
    diff = ck.estimated - ck.predicted
    expected = [round(float(diff[k, a, b]), 3) for a in range(m) for b in range(m) for k in range(3)]
    assert all(prefix == "Δ" for prefix, _ in cells)
    np.testing.assert_allclose([v for _, v in cells], expected, atol=0.00051)
    assert "fails when |Δ| > 0.01" in fig.axes[0].get_title()
    assert np.all(np.isnan(ck_deviations(ck)[0]))  # no interval, no sigma
    assert "[probability]" in fig.axes[1].get_ylabel()


def test_ck_pair_detail(markov_ck, lumped_ck):
    ck = markov_ck
    fig = plot_chapman_kolmogorov_pair(ck, 0, 1)
    (ax,) = fig.axes
    model = next(ln for ln in ax.get_lines() if ln.get_label() == "model: T(τ)^k")
    np.testing.assert_allclose(model.get_xdata(), [0, 0.5, 1.0, 1.5, 2.0, 2.5])
    np.testing.assert_allclose(model.get_ydata(), np.concatenate([[0.0], ck.predicted[:, 0, 1]]))
    data = next(ln for ln in ax.get_lines() if ln.get_label() == "data: estimated at lag kτ")
    np.testing.assert_allclose(data.get_ydata(), ck.estimated[:, 0, 1])
    (bars,) = ax.collections
    seg = np.array(bars.get_segments())
    np.testing.assert_allclose(seg[:, 0, 1], ck.lower[:, 0, 1])
    np.testing.assert_allclose(seg[:, 1, 1], ck.upper[:, 0, 1])
    zs = [float(t.get_text().split()[1].replace("\u2212", "-")) for t in ax.texts if t.get_text().startswith("z ")]
    np.testing.assert_allclose(zs, np.round(z_by_hand(ck)[:, 0, 1], 1), atol=0.051)
    assert ax.get_xlabel() == "time after starting in set 0 [ns]"
    assert ax.get_ylabel() == "probability to be in set 1 [0–1]"
    stay = plot_chapman_kolmogorov_pair(ck, 2, 2).axes[0]
    assert next(ln for ln in stay.get_lines() if ln.get_label() == "model: T(τ)^k").get_ydata()[0] == 1.0
    failed = plot_chapman_kolmogorov_pair(lumped_ck, 0, 0).axes[0]
    labels = [t.get_text() for t in failed.get_legend().get_texts()]
    assert "fails: model outside the interval" in labels
    with pytest.raises(InputError, match="b must be an integer not greater than 2"):
        plot_chapman_kolmogorov_pair(ck, 0, 3)
    with pytest.raises(InputError, match="a must be an integer"):
        plot_chapman_kolmogorov_pair(ck, "first", 1)


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


def test_plots_do_not_use_pyplot(scan, markov_ck):
    if "matplotlib.pyplot" in sys.modules:
        pytest.skip("another test imported pyplot already in this process")
    figure_png(plot_timescales(scan))
    figure_png(plot_populations(scan.model(1)))
    figure_png(plot_chapman_kolmogorov_pair(markov_ck, 0, 0))
    figure_png(plot_chapman_kolmogorov(markov_ck))
    assert "matplotlib.pyplot" not in sys.modules


def test_ck_summary_title_says_inconclusive():
    # too few changes between the sets for a verdict: the title must not say "failed"
    rng = np.random.default_rng(0)
    runs = []
    for _ in range(4):  # two blocks of two fast-mixing states; the blocks exchange about once per run
        block = np.cumsum(rng.random(1500) < 0.001) % 2
        runs.append(2 * block + rng.integers(0, 2, 1500))
    model = quiet(build_model, runs, lag=1)
    ck = quiet(chapman_kolmogorov, model, runs, n_sets=2, multiples=3, n_samples=10, seed=0)
    assert ck.verdict == "inconclusive"
    title = plot_chapman_kolmogorov(ck).get_suptitle()
    assert title.startswith("Chapman–Kolmogorov test inconclusive") and "failed" not in title
