"""Every example notebook runs top to bottom in a fresh kernel (nbclient), in a scratch folder.

The workbench notebook is then driven from the kernel side, the way the buttons would be:
cluster, scan, move the lag slider, save, and load the saved file back.

What runs is a clean copy: only the code cells, without outputs or metadata, taken from the
version git has staged or committed (a user who opens the examples in JupyterLab autosaves
outputs and edits into the working file, which must not break the tests). Outside a git
checkout the file itself is used, still code cells only.
"""
import json
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOKS = sorted((ROOT / "example_notebooks").glob("*.ipynb"))

#: appended to 01_workbench.ipynb: the user's clicks, done from the kernel (where ipywidgets'
#: Output capture behaves differently from a plain Python process), bad choices included
DRIVE_WORKBENCH = '''
from msmkit.errors import InputError
wb.states_panel.n_states.value = 10 ** 6
wb.states_panel.cluster_button.click()  # buttons compute in a background thread
assert wb.wait(120)
assert "msmkit-error" in wb.states_panel.status.value and "n_states" in wb.states_panel.status.value
try:
    wb.make_states(n_states=10 ** 6)
except InputError:
    pass
else:
    raise AssertionError("a bad n_states did not raise InputError from the method")
wb.states_panel.n_states.value = 50
wb.states_panel.cluster_button.click()
assert wb.wait(120)
assert wb.labels is not None, wb.states_panel.status.value
wb.lag_panel.scan_button.click()
assert wb.wait(300)
assert wb.scan_result is not None, wb.lag_panel.status.value
lags = [int(x) for x in wb.scan_result.lags]
wb.lag_panel.slider.value = lags[-1]
assert wb.model.lag == lags[-1]
wb.saver.button.click()
import msmkit
saved = msmkit.load_model(wb.saver.name.value)
assert saved.lag == lags[-1], wb.saver.status.value
wb.save_report("workbench_report.html")
assert "Wrote the report" in wb.reporter.status.value, wb.reporter.status.value
wb.lag_panel.save_figure("workbench_timescales.svg")
wb.save_session("workbench_session.npz")
again = Workbench(trajs, n_states=7, file_name="again.npz")
again.session_row.name.value = "workbench_session.npz"
again.session_load_button.click()
assert again.model is not None and again.model.lag == lags[-1], again.session_row.status.value
print("driven:", saved.lag, saved.n_states)
'''


def tracked_text(path, root=ROOT):
    """The notebook as git has it staged (the index, else HEAD); None outside a git checkout
    or for an untracked file."""
    rel = Path(path).resolve().relative_to(Path(root).resolve()).as_posix()
    for spec in (f":{rel}", f"HEAD:{rel}"):
        try:
            done = subprocess.run(["git", "show", spec], cwd=root, capture_output=True, text=True, timeout=30)
        except (OSError, subprocess.SubprocessError):
            return None
        if done.returncode == 0:
            return done.stdout
    return None


def code_cells(text):
    """The sources of the code cells of a notebook's JSON text (outputs, counts, metadata and
    markdown dropped)."""
    cells = json.loads(text)["cells"]
    return ["".join(c["source"]) if isinstance(c["source"], list) else c["source"]
            for c in cells if c["cell_type"] == "code"]


def clean_copy(path, root=ROOT):
    """A fresh notebook holding only the code cells of the tracked version of ``path``."""
    import nbformat

    text = tracked_text(path, root)
    if text is None:
        text = Path(path).read_text(encoding="utf-8")
    nb = nbformat.v4.new_notebook()
    nb.cells = [nbformat.v4.new_code_cell(src) for src in code_cells(text)]
    return nb


def run_notebook(nb, folder):
    import nbclient

    import os

    client = nbclient.NotebookClient(nb, timeout=600, kernel_name="python3",
                                     resources={"metadata": {"path": str(folder)}})
    # the kernel imports msmkit from this checkout, not from wherever the environment installed it
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in (str(ROOT), os.environ.get("PYTHONPATH", "")) if p))
    client.execute(env=env)
    return nb


def outputs_of(nb):
    return [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]


def test_every_notebook_is_tested():
    assert {p.name for p in NOTEBOOKS} >= {"01_workbench.ipynb", "02_scripted_analysis.ipynb"}


@pytest.mark.parametrize("path", NOTEBOOKS, ids=lambda p: p.name)
def test_notebook_runs_top_to_bottom(path, tmp_path):
    nbformat = pytest.importorskip("nbformat")
    pytest.importorskip("nbclient")
    nb = clean_copy(path)
    if path.name == "01_workbench.ipynb":
        assert len(nb.cells) == 1, "the workbench notebook is one friendly cell"
        nb.cells.append(nbformat.v4.new_code_cell(DRIVE_WORKBENCH))
    run_notebook(nb, tmp_path)  # raises CellExecutionError on any error
    outs = outputs_of(nb)
    assert not [o for o in outs if o.output_type == "error"]
    if path.name == "01_workbench.ipynb":
        assert any("application/vnd.jupyter.widget-view+json" in o.get("data", {}) for o in outs)
        assert (tmp_path / "workbench_model.npz").exists()
        assert (tmp_path / "workbench_session.npz").exists()
        import xml.etree.ElementTree as ET
        assert ET.parse(tmp_path / "workbench_timescales.svg").getroot().tag.endswith("svg")
        assert (tmp_path / "workbench_report.html").read_text(encoding="utf-8").count("data:image/png;base64,") >= 2
        assert any("driven:" in o.get("text", "") for o in outs)
    if path.name == "02_scripted_analysis.ipynb":
        import msmkit
        model = msmkit.load_model(tmp_path / "scripted_model.npz")
        assert model.extras.get("centers") is not None
        assert sum("image/png" in o.get("data", {}) for o in outs) >= 2


def test_a_used_notebook_runs_as_its_clean_copy(tmp_path):
    """Outputs, execution counts, widget state and an extra cell autosaved into the working file
    do not change what runs: the code cells of the version git holds (checked in a scratch git
    repository holding a copy of the workbench notebook)."""
    pytest.importorskip("nbformat")
    original = (ROOT / "example_notebooks" / "01_workbench.ipynb").read_text(encoding="utf-8")
    repo = tmp_path / "repo"
    repo.mkdir()
    path = repo / "01_workbench.ipynb"
    path.write_text(original, encoding="utf-8")
    git = ["git", "-c", "user.name=t", "-c", "user.email=t@t", "-c", "commit.gpgsign=false"]
    try:
        for cmd in (["init", "-q"], ["add", path.name], ["commit", "-q", "-m", "clean"]):
            subprocess.run(git + cmd, cwd=repo, check=True, capture_output=True, timeout=30)
    except (OSError, subprocess.SubprocessError):
        pytest.skip("git is not available")
    used = json.loads(original)
    for c in used["cells"]:
        if c["cell_type"] == "code":
            c["outputs"] = [{"output_type": "stream", "name": "stdout", "text": "left over\n"}]
            c["execution_count"] = 7
    used["metadata"]["widgets"] = {"application/vnd.jupyter.widget-state+json": {"state": {}}}
    used["cells"].append({"cell_type": "code", "metadata": {}, "execution_count": 8, "outputs": [],
                          "source": "wb.states_panel.n_states.value = 3\n"})
    path.write_text(json.dumps(used), encoding="utf-8")
    assert code_cells(path.read_text(encoding="utf-8")) != code_cells(original)
    clean = clean_copy(path, repo)
    assert [c.source for c in clean.cells] == code_cells(original)
    assert all(c.outputs == [] and c.execution_count is None for c in clean.cells)
    # outside git: the working file, its code cells only
    outside = tmp_path / "plain" / "nb.ipynb"
    outside.parent.mkdir()
    outside.write_text(json.dumps(used), encoding="utf-8")
    plain = clean_copy(outside, outside.parent)
    assert [c.source for c in plain.cells] == code_cells(json.dumps(used))
    assert all(c.outputs == [] for c in plain.cells)


def test_kernel_interrupt_cancels_a_scan_started_by_a_button():
    """Kernel -> Interrupt in a real ipykernel (jupyter_client's interrupt_kernel, what JupyterLab
    sends) cancels the scan a button started in the background; the kernel stays usable."""
    pytest.importorskip("nbclient")
    import os
    import time

    from jupyter_client.manager import start_new_kernel

    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in (str(ROOT), os.environ.get("PYTHONPATH", "")) if p))
    km, kc = start_new_kernel(kernel_name="python3", env=env)

    def run(code):
        msg = kc.execute(code)
        out = []
        while True:
            m = kc.get_iopub_msg(timeout=120)
            if m["parent_header"].get("msg_id") != msg:
                continue
            if m["msg_type"] == "stream":
                out.append(m["content"]["text"])
            elif m["msg_type"] == "error":
                raise AssertionError("\n".join(m["content"]["traceback"]))
            elif m["msg_type"] == "status" and m["content"]["execution_state"] == "idle":
                return "".join(out)

    try:
        run("import numpy as np\n"
            "from msmkit.widgets import LagPanel\n"
            "rng = np.random.default_rng(0)\n"
            "p = LagPanel([rng.integers(0, 5, 3000) for _ in range(6)], lags=[1, 2, 3, 4, 5], n_samples=20000)\n"
            "p.scan_button.click()\n"
            "assert p.running")
        time.sleep(1.0)
        km.interrupt_kernel()
        out = run("print(p.wait(120), p.scan_result is None, 'cancelled' in p.status.value)")
        assert out.split() == ["True", "True", "True"], out
    finally:
        kc.stop_channels()
        km.shutdown_kernel(now=True)
