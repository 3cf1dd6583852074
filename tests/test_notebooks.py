"""Every example notebook runs top to bottom in a fresh kernel (nbclient), in a scratch folder.

The workbench notebook is then driven from the kernel side, the way the buttons would be:
cluster, scan, move the lag slider, save, and load the saved file back.
"""
from pathlib import Path

import pytest

NOTEBOOKS = sorted((Path(__file__).resolve().parents[1] / "example_notebooks").glob("*.ipynb"))

#: appended to 01_workbench.ipynb: the user's clicks, done from the kernel (where ipywidgets'
#: Output capture behaves differently from a plain Python process), bad choices included
DRIVE_WORKBENCH = '''
from msmkit.errors import InputError
wb.states_panel.n_states.value = 10 ** 6
wb.states_panel.cluster_button.click()
assert "msmkit-error" in wb.states_panel.status.value and "n_states" in wb.states_panel.status.value
try:
    wb.make_states(n_states=10 ** 6)
except InputError:
    pass
else:
    raise AssertionError("a bad n_states did not raise InputError from the method")
wb.states_panel.n_states.value = 50
wb.states_panel.cluster_button.click()
assert wb.labels is not None, wb.states_panel.status.value
wb.lag_panel.scan_button.click()
assert wb.scan_result is not None, wb.lag_panel.status.value
lags = [int(x) for x in wb.scan_result.lags]
wb.lag_panel.slider.value = lags[-1]
assert wb.model.lag == lags[-1]
wb.saver.button.click()
import msmkit
saved = msmkit.load_model(wb.saver.name.value)
assert saved.lag == lags[-1], wb.saver.status.value
print("driven:", saved.lag, saved.n_states)
'''


def run_notebook(nb, folder):
    import nbclient

    client = nbclient.NotebookClient(nb, timeout=600, kernel_name="python3",
                                     resources={"metadata": {"path": str(folder)}})
    client.execute()
    return nb


def outputs_of(nb):
    return [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]


def test_every_notebook_is_tested():
    assert {p.name for p in NOTEBOOKS} >= {"01_workbench.ipynb", "02_scripted_analysis.ipynb"}


@pytest.mark.parametrize("path", NOTEBOOKS, ids=lambda p: p.name)
def test_notebook_runs_top_to_bottom(path, tmp_path):
    nbformat = pytest.importorskip("nbformat")
    pytest.importorskip("nbclient")
    nb = nbformat.read(path, as_version=4)
    if path.name == "01_workbench.ipynb":
        assert len(nb.cells) == 1, "the workbench notebook is one friendly cell"
        nb.cells.append(nbformat.v4.new_code_cell(DRIVE_WORKBENCH))
    run_notebook(nb, tmp_path)  # raises CellExecutionError on any error
    outs = outputs_of(nb)
    assert not [o for o in outs if o.output_type == "error"]
    if path.name == "01_workbench.ipynb":
        assert any("application/vnd.jupyter.widget-view+json" in o.get("data", {}) for o in outs)
        assert (tmp_path / "workbench_model.npz").exists()
        assert any("driven:" in o.get("text", "") for o in outs)
    if path.name == "02_scripted_analysis.ipynb":
        import msmkit
        model = msmkit.load_model(tmp_path / "scripted_model.npz")
        assert model.extras.get("centers") is not None
        assert sum("image/png" in o.get("data", {}) for o in outs) >= 2
