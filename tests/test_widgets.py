"""The workbench panels, driven like a user would (set .value, .click()) and through their
methods, without a browser. The reference for every number is the public msmkit function
the panel is meant to call (the widgets are thin views), plus the gas constant for kJ/mol.
"""
import base64
import html
import io
import json
import subprocess
import sys
import warnings

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("ipywidgets")

import msmkit as mk  # noqa: E402
from msmkit import demo  # noqa: E402
from msmkit.errors import DiagnosticWarning, InputError  # noqa: E402
from msmkit.lagscan import lag_scan  # noqa: E402
from msmkit.plots import figure_png, plot_timescales  # noqa: E402
from msmkit.reduce import TICA  # noqa: E402
from msmkit.states import Microstates  # noqa: E402
from msmkit.widgets import LagPanel, PopulationsPanel, StatesPanel, Workbench  # noqa: E402
from msmkit.widgets import _render  # noqa: E402
from msmkit.widgets.lags import TimescaleView  # noqa: E402

LAGS = [1, 2, 5, 10]
N_STATES = 20
#: molar gas constant, kJ/(mol K) (CODATA 2018, exact)
R_KJ = 8.314462618e-3


@pytest.fixture(scope="module")
def trajs():
    return demo.trajectories(seed=1, n_runs=6, min_frames=800, max_frames=1200)


@pytest.fixture(scope="module")
def wb(trajs):
    """A workbench taken through clustering and scanning by the buttons."""
    bench = Workbench(trajs, n_states=N_STATES, lags=LAGS, n_samples=5, progress=False)
    bench.states_panel.cluster_button.click()
    bench.wait(60)
    bench.lag_panel.scan_button.click()
    bench.wait(60)
    return bench


@pytest.fixture(scope="module")
def reference(trajs):
    """The same analysis through the public API (the numbers the panels must show)."""
    tica = TICA(10, dim=2).fit(trajs)
    coords = list(tica.transform(trajs))
    micro = Microstates(N_STATES, seed=0).fit(coords)
    # The default of 5 processes: the first 4 (what the panel shows) do not depend on how many follow.
    scan = lag_scan(micro.labels_, LAGS, dt=demo.DT, unit=demo.UNIT, n_samples=5, seed=0)
    return tica, micro, scan


def png_of(out) -> bytes:
    (item,) = out.outputs
    return base64.b64decode(item["data"]["image/png"])


def pixels(png: bytes) -> np.ndarray:
    from PIL import Image
    return np.asarray(Image.open(io.BytesIO(png)).convert("RGB"), dtype=np.int16)


def status_text(widget) -> str:
    return html.unescape(widget.value)


# -- step 1 ------------------------------------------------------------------------------------

def test_cluster_button_gives_the_public_microstates(wb, reference):
    tica, micro, _ = reference
    assert len(wb.labels) == 6
    for got, want in zip(wb.labels, micro.labels_):
        np.testing.assert_array_equal(got, want)
    np.testing.assert_allclose(wb.microstates.centers_, micro.centers_)
    np.testing.assert_allclose(wb.tica.components_, tica.components_)
    assert png_of(wb.states_panel.map)[:8] == b"\x89PNG\r\n\x1a\n"
    assert f"{N_STATES} microstates" in status_text(wb.states_panel.status)
    assert "msmkit-error" not in wb.states_panel.status.value


def test_features_without_tica(trajs, tmp_path):
    bench = Workbench(trajs, features=["progress", "twist"], use_tica=False, n_states=8, lags=[1, 2],
                      n_samples=0, progress=False)
    micro = bench.make_states()
    assert micro.centers_.shape == (8, 2)
    # default without TICA: features standardized over all frames (numpy mean and population sd)
    raw = np.concatenate([np.asarray(r)[:, :2] for r in trajs])
    mean, sd = raw.mean(axis=0), raw.std(axis=0)
    ref = Microstates(8, seed=0).fit([(np.asarray(r)[:, :2] - mean) / sd for r in trajs])
    np.testing.assert_allclose(micro.centers_, ref.centers_, rtol=1e-6, atol=1e-9)
    assert "(standardized)" in status_text(bench.states_panel.status)
    bench.scan()
    path = bench.save(tmp_path / "plain.npz")
    with np.load(path, allow_pickle=False) as data:
        assert "tica_mean" not in data.files and "centers" in data.files
        np.testing.assert_allclose(data["feature_mean"], mean, rtol=1e-10)
        np.testing.assert_allclose(data["feature_scale"], sd, rtol=1e-10)
        prep = json.loads(str(data["metadata"]))["preparation"]
    assert prep["features"] == ["progress", "twist"] and prep["tica"] is None and prep["scale"] == "standard"
    # the other choice: the features as they are
    micro = bench.make_states(scale="none")
    ref = Microstates(8, seed=0).fit([np.asarray(r)[:, :2] for r in trajs])
    np.testing.assert_allclose(micro.centers_, ref.centers_)
    assert bench.states_panel.feature_scaling is None
    with pytest.raises(InputError, match="scale"):
        bench.make_states(scale="unit")
    # with TICA the choice does not apply (TICA coordinates do not depend on feature units)
    bench.states_panel.use_tica.value = True
    assert bench.states_panel.scale.disabled


def test_warnings_are_shown_in_the_panel():
    rng = np.random.default_rng(3)
    runs = [np.column_stack([np.cumsum(rng.normal(size=300)), rng.normal(size=300), np.ones(300)])
            for _ in range(3)]
    panel = StatesPanel(runs, tica_dim=1, n_states=5, progress=False)
    panel.cluster_button.click()
    panel.wait(60)
    assert panel.labels is not None
    assert "msmkit-warning" in panel.status.value
    assert "constant" in status_text(panel.status)  # TICA's finding about feature x2


# -- step 2 ------------------------------------------------------------------------------------

def test_scan_button_gives_the_public_lag_scan(wb, reference):
    _, _, scan = reference
    got = wb.scan_result
    np.testing.assert_array_equal(got.lags, LAGS)
    np.testing.assert_allclose(got.timescales, scan.timescales[:, :4])
    np.testing.assert_allclose(got.lower, scan.lower[:, :4], equal_nan=True)
    np.testing.assert_allclose(got.upper, scan.upper[:, :4], equal_nan=True)
    assert got.suggested_lag == scan.suggested_lag
    assert [v for _, v in wb.lag_panel.slider.options] == LAGS
    assert html.escape(scan.reason) in wb.lag_panel.suggestion.value
    assert png_of(wb.lag_panel.plot)[:4] == b"\x89PNG"


def test_slider_changes_model_plot_and_table(wb):
    panel = wb.lag_panel
    seen = {}
    for lag in (LAGS[0], LAGS[-1]):
        panel.slider.value = lag
        assert wb.model is wb.scan_result.model(lag)
        assert wb.populations_panel.model is wb.model
        seen[lag] = (png_of(panel.plot), wb.populations_panel.table_html.value, panel.diagnostics.value)
        want = wb.model.populations(temperature=300.0).sort_values("population", ascending=False,
                                                                   kind="stable", ignore_index=True)
        pd.testing.assert_frame_equal(wb.populations_panel.table, want)
        assert f"lag {lag} frame" in status_text(panel.diagnostics)
    a, b = seen[LAGS[0]], seen[LAGS[-1]]
    assert a[0] != b[0] and a[1] != b[1] and a[2] != b[2]


def test_select_lag_method_and_bad_lag(wb):
    model = wb.select_lag(LAGS[1])
    assert model.lag == LAGS[1] and wb.lag_panel.slider.value == LAGS[1]
    with pytest.raises(InputError, match="lag 3 was not scanned"):
        wb.select_lag(3)
    assert "not scanned" in status_text(wb.lag_panel.status)
    assert wb.model.lag == LAGS[1]


def test_fast_marker_draws_what_the_full_figure_draws(wb):
    scan = wb.scan_result
    view = TimescaleView(scan, LAGS[0])
    assert view.fast
    quick = pixels(view.png(LAGS[2]))
    full = pixels(figure_png(plot_timescales(scan, selected_lag=LAGS[2]), dpi=_render.DPI))
    other = pixels(figure_png(plot_timescales(scan, selected_lag=LAGS[-1]), dpi=_render.DPI))
    assert quick.shape == full.shape
    differ = np.mean(np.any(np.abs(quick - full) > 40, axis=-1))
    moved = np.mean(np.any(np.abs(other - full) > 40, axis=-1))
    assert differ < 0.002 and moved > 5 * differ  # same picture; another lag is visibly different


# -- step 3 ------------------------------------------------------------------------------------

def test_sorting_and_temperature(wb):
    pops = wb.populations_panel
    table = pops.sort("state", ascending=True)
    assert list(table["state"]) == sorted(table["state"])
    first_row = pops.table_html.value.split("<tbody>")[1].split("</td>")[0]
    assert f">{table['state'].iloc[0]}" in first_row
    pops.ascending.value = False
    assert list(pops.table["state"]) == sorted(pops.table["state"], reverse=True)

    pops.temperature.value = "310"
    t = pops.table
    np.testing.assert_allclose(t["free_energy_kJ_per_mol"], t["free_energy_kT"] * R_KJ * 310)
    pops.sort_by.value = "free_energy_kJ_per_mol"
    pops.temperature.value = ""
    assert "free_energy_kJ_per_mol" not in pops.table.columns
    assert pops.sort_by.value == "free_energy_kT"
    pops.temperature.value = "warm"
    assert pops.table is None and "temperature must be a number" in status_text(pops.status)
    pops.temperature.value = "-5"
    assert pops.table is None and "temperature" in status_text(pops.status)
    pops.temperature.value = "300"
    pops.sort("population", ascending=False)
    assert pops.table is not None and "msmkit-error" not in pops.status.value


def test_csv_export_with_overwrite_protection(wb, tmp_path):
    pops = wb.populations_panel
    target = tmp_path / "pops.csv"
    pops.csv.name.value = str(target)
    pops.csv.button.click()
    written = pd.read_csv(target)
    pd.testing.assert_frame_equal(written, pops.table, check_dtype=False)
    target.write_text("keep me")
    pops.csv.button.click()
    assert target.read_text() == "keep me"
    assert "exists" in status_text(pops.csv.status)
    pops.csv.overwrite.value = True
    pops.csv.button.click()
    assert len(pd.read_csv(target)) == len(pops.table)


# -- saving ------------------------------------------------------------------------------------

def test_save_writes_a_model_that_loads_with_provenance(wb, trajs, tmp_path):
    wb.select_lag(LAGS[2])
    wb.states_panel.n_states.value, wb.states_panel.seed.value = 7, 99  # edited, not re-clustered
    wb.saver.name.value = str(tmp_path / "chosen.npz")
    wb.saver.button.click()
    wb.states_panel.n_states.value, wb.states_panel.seed.value = N_STATES, 0
    loaded = mk.load_model(tmp_path / "chosen.npz")
    assert loaded.lag == LAGS[2]
    np.testing.assert_allclose(loaded.propagator, wb.model.propagator)
    np.testing.assert_array_equal(loaded.states, wb.model.states)
    with np.load(tmp_path / "chosen.npz", allow_pickle=False) as data:
        np.testing.assert_allclose(data["centers"], wb.microstates.centers_)
        x = np.asarray(trajs[0])
        np.testing.assert_allclose((x - data["tica_mean"]) @ data["tica_components"].T, wb.tica.transform(x),
                                   atol=1e-10)
        prep = json.loads(str(data["metadata"]))["preparation"]
    assert prep["features"] == list(demo.FEATURE_NAMES)
    assert prep["microstates"]["n_states"] == N_STATES and prep["microstates"]["seed"] == 0
    assert prep["tica"]["dim"] == 2
    assert "Saved" in status_text(wb.saver.status)

    wb.saver.button.click()  # the file exists and overwrite is off
    assert "exists" in status_text(wb.saver.status)
    with pytest.raises(InputError, match="exists"):
        wb.save()
    assert wb.save(overwrite=True).exists()


# -- errors in the panel -----------------------------------------------------------------------

def test_bad_choices_show_messages_not_tracebacks(trajs, tmp_path):
    bench = Workbench(trajs, n_states=6, lags=[1, 2], n_samples=0, progress=False,
                      file_name=str(tmp_path / "never.npz"))
    bench.lag_panel.scan_button.click()
    bench.wait(60)
    assert "no microstates yet" in status_text(bench.lag_panel.status)
    bench.saver.button.click()
    assert "no model to save" in status_text(bench.saver.status)
    assert not (tmp_path / "never.npz").exists()

    bench.states_panel.n_states.value = 10 ** 6
    bench.states_panel.cluster_button.click()
    bench.wait(60)
    assert "n_states=1000000" in status_text(bench.states_panel.status)
    assert bench.labels is None
    with pytest.raises(InputError, match="n_states"):
        bench.make_states(n_states=10 ** 6)
    with pytest.raises(InputError, match="n_states"):
        bench.make_states(n_states="many")
    bench.states_panel.features.value = ()
    bench.states_panel.cluster_button.click()
    bench.wait(60)
    assert "choose at least one feature" in status_text(bench.states_panel.status)

    bench.make_states(n_states=6, features=list(demo.FEATURE_NAMES))
    bench.lag_panel.lags.value = "1, 100000"
    bench.lag_panel.scan_button.click()
    bench.wait(60)
    assert "not shorter than the longest trajectory" in status_text(bench.lag_panel.status)
    bench.lag_panel.lags.value = "1, two"
    bench.lag_panel.scan_button.click()
    bench.wait(60)
    assert "whole numbers" in status_text(bench.lag_panel.status)
    assert bench.scan_result is None and bench.model is None
    assert bench.lag_panel.progress_bar.bar_style == "danger"


# -- panels alone, extra steps, hooks ------------------------------------------------------------

def test_panels_work_on_their_own(reference):
    _, micro, scan = reference
    lags = LagPanel(micro.labels_, dt=demo.DT, unit=demo.UNIT, progress=False)
    assert lags.lags.value.startswith("1, 2, 5")  # defaults up to a twentieth of the longest run
    result = lags.scan(lags=[2, 5], n_samples=0)
    np.testing.assert_allclose(result.timescales, scan.timescales[1:3, :4], rtol=1e-9)
    pops = PopulationsPanel(lags.model, temperature=None)
    assert list(pops.table.columns)[:3] == ["state", "population", "free_energy_kT"]
    np.testing.assert_allclose(pops.table["population"].sum(), 1.0)


def test_added_step_receives_labels_and_models(wb):
    import ipywidgets

    class Recorder(ipywidgets.VBox):
        def __init__(self):
            super().__init__()
            self.labels, self.models = [], []

        def set_labels(self, labels):
            self.labels.append(labels)

        def set_model(self, model):
            self.models.append(model)

    rec = Recorder()
    wb.add_step("4 · record", rec)
    assert wb.tabs.titles[-1] == "4 · record" and wb.tabs.children[-1] is rec
    assert rec.labels == [wb.labels] and rec.models == [wb.model]
    wb.lag_panel.slider.value = LAGS[0]
    assert rec.models[-1] is wb.model and wb.model.lag == LAGS[0]


def test_css_hooks_for_browser_tests(wb):
    hooks = {
        "msmkit-cluster-button": wb.states_panel.cluster_button,
        "msmkit-scan-button": wb.lag_panel.scan_button,
        "msmkit-lag-slider": wb.lag_panel.slider,
        "msmkit-timescale-plot": wb.lag_panel.plot,
        "msmkit-state-map": wb.states_panel.map,
        "msmkit-populations-table": wb.populations_panel.table_html,
        "msmkit-save-button": wb.saver.button,
        "msmkit-save-name": wb.saver.name,
        "msmkit-save-status": wb.saver.status,
        "msmkit-progress": wb.lag_panel.progress_bar,
    }
    for cls, widget in hooks.items():
        assert cls in widget._dom_classes, cls
    assert "msmkit-status" in wb.lag_panel.status._dom_classes


def test_importing_msmkit_does_not_import_ipywidgets():
    code = "import sys, msmkit; assert 'ipywidgets' not in sys.modules, 'ipywidgets imported'"
    subprocess.run([sys.executable, "-c", code], check=True)


# -- step 4: validation ------------------------------------------------------------------------
# The reference for every number is the public function the panel calls: chapman_kolmogorov and
# lag_flow (msmkit.validate), model.suggest_n_macrostates.

CK_MULTIPLES = 3
CK_SAMPLES = 6


def test_validate_button_gives_the_public_ck_test(wb):
    from msmkit.validate import chapman_kolmogorov, lag_flow

    model = wb.select_lag(LAGS[2])
    panel = wb.validation_panel
    assert panel.ck is None and wb.ck is None  # a new model has no test yet
    suggested, reason = model.suggest_n_macrostates()
    n_sets = max(suggested, 2)
    assert panel.n_sets.field.value == n_sets
    assert html.escape(reason) in panel.n_sets.reason.value

    panel.multiples.value, panel.n_samples.value = CK_MULTIPLES, CK_SAMPLES
    panel.run_button.click()
    panel.wait(60)
    ck = wb.ck
    assert ck is not None and ck is panel.ck, status_text(panel.status)
    want = chapman_kolmogorov(model, wb.labels, n_sets=n_sets, multiples=CK_MULTIPLES, n_samples=CK_SAMPLES,
                              seed=0)
    for name in ("predicted", "estimated", "lower", "upper"):
        np.testing.assert_allclose(getattr(ck, name), getattr(want, name), equal_nan=True, err_msg=name)
    pd.testing.assert_frame_equal(ck.table(), want.table())
    assert ck.passed == want.passed
    verdict = status_text(panel.verdict)
    assert want.criterion in verdict
    assert verdict.count(f"{want.verdict.capitalize()}:") == 1
    assert {"passed": "msmkit-ok", "failed": "msmkit-failed",
            "inconclusive": "msmkit-inconclusive"}[want.verdict] in panel.verdict.value
    assert want.verdict in status_text(panel.status)
    assert png_of(panel.ck_plot)[:4] == b"\x89PNG"

    flow = lag_flow(want, pair=(0, 1))
    np.testing.assert_allclose(panel.flow.estimated, flow.estimated)
    np.testing.assert_allclose(panel.flow.predicted, flow.predicted)
    assert html.escape(flow.summary) in panel.flow_summary.value
    first_png = png_of(panel.flow_plot)
    assert panel.pair.value == (0, 1)
    assert [v for _, v in panel.pair.first.options] == list(range(n_sets))

    # another pair: drawn from the same test, without running it again
    other = n_sets - 1 if n_sets > 2 else 1
    panel.pair.first.value = other
    panel.pair.second.value = 0
    assert panel.flow.pair == (other, 0) and panel.ck is ck
    np.testing.assert_allclose(panel.flow.estimated, lag_flow(want, pair=(other, 0)).estimated)
    assert png_of(panel.flow_plot) != first_png


def test_validate_method_errors_and_new_models(wb, trajs):
    from msmkit.validate import chapman_kolmogorov

    model = wb.select_lag(LAGS[1])
    panel = wb.validation_panel
    ck = wb.validate(n_sets=2, multiples=2, n_samples=0)
    assert ck is wb.ck and panel.n_sets.field.value == 2 and panel.n_samples.value == 0
    want = chapman_kolmogorov(model, wb.labels, n_sets=2, multiples=2, n_samples=0, seed=0)
    np.testing.assert_allclose(ck.estimated, want.estimated)
    assert ck.criterion == want.criterion  # judged by the tolerance without bootstrap

    # bad settings: an InputError from the method, a message in the panel, the last result kept
    with pytest.raises(InputError, match="multiples"):
        wb.validate(multiples=10 ** 5)
    assert "multiples=100000" in status_text(panel.status)
    assert panel.progress_bar.bar_style == "danger" and wb.ck is ck
    panel.n_sets.field.value = 10 ** 3
    panel.run_button.click()
    panel.wait(60)
    assert "n_sets" in status_text(panel.status) and wb.ck is ck
    panel.n_sets.field.value = 2
    panel.pair.first.value = 1  # the same set twice
    assert "two different sets" in status_text(panel.status)

    # a new model drops the result; the number of sets follows each model's suggestion until
    # another number is entered, and keeps that number until the suggestion is entered again
    count = panel.n_sets
    other = count.suggested + 1
    count.field.value = other
    wb.select_lag(LAGS[0])
    assert wb.ck is None and panel.verdict.value == "" and panel.ck_plot.outputs == ()
    assert count.field.value == other and not count.follows
    count.field.value = count.suggested
    assert count.follows
    wb.select_lag(LAGS[2])
    assert count.field.value == max(wb.model.suggest_n_macrostates()[0], 2)

    bench = Workbench(trajs, n_states=6, lags=[1], n_samples=0, progress=False)
    bench.validation_panel.run_button.click()
    bench.wait(60)
    assert "no model to test" in status_text(bench.validation_panel.status)
    with pytest.raises(InputError, match="no model"):
        bench.validate()


# -- step 5: kinetics --------------------------------------------------------------------------
# References: model.macrostates (PCCA+), model.passage_time_matrix (Kemeny & Snell first-passage times),
# model.transition_paths (transition path theory) and its routes_table.

def test_kinetics_button_gives_the_public_numbers(wb):
    model = wb.select_lag(LAGS[2])
    panel = wb.kinetics_panel
    assert wb.macrostates is None
    n_sets = panel.n_sets.field.value
    assert n_sets == max(model.suggest_n_macrostates()[0], 2)
    panel.compute_button.click()
    panel.wait(60)
    res = panel.result
    assert res is not None, status_text(panel.status)
    assert "msmkit-error" not in panel.status.value

    macro = model.find_macrostates(n_sets, labels=wb.labels, n_samples=panel.n_samples.value, seed=0)
    np.testing.assert_allclose(wb.macrostates.affinity, macro.affinity)
    pd.testing.assert_frame_equal(res.population_table, macro.populations())
    assert {"population_lower", "population_upper"} <= set(res.population_table.columns)
    # routes between macrostates: the flux lumped onto them (Noé et al. PNAS 2009)
    routes = res.flux.lump(macro.members).routes(fraction=1.0)
    assert f"{' → '.join(str(j) for j in routes[0].states)} carries {100 * routes[0].share:.3g}%" \
        in panel.flux_summary.value
    mfpt = model.passage_time_matrix(macro.members)
    for row in res.passage.itertuples():
        a, b = row.from_macrostate, row.to_macrostate
        np.testing.assert_allclose(row.mfpt, mfpt[a, b], rtol=1e-12)
        np.testing.assert_allclose(row.rate, model.transition_paths(macro.members[a], macro.members[b]).rate_constant, rtol=1e-12)
    assert len(res.passage) == n_sets * (n_sets - 1)
    assert f"{mfpt[0, 1]:.4g}" in panel.passage_html.value and f"({model.unit})" in panel.passage_html.value
    # intervals on passage times and rates: those of the library's table for the same sampled models
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        table = macro.kinetics_table()
    for ours, theirs in (("mfpt", "passage_time"), ("rate", "rate_constant")):
        for end in ("lower", "upper"):
            np.testing.assert_allclose(res.passage[f"{ours}_{end}"], table[f"{theirs}_{end}"], rtol=1e-12)
    assert (res.passage["mfpt_lower"] <= res.passage["mfpt"]).all() or "outside" in panel.status.value
    assert "95% interval (time)" in panel.passage_html.value and "bootstrap samples" in panel.passage_html.value
    assert f"{macro.populations()['population'][0]:.4g}" in panel.populations_html.value

    flux = model.transition_paths(macro.members[0], macro.members[1])
    assert (res.source, res.target) == (0, 1)
    np.testing.assert_allclose(res.flux.rate_constant, flux.rate_constant, rtol=1e-12)
    pd.testing.assert_frame_equal(res.routes, flux.routes_table(0.9, max_paths=20))
    assert f"rate {flux.rate_constant:.4g} per {model.unit}" in status_text(panel.flux_summary)
    top = res.routes["states"].iloc[0]
    assert " → ".join(str(s) for s in top) in status_text(panel.pathways_html)

    # choosing another pair recomputes the flux only
    panel.pair.first.value, panel.pair.second.value = 1, 0
    assert (panel.result.source, panel.result.target) == (1, 0)
    assert panel.result.macrostates is res.macrostates
    back = model.transition_paths(macro.members[1], macro.members[0])
    np.testing.assert_allclose(panel.result.flux.rate_constant, back.rate_constant, rtol=1e-12)
    panel.max_paths.value = 3
    assert len(panel.result.routes) <= 3
    pd.testing.assert_frame_equal(panel.result.routes, back.routes_table(0.9, max_paths=3))


def test_kinetics_method_errors_and_saved_memberships(wb, tmp_path):
    model = wb.select_lag(LAGS[2])
    res = wb.kinetics(n_sets=2, source=1, target=0, max_paths=5)
    assert wb.macrostates is res.macrostates and res.macrostates.n_sets == 2
    macro = model.find_macrostates(2)
    np.testing.assert_allclose(res.flux.rate_constant, model.transition_paths(macro.members[1], macro.members[0]).rate_constant, rtol=1e-12)
    assert "2 macrostates" in status_text(wb.saver.status)

    path = wb.save(tmp_path / "with_sets.npz")
    loaded = mk.load_model(path)
    np.testing.assert_allclose(loaded.extras["affinity"], res.macrostates.affinity)
    with np.load(path, allow_pickle=False) as data:
        assert json.loads(str(data["metadata"]))["preparation"]["macrostates"]["n_sets"] == 2
    assert "affinity of 2 macrostates" in status_text(wb.saver.status)

    panel = wb.kinetics_panel
    with pytest.raises(InputError, match="two different macrostates"):
        wb.kinetics(source=0, target=0)
    assert "two different macrostates" in status_text(panel.status)
    with pytest.raises(InputError, match="source must be an integer not greater than 1"):
        wb.kinetics(n_sets=2, source=5)
    assert wb.macrostates is res.macrostates  # the last good result stays
    panel.fraction.value = 1.5
    assert "fraction must be a number in (0, 1]" in status_text(panel.status)
    panel.fraction.value = 0.9
    panel.n_sets.field.value = 10 ** 4
    panel.compute_button.click()
    panel.wait(60)
    assert "n_sets" in status_text(panel.status) and panel.progress_bar.bar_style == "danger"
    panel.n_sets.field.value = 2

    # a new model drops the macrostates: they would not fit it, and are not saved with it
    wb.select_lag(LAGS[1])
    assert wb.macrostates is None and panel.pathways_html.value == ""
    path = wb.save(tmp_path / "without_sets.npz")
    assert "affinity" not in mk.load_model(path).extras


def test_new_steps_have_browser_hooks(wb):
    hooks = {
        "msmkit-validate-button": wb.validation_panel.run_button,
        "msmkit-ck-verdict": wb.validation_panel.verdict,
        "msmkit-ck-plot": wb.validation_panel.ck_plot,
        "msmkit-lag-flow-plot": wb.validation_panel.flow_plot,
        "msmkit-kinetics-button": wb.kinetics_panel.compute_button,
        "msmkit-routes-table": wb.kinetics_panel.pathways_html,
        "msmkit-passage-table": wb.kinetics_panel.passage_html,
    }
    for cls, widget in hooks.items():
        assert cls in widget._dom_classes, cls
    assert wb.tabs.titles[3:5] == ("4 · Validate", "5 · Kinetics")


def test_new_panels_work_on_their_own(reference):
    from msmkit.validate import chapman_kolmogorov
    from msmkit.widgets import KineticsPanel, ValidationPanel

    _, micro, scan = reference
    model = scan.model(LAGS[1])
    panel = ValidationPanel(model, micro.labels_, multiples=2, n_samples=0, progress=False)
    ck = panel.run(n_sets=2)
    want = chapman_kolmogorov(model, micro.labels_, n_sets=2, multiples=2, n_samples=0)
    np.testing.assert_allclose(ck.estimated, want.estimated)
    kin = KineticsPanel(model, n_sets=2, progress=False)
    assert kin.n_sets.field.value == 2 and not kin.n_sets.follows  # a number given is kept
    res = kin.compute(target=0)  # the source defaults to the other macrostate
    assert (res.source, res.target) == (1, 0)
    np.testing.assert_allclose(res.passage["mfpt"], model.passage_time_matrix(model.find_macrostates(2).members)[[0, 1], [1, 0]],
                               rtol=1e-12)


# -- background work, cancel, stale state (checked against the panels' own earlier results) ----
def _slow_bench(trajs):
    bench = Workbench(trajs, n_states=8, lags=[1, 2], n_samples=2, progress=True)
    bench.make_states()
    first = bench.scan()
    return bench, first


def test_cancel_button_stops_a_scan_and_keeps_the_previous_result(trajs):
    import time

    bench, first = _slow_bench(trajs)
    model = bench.model
    panel = bench.lag_panel
    panel.lags.value = "1, 2, 3, 4, 5, 6, 8, 10"
    panel.n_samples.value = 5000  # minutes of work when not cancelled
    panel.scan_button.click()
    assert panel.running and not panel.cancel_button.disabled
    assert panel.scan_button.disabled
    deadline = time.monotonic() + 30
    while panel.progress_bar.value < 3 and time.monotonic() < deadline:  # some samples done
        time.sleep(0.01)
    panel.cancel_button.click()
    assert panel.wait(120), "the scan did not stop after Cancel"
    assert bench.scan_result is first and bench.model is model  # nothing half-made
    text = status_text(panel.status)
    assert "cancelled" in text and "previous successful run" in text
    assert panel.progress_bar.bar_style == "warning"
    assert panel.cancel_button.disabled and not panel.scan_button.disabled
    assert "msmkit-stale" in panel.plot._dom_classes
    # a new run after a cancel runs to the end and clears the stale mark
    panel.n_samples.value = 2
    panel.scan_button.click()
    assert panel.wait(120)
    assert bench.scan_result is not first and "msmkit-stale" not in panel.plot._dom_classes


def test_cancel_stops_work_without_cancel_points():
    """A method without cancel points (like scikit-learn's k-means) is stopped in the worker
    thread at the next Python-level step."""
    import itertools
    import time

    from msmkit.widgets._base import Step

    class Endless(Step):
        interrupt_thread = True

        def __init__(self):
            super().__init__(css_class="msmkit-test")
            self.go = widgets_button = __import__("ipywidgets").Button(description="go")
            self._on_click(widgets_button, self.work)
            self.steps = 0

        def work(self):
            with self._action("Endless work"):
                for self.steps in itertools.count():
                    time.sleep(0.001)

    panel = Endless()
    panel.go.click()
    while panel.steps < 5:
        time.sleep(0.01)
    assert panel.cancel()
    assert panel.wait(30), "the thread was not stopped"
    assert "cancelled" in status_text(panel.status)
    assert not panel.cancel()  # nothing left to cancel


def test_kernel_interrupt_cancels_background_work(trajs, monkeypatch):
    """Kernel -> Interrupt: the idle kernel's SIGINT handler (the one it puts back after each
    message) becomes ours and cancels what runs in the background."""
    import signal
    import time
    import types

    import IPython

    from msmkit.widgets import _base

    kernel = types.SimpleNamespace(saved_sigint_handler=signal.SIG_IGN)
    monkeypatch.setattr(IPython, "get_ipython", lambda: types.SimpleNamespace(kernel=kernel))
    bench, first = _slow_bench(trajs)
    panel = bench.lag_panel
    panel.lags.value = "1, 2, 3, 4, 5"
    panel.n_samples.value = 5000
    panel.scan_button.click()
    handler = kernel.saved_sigint_handler
    assert callable(handler) and handler is not signal.SIG_IGN
    while panel.progress_bar.value < 2:
        time.sleep(0.01)
    handler(signal.SIGINT, None)  # what the kernel does on Interrupt
    assert panel.wait(120)
    assert bench.scan_result is first and "cancelled" in status_text(panel.status)
    _base._interrupt_cancels_jobs()  # installed once only
    assert kernel.saved_sigint_handler is handler
    handler(signal.SIGINT, None)  # nothing runs: passes on to SIG_IGN, no error


def test_recluster_resets_save_row_and_downstream_panels(trajs, tmp_path):
    bench = Workbench(trajs, n_states=8, lags=[1, 2], n_samples=0, ck_samples=0, progress=False)
    bench.make_states()
    bench.scan()
    bench.validate(n_sets=2, multiples=2)
    bench.kinetics(n_sets=2)
    assert "Ready to save" in status_text(bench.saver.status)
    assert bench.validation_panel.ck_plot.outputs
    bench.states_panel.n_states.value = 6
    bench.states_panel.cluster_button.click()
    bench.wait(60)
    assert bench.labels is not None and bench.model is None
    assert "Ready to save" not in status_text(bench.saver.status)
    assert "Nothing to save yet" in status_text(bench.saver.status)
    assert bench.ck is None and bench.macrostates is None
    assert not bench.validation_panel.ck_plot.outputs and not bench.lag_panel.plot.outputs
    assert bench.kinetics_panel.passage_html.value == ""
    bench.saver.name.value = str(tmp_path / "gone.npz")
    bench.saver.button.click()
    assert "no model to save" in status_text(bench.saver.status)
    assert not (tmp_path / "gone.npz").exists()


def test_error_after_a_result_marks_the_old_figure_stale(wb):
    panel = wb.lag_panel
    kept = wb.scan_result
    old = panel.lags.value
    try:
        panel.lags.value = "1, two"
        panel.scan_button.click()
        panel.wait(60)
        assert "whole numbers" in status_text(panel.status)
        assert "still those of the previous successful run" in status_text(panel.status)
        assert "msmkit-stale" in panel.plot._dom_classes and panel.plot.outputs
        assert wb.scan_result is kept
    finally:
        panel.lags.value = old
    wb.scan()
    assert "msmkit-stale" not in panel.plot._dom_classes


def test_buttons_leave_no_progress_widgets_behind(trajs, monkeypatch):
    """No detailed (tqdm) bar is made by a button: nothing to pile up or to outlive the model behind it."""
    import tqdm.auto

    made = []

    class Recording(tqdm.auto.tqdm):
        def __init__(self, *a, **kw):
            made.append(not kw.get("disable", False))
            super().__init__(*a, **kw)

    monkeypatch.setattr(tqdm.auto, "tqdm", Recording)
    bench = Workbench(trajs, n_states=8, lags=[1, 2], n_samples=2, ck_samples=2, progress=True)
    for button in (bench.states_panel.cluster_button, bench.lag_panel.scan_button,
                   bench.validation_panel.run_button, bench.kinetics_panel.compute_button):
        button.click()
        bench.wait(60)
    assert bench.kinetics_panel.result is not None, status_text(bench.kinetics_panel.status)
    assert made and not any(made)  # the library was asked, with its bars off
    for out in (bench.states_panel.map, bench.lag_panel.plot, bench.validation_panel.ck_plot):
        assert [list(o["data"]) for o in out.outputs] == [["image/png", "text/plain"]]


# -- cautions about the chosen lag --------------------------------------------------------------
def test_lag_cautions_below_the_suggestion_and_near_the_run_length():
    """A scan with given timescales: below the suggestion the slowest one rises (6 -> 9); 30
    frames of a 200-frame run is 15 %, 200/30 = 6.67 steps (exact arithmetic)."""
    from types import SimpleNamespace

    from msmkit.widgets.lags import lag_cautions

    model = SimpleNamespace(metadata={"frames_per_run": [200, 150]})
    # timescales rising up to lag 5, then level (values chosen for the rule, not measured)
    scan = SimpleNamespace(lags=np.array([1, 2, 5, 10, 30]), timescales=np.array([[4.0], [6.0], [9.0], [9.1], [9.2]]),
                           suggested_lag=5, unit="ns", model=lambda lag: model)
    below = lag_cautions(scan, 2)
    assert len(below) == 1 and "below the suggested lag" in below[0] and "6 to 9" in below[0]
    assert lag_cautions(scan, 5) == [] and lag_cautions(scan, 10) == []
    far = lag_cautions(scan, 30)  # 30 frames > 10% of the longest run (200 frames)
    assert len(far) == 1 and "15% of the longest run" in far[0] and "6.67 steps" in far[0]
    unsure = SimpleNamespace(**{**vars(scan), "suggested_lag": None})
    rising = lag_cautions(unsure, 1)
    assert len(rising) == 1 and "still rises" in rising[0] and "9.2 ns at 30 frames" in rising[0]
    assert lag_cautions(unsure, 10) == []  # 9.1 -> 9.2 is less than 5 %


def test_chosen_lag_caution_shown_in_the_panel(wb):
    scan = wb.scan_result
    slowest = scan.timescales[:, 0]
    assert slowest[-1] > 1.05 * slowest[0]  # the demo's timescales still rise over these lags
    wb.lag_panel.slider.value = int(scan.lags[0])
    text = status_text(wb.lag_panel.diagnostics)
    assert "still rises" in text and "msmkit-warning" in wb.lag_panel.diagnostics.value


def test_suggested_marker_is_drawn_above_the_chosen_lag_line(wb):
    scan = wb.scan_result
    view = TimescaleView(dataclasses_replace(scan, suggested_lag=int(scan.lags[1])), int(scan.lags[1]))
    labels = [str(a.get_label()) for a in view._figure.moving]
    assert labels.index(next(x for x in labels if x.startswith("suggested lag"))) > \
        labels.index(next(x for x in labels if x.startswith("chosen lag")))
    png = view.png(int(scan.lags[1]))
    # the suggestion's dark dotted line shows on top of the orange chosen-lag line
    im = pixels(png)
    dark = (im.sum(axis=2) < 150)
    orange = (im[..., 0] > 180) & (im[..., 1] > 80) & (im[..., 1] < 170) & (im[..., 2] < 90)
    cols = np.flatnonzero(orange.sum(axis=0) > 20)
    assert cols.size and dark[:, cols.min():cols.max() + 1].sum() > 20


def dataclasses_replace(obj, **kw):
    import dataclasses
    return dataclasses.replace(obj, **kw)


# -- handing on: the report row -------------------------------------------------------------------
def test_save_report_button_writes_the_analysis(trajs, tmp_path):
    bench = Workbench(trajs, n_states=8, lags=[1, 2], n_samples=2, ck_samples=2, progress=False,
                      file_name=str(tmp_path / "m.npz"))
    assert bench.reporter.name.value == str(tmp_path / "m.html")
    bench.reporter.button.click()
    assert "no model to report" in status_text(bench.reporter.status)
    assert not (tmp_path / "m.html").exists()
    bench.make_states()
    bench.scan()
    assert "Ready to write a report" in status_text(bench.reporter.status)
    bench.validate(n_sets=2, multiples=2)
    bench.kinetics(n_sets=2)
    bench.reporter.button.click()
    text = (tmp_path / "m.html").read_text(encoding="utf-8")
    assert "Wrote the report" in status_text(bench.reporter.status)
    assert "Chapman–Kolmogorov test" in text and "<h2>Macrostates</h2>" in text
    assert text.count("data:image/png;base64,") >= 3
    assert "preparation: microstates.n_states" in text
    bench.reporter.button.click()  # exists, overwrite off: kept
    assert "exists" in status_text(bench.reporter.status)
    bench.reporter.overwrite.value = True
    tested = bench.model.lag
    bench.select_lag(next(x for x in (1, 2) if x != tested))  # another model: the test is not for it
    bench.reporter.button.click()
    again = (tmp_path / "m.html").read_text(encoding="utf-8")
    assert "<h2>Chapman–Kolmogorov test</h2>" not in again and "<h2>Lag scan</h2>" in again
    bench.make_states(n_states=6)  # re-clustering: nothing to report any more
    assert "A report needs a model" in status_text(bench.reporter.status)


# -- kinetics pictures ----------------------------------------------------------------------------
def test_kinetics_step_draws_network_and_maps(trajs):
    """The pictures show what the public objects hold: the lumped net current (TransitionPaths.lump),
    the committor and the slowest right eigenvector of the model."""
    from msmkit.plots import plot_macrostate_network

    bench = Workbench(trajs, n_states=12, lags=[1, 2], n_samples=0, progress=False)
    bench.make_states()
    bench.scan()
    panel = bench.kinetics_panel
    panel.compute_button.click()
    panel.wait(60)
    result = panel.result
    assert result is not None, status_text(panel.status)
    assert panel.network_plot.outputs and panel.maps_plot.outputs
    assert "Why the two route lists differ" in status_text(panel.routes_note)
    lumped = result.flux.lump(result.macrostates.members)
    # the net current drawn is antisymmetric-positive: F_ij > 0 implies F_ji == 0 (Noé et al. 2009)
    F = np.asarray(lumped.net_current)
    assert np.all((F > 0) <= (F.T == 0))
    fig = plot_macrostate_network(lumped)
    ax = fig.axes[0]
    arrows = [p for p in ax.patches if type(p).__name__ == "FancyArrowPatch"]
    total = float(lumped.throughput)
    drawn = F[(F > 0) & (F >= 0.01 * total)]  # currents of at least 1 % of the total flux
    assert len(arrows) == drawn.size > 0
    shares = sorted(t.get_text() for t in ax.texts if t.get_text().endswith("%"))
    assert shares == sorted(f"{100 * f / total:.0f}%" for f in drawn)
    # a new model clears the pictures (no stale figures of another model)
    bench.select_lag(next(x for x in (1, 2) if x != bench.model.lag))
    assert not panel.network_plot.outputs and not panel.maps_plot.outputs


def test_kinetics_maps_color_the_public_numbers(trajs):
    from msmkit.plots import plot_kinetics_maps

    coords = list(TICA(10, dim=2).fit(trajs).transform(trajs))
    micro = Microstates(12, seed=0).fit(coords)
    model = mk.build_model(micro.labels_, lag=2)
    macro = model.find_macrostates(2)
    flux = model.transition_paths(macro.members[0], macro.members[1])
    fig = plot_kinetics_maps(micro.centers_[model.states], model, macro, flux, pair=(0, 1))
    left, middle, right = fig.axes[:3]
    np.testing.assert_allclose(middle.collections[0].get_array(), flux.reach_target)
    np.testing.assert_allclose(right.collections[0].get_array(), model.modes(2)[:, 1])
    np.testing.assert_allclose(left.collections[0].get_offsets(), micro.centers_[model.states][:, :2])
    with pytest.raises(InputError, match="kept states"):
        plot_kinetics_maps(micro.centers_[:3], model, macro, flux)


# -- issue 14: verdict styles, feature scaling, kinetic variance, reversible switch, figures ----------

def rare_switching_runs(seed=0):
    """Two blocks of two states each, fast inside a block and crossing between the blocks a few
    times only: a Chapman–Kolmogorov test of two sets has too few changes to decide."""
    rng = np.random.default_rng(seed)
    runs = []
    for _ in range(4):
        block, out = int(rng.integers(2)), []
        for _ in range(1500):
            if rng.random() < 0.001:
                block = 1 - block
            out.append(2 * block + int(rng.integers(2)))
        runs.append(np.array(out))
    return runs


def test_inconclusive_verdict_has_its_own_style():
    from msmkit.validate import chapman_kolmogorov
    from msmkit.widgets import ValidationPanel

    runs = rare_switching_runs()
    model = mk.build_model(runs, lag=1)
    want = chapman_kolmogorov(model, runs, n_sets=2, multiples=3, n_samples=10, seed=0)
    assert want.verdict == "inconclusive"  # the library's judgement (fewer than 20 changes between the sets)
    panel = ValidationPanel(model, runs, n_sets=2, multiples=3, n_samples=10, progress=False)
    ck = panel.run()
    assert ck.verdict == "inconclusive"
    assert "msmkit-inconclusive" in panel.verdict.value
    assert "msmkit-failed" not in panel.verdict.value and "msmkit-ok" not in panel.verdict.value
    assert "inconclusive" in status_text(panel.status)
    assert _render._KINDS["inconclusive"] != _render._KINDS["failed"]


def test_lag_help_speaks_of_intervals_not_bands(wb):
    texts = [wb.lag_panel.n_samples.tooltip, wb.lag_panel.children[0].value, LagPanel.__doc__]
    assert not any("band" in t for t in texts)
    assert "interval" in wb.lag_panel.n_samples.tooltip


def test_kinetic_variance_guide_follows_the_tica_spectrum(wb, trajs):
    """The guide shows sum_{i<=k} lambda_i^2 / sum_i lambda_i^2, with lambda the solutions of the
    generalized eigenproblem C(tau) v = lambda C(0) v (scipy.linalg.eigh, covariances from numpy;
    published definition of the kinetic variance, Noe & Clementi, JCTC 11, 5002 (2015))."""
    import scipy.linalg

    lag = wb.states_panel.tica_lag.value
    x = [np.asarray(r, dtype=float) for r in trajs]
    mean = np.concatenate(x).mean(axis=0)
    a = np.concatenate([r[:-lag] for r in x]) - mean
    b = np.concatenate([r[lag:] for r in x]) - mean
    c0 = (a.T @ a + b.T @ b) / (2 * len(a))
    ct = (a.T @ b + b.T @ a) / (2 * len(a))
    lam = np.sort(scipy.linalg.eigh(ct, c0, eigvals_only=True))[::-1]
    cum = np.cumsum(lam ** 2) / np.sum(lam ** 2)
    np.testing.assert_allclose(wb.tica.cumulative_kinetic_variance_, cum, rtol=2e-3, atol=2e-3)
    dim = wb.tica.dim_
    text = status_text(wb.states_panel.variance_note)
    got = float(text.split("kept hold")[1].split("%")[0])
    assert abs(got - 100 * cum[dim - 1]) < 0.3  # printed to 3 digits; the covariances above agree to 2e-3
    need95 = int(np.searchsorted(cum, 0.95) + 1)
    assert f"and {need95} coordinates" in text
    fig = wb.states_panel.figure("kinetic variance")
    (line,) = [ln for ln in fig.axes[0].get_lines() if ln.get_label() == "cumulative"]
    np.testing.assert_allclose(line.get_ydata(), wb.tica.cumulative_kinetic_variance_)
    assert png_of(wb.states_panel.variance_plot)[:8] == b"\x89PNG\r\n\x1a\n"


def test_without_tica_there_is_no_kinetic_variance_guide(trajs):
    panel = StatesPanel(trajs, use_tica=False, n_states=5, progress=False)
    panel.make_states()
    assert panel.variance_note.value == "" and not panel.variance_plot.outputs
    assert panel.figure_names == ["microstate map"]


def test_reversible_switch_reaches_the_estimate(wb):
    labels = wb.labels
    panel = LagPanel(labels, dt=demo.DT, unit=demo.UNIT, lags=LAGS, n_samples=0, progress=False)
    assert panel.reversible.value is True
    scan = panel.scan(reversible=False)
    assert panel.reversible.value is False
    for lag in LAGS:
        want = mk.build_model(labels, lag, dt=demo.DT, unit=demo.UNIT, reversible=False)
        got = scan.model(lag)
        assert got.reversible is False
        np.testing.assert_allclose(got.propagator, want.propagator, rtol=1e-10, atol=1e-12)
    ref = lag_scan(labels, LAGS, dt=demo.DT, unit=demo.UNIT, n_samples=0, reversible=False)
    np.testing.assert_allclose(scan.timescales, ref.timescales, equal_nan=True)
    assert "Non-reversible model" in status_text(panel.diagnostics)
    scan = panel.scan(reversible=True)
    assert all(scan.model(lag).reversible for lag in LAGS)
    assert "Reversible model" in status_text(panel.diagnostics)
    with pytest.raises(InputError, match="reversible"):
        panel.scan(reversible="yes")


def test_non_reversible_model_goes_through_validation_and_kinetics(trajs):
    bench = Workbench(trajs, n_states=12, lags=[1, 2, 5], n_samples=0, reversible=False, progress=False)
    bench.make_states()
    bench.scan()
    assert bench.model.reversible is False
    ck = bench.validate(n_sets=2, multiples=2, n_samples=4)
    assert ck.verdict in ("passed", "failed", "inconclusive")
    summary = bench.kinetics(n_sets=2)
    assert np.isfinite(summary.flux.rate_constant)


def test_figures_save_as_png_and_svg(wb, tmp_path):
    import xml.etree.ElementTree as ET

    panel = wb.lag_panel
    assert panel.figure_names == ["implied timescales"]
    png = panel.save_figure(tmp_path / "ts.png")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec, sec. 5.2)
    svg = panel.save_figure(tmp_path / "ts.svg")
    root = ET.parse(svg).getroot()
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    assert "Saved the implied timescales figure" in status_text(panel.figure_row.status)
    # no suffix: PNG; the figure shows the chosen lag
    plain = panel.save_figure(tmp_path / "plain")
    assert plain.name == "plain.png" and plain.read_bytes()[:4] == b"\x89PNG"
    # the button writes what the row says; an existing file is kept without overwrite
    panel.figure_row.name.value = str(tmp_path / "ts.png")
    before = png.read_bytes()
    panel.figure_row.button.click()
    assert "exists" in status_text(panel.figure_row.status) and "msmkit-error" in panel.figure_row.status.value
    assert png.read_bytes() == before
    panel.figure_row.overwrite.value = True
    panel.figure_row.button.click()
    assert "Saved" in status_text(panel.figure_row.status)
    # every step's figures, by name
    states = wb.states_panel
    assert states.figure_names == ["microstate map", "kinetic variance"]
    states.figure_row.which.value = "kinetic variance"
    assert states.figure_row.name.value == "kinetic_variance.png"
    out = states.save_figure(tmp_path / "kv.svg", figure="kinetic variance")
    ET.parse(out)


def test_bad_figure_paths_give_messages(wb, tmp_path):
    panel = wb.lag_panel
    row_ = panel.figure_row
    for bad, words in ((tmp_path / "missing" / "x.png", "does not exist"), (tmp_path / "x.pdf", ".png or .svg"),
                       ("   ", "give a file name")):
        row_.name.value = str(bad)
        row_.button.click()  # a message, no traceback
        assert words in status_text(row_.status) and "msmkit-error" in row_.status.value
        with pytest.raises(InputError, match="figure file|does not exist"):
            panel.save_figure(bad)
    # the write itself fails (a folder where the file should go): a message, nothing left behind
    (tmp_path / "taken.png").mkdir()
    with pytest.raises(InputError, match="cannot write"):
        panel.save_figure(tmp_path / "taken.png", overwrite=True)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["taken.png"]
    assert "cannot write" in status_text(row_.status)
    row_.overwrite.value = False
    fresh = LagPanel(None, progress=False)
    with pytest.raises(InputError, match="not drawn yet"):
        fresh.save_figure(tmp_path / "none.png")
    with pytest.raises(InputError, match="figure must be one of"):
        panel.save_figure(tmp_path / "y.png", figure="nonsense")


# -- sessions ------------------------------------------------------------------------------------

def test_session_comes_back_without_recomputing(wb, trajs, tmp_path, monkeypatch):
    wb.select_lag(LAGS[2])
    wb.validate(n_sets=2, multiples=CK_MULTIPLES, n_samples=CK_SAMPLES)
    wb.kinetics(n_sets=2, source=1, target=0)
    wb.populations_panel.temperature.value = "310"
    wb.session_row.name.value = str(tmp_path / "work.npz")
    wb.session_row.button.click()  # Save session
    assert "Saved the session" in status_text(wb.session_row.status), status_text(wb.session_row.status)
    path = tmp_path / "work.npz"
    before = path.read_bytes()
    wb.session_row.button.click()  # the file exists: kept, message shown
    assert "exists" in status_text(wb.session_row.status) and path.read_bytes() == before

    # nothing may be estimated, clustered, scanned, tested or resampled while loading
    def refuse(*args, **kwargs):
        raise AssertionError("recomputed while loading a session")

    import msmkit.widgets.lags as lags_mod
    import msmkit.widgets.validate as validate_mod
    monkeypatch.setattr(lags_mod, "lag_scan", refuse)
    monkeypatch.setattr(validate_mod, "chapman_kolmogorov", refuse)
    monkeypatch.setattr(Microstates, "fit", refuse)
    monkeypatch.setattr(TICA, "fit", refuse)
    monkeypatch.setattr(mk.MarkovModel, "find_macrostates", refuse)
    import msmkit.uncertainty as uncertainty_mod
    monkeypatch.setattr(uncertainty_mod, "sample_models", refuse)

    other = Workbench(trajs, n_states=5, lags=[1], n_samples=0, temperature=None, progress=False)
    other.session_row.name.value = str(path)
    other.session_load_button.click()
    assert "Loaded the session" in status_text(other.session_row.status), status_text(other.session_row.status)
    assert other.model.lag == LAGS[2] and other.lag_panel.slider.value == LAGS[2]
    for got, want in zip(other.labels, wb.labels):
        np.testing.assert_array_equal(got, want)
    np.testing.assert_array_equal(other.scan_result.timescales, wb.scan_result.timescales)
    np.testing.assert_array_equal(other.scan_result.lower, wb.scan_result.lower)
    assert other.states_panel.n_states.value == N_STATES and other.lag_panel.n_samples.value == 5
    assert other.populations_panel.temperature.value == "310"
    pd.testing.assert_frame_equal(other.populations_panel.table, wb.populations_panel.table)
    assert other.ck.verdict == wb.ck.verdict and other.validation_panel.verdict.value == wb.validation_panel.verdict.value
    pd.testing.assert_frame_equal(other.ck.table(), wb.ck.table())
    assert other.kinetics_panel.result.source == 1 and other.kinetics_panel.result.target == 0
    assert other.kinetics_panel.passage_html.value == wb.kinetics_panel.passage_html.value
    assert other.kinetics_panel.populations_html.value == wb.kinetics_panel.populations_html.value
    # the figures are back, pixel for pixel
    for a, b in ((other.lag_panel.plot, wb.lag_panel.plot), (other.validation_panel.ck_plot, wb.validation_panel.ck_plot),
                 (other.states_panel.map, wb.states_panel.map),
                 (other.kinetics_panel.network_plot, wb.kinetics_panel.network_plot)):
        assert np.array_equal(pixels(png_of(a)), pixels(png_of(b)))
    # the restored model saves as the original does
    saved = mk.load_model(other.save(tmp_path / "again.npz"))
    np.testing.assert_array_equal(saved.propagator, wb.model.propagator)


def test_session_of_other_trajectories_or_bad_files_gives_messages(wb, trajs, tmp_path):
    path = wb.save_session(tmp_path / "mine.npz")
    shorter = [np.asarray(r)[:700] for r in trajs]
    other = Workbench(shorter, n_states=5, lags=[1], n_samples=0, progress=False)
    with pytest.raises(InputError, match="other trajectories"):
        other.load_session(path)
    assert "other trajectories" in status_text(other.session_row.status)
    assert other.labels is None and other.model is None
    changed = [np.asarray(r).copy() for r in trajs]
    changed[0][0, 0] += 1.0
    with pytest.raises(InputError, match="other trajectories"):
        Workbench(changed, progress=False).load_session(path)
    (tmp_path / "junk.npz").write_bytes(b"not a zip at all")
    other.session_row.name.value = str(tmp_path / "junk.npz")
    other.session_load_button.click()  # a message, no traceback
    assert "not a readable session file" in status_text(other.session_row.status)
    wb.save(tmp_path / "model.npz", overwrite=True)
    with pytest.raises(InputError, match="model file"):
        other.load_session(tmp_path / "model.npz")
    slow = Workbench(trajs, dt=2 * demo.DT, unit=demo.UNIT, progress=False)
    with pytest.raises(InputError, match="dt="):
        slow.load_session(path)


def test_session_before_any_result_keeps_the_settings(trajs, tmp_path):
    bench = Workbench(trajs, n_states=9, lags=[1, 2], n_samples=3, reversible=False, progress=False)
    path = bench.save_session(tmp_path / "settings.npz")
    assert "settings only" in status_text(bench.session_row.status)
    again = Workbench(trajs, progress=False)
    again.load_session(path)
    assert again.states_panel.n_states.value == 9 and again.lag_panel.lags.value == "1, 2"
    assert again.lag_panel.reversible.value is False and again.model is None


def test_one_uncertainty_choice_for_scan_test_and_kinetics(trajs):
    # the choice made in the lag step reaches the test and the kinetics step; the numbers are
    # those of the library called with uncertainty="bayes" (reference: lag_scan, chapman_kolmogorov)
    from msmkit.validate import chapman_kolmogorov

    wb = Workbench(trajs, n_states=6, lags=[1, 2], n_samples=30, ck_samples=10, progress=False)
    wb.make_states()
    wb.lag_panel.uncertainty.value = "bayes"
    assert wb.validation_panel.uncertainty.value == "bayes" == wb.kinetics_panel.uncertainty.value
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        scan = wb.lag_panel.scan()
        want = lag_scan(wb.labels, [1, 2], dt=wb.dt, unit=wb.unit, n_samples=30, seed=0, uncertainty="bayes")
        assert scan.uncertainty == "bayes"
        np.testing.assert_allclose(scan.lower, want.lower, rtol=1e-12)
        np.testing.assert_allclose(scan.upper, want.upper, rtol=1e-12)
        ck = wb.validation_panel.run(n_sets=2, multiples=2)
        ref = chapman_kolmogorov(wb.model, wb.labels, n_sets=2, multiples=2, n_samples=10, seed=0,
                                 uncertainty="bayes")
        assert ck.uncertainty == "bayes"
        np.testing.assert_allclose(ck.lower, ref.lower, rtol=1e-12, equal_nan=True)
        res = wb.kinetics_panel.compute(n_sets=2, n_samples=25)
    assert res.macrostates.samples.uncertainty == "bayes" and res.macrostates.samples.propagators.shape[0] == 25
    assert "posterior samples" in wb.kinetics_panel.passage_html.value
    # non-reversible models have no posterior here: a message, not a traceback
    wb.kinetics_panel.set_model(quiet_build(wb.labels, 1, reversible=False))
    wb.kinetics_panel.compute_button.click()
    wb.kinetics_panel.wait(60)
    assert "reversible=True" in status_text(wb.kinetics_panel.status)
    # a session keeps the choice
    assert wb.session().settings["fields"]["lags"]["uncertainty"] == "bayes"


def quiet_build(labels, lag, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        return mk.build_model(labels, lag, **kw)


def test_microstate_counts_cross_validated_in_the_workbench(trajs):
    # the comparison in step 1 equals msmkit.cross_validate on the same coordinates and settings
    # (VAMP-2 of held-out runs; McGibbon & Pande 2015); re-clustering drops it
    from msmkit.validate import cross_validate

    wb = Workbench(trajs, n_states=8, lags=[1], n_samples=0, progress=False)
    panel = wb.states_panel
    with pytest.raises(InputError, match="Cluster first"):
        panel.compare_states([4, 8])
    wb.make_states()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        got = panel.compare_states([4, 8, 16], lag=2, n_folds=3)
        want = cross_validate(panel.coordinates, [4, 8, 16], 2, n_folds=3, seed=0,
                              cluster=lambda n: Microstates(n, stride=1, seed=0, progress=False))
    np.testing.assert_allclose(got.scores, want.scores, rtol=1e-12)
    assert f"{got.best[2]} microstates" in panel.compare_note.value
    assert "cross-validation" in panel.figure_names
    panel.compare_button.click()  # the button reuses the fields
    panel.wait(120)
    assert "Cross-validated 3 numbers" in status_text(panel.status), status_text(panel.status)
    wb.make_states(n_states=6)
    assert panel.compared is None and panel.compare_note.value == "" and "cross-validation" not in panel.figure_names
