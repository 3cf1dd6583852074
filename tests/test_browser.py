"""The workbench in a real JupyterLab, driven in headless Chromium by Playwright.

Opens example_notebooks/01_workbench.ipynb, runs it, clusters, scans, moves the lag slider with
the keyboard, checks that the plot and the table changed, saves, runs the Chapman–Kolmogorov test
(a verdict in words must appear), cancels a long scan, writes the HTML report and opens it in
Chromium (the figures in it must load), re-clusters and checks that Save no longer claims a model, and
loads the saved file. The inputs must fit the workbench at 1024 px.

With CI=true this test must run: a missing Chromium or Playwright is a failure, not a skip.
"""
import json
import os
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
import uuid
from pathlib import Path

import pytest

pytestmark = pytest.mark.browser

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]
NOTEBOOK = Path(__file__).resolve().parents[1] / "example_notebooks" / "01_workbench.ipynb"
ON_CI = os.environ.get("CI", "").lower() == "true"
#: set to a folder to keep a screenshot of each step (for looking at the layout)
SHOTS = os.environ.get("MSMKIT_BROWSER_SCREENSHOTS")


def _unavailable(reason):
    if ON_CI:
        pytest.fail(f"the browser test must run on CI, but {reason}")
    pytest.skip(reason)


def _require_browser():
    if not os.path.exists(CHROMIUM):
        _unavailable(f"{CHROMIUM} is missing (apt-get install -y chromium)")
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        _unavailable("playwright is not installed (pip install 'msmkit[test]')")
    try:
        import jupyterlab  # noqa: F401
        import ipywidgets  # noqa: F401
    except ImportError as err:
        _unavailable(f"{err.name} is not installed (pip install 'msmkit[lab]')")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _api(base, token, path, method="GET"):
    req = urllib.request.Request(f"{base}{path}?token={token}", method=method)
    with urllib.request.urlopen(req, timeout=5) as resp:
        body = resp.read()
    return json.loads(body) if body else None


class LabServer:
    def __init__(self, base, token, root, proc, log):
        self.base, self.token, self.root, self.proc, self.log = base, token, root, proc, log


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    """A JupyterLab server on 127.0.0.1 (own process group, isolated settings)."""
    _require_browser()
    tmp = tmp_path_factory.mktemp("lab")
    root = tmp / "root"
    root.mkdir()
    shutil.copy(NOTEBOOK, root / NOTEBOOK.name)
    settings = tmp / "settings"
    quiet = settings / "@jupyterlab" / "apputils-extension"
    quiet.mkdir(parents=True)
    (quiet / "notification.jupyterlab-settings").write_text(
        json.dumps({"fetchNews": "false", "checkForUpdates": False, "doNotDisturbMode": True}))
    env = dict(os.environ)
    for name, sub in (("JUPYTER_CONFIG_DIR", "config"), ("JUPYTER_DATA_DIR", "data"),
                      ("JUPYTER_RUNTIME_DIR", "runtime"), ("IPYTHONDIR", "ipython")):
        (tmp / sub).mkdir()
        env[name] = str(tmp / sub)
    port, token = _free_port(), secrets.token_hex(16)
    cmd = [sys.executable, "-m", "jupyterlab", "--no-browser", "--allow-root", "--ip=127.0.0.1",
           f"--port={port}", "--ServerApp.port_retries=0", f"--IdentityProvider.token={token}",
           f"--ServerApp.root_dir={root}", f"--LabApp.user_settings_dir={settings}",
           f"--LabApp.workspaces_dir={tmp / 'ws'}", "--LabApp.news_url=None",
           "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate", "--expose-app-in-browser",
           "--ServerApp.terminals_enabled=False"]
    log = open(tmp / "server.log", "wb")
    proc = subprocess.Popen(cmd, cwd=root, env=env, stdout=log, stderr=subprocess.STDOUT,
                            start_new_session=True)
    base = f"http://127.0.0.1:{port}"
    server = LabServer(base, token, root, proc, tmp / "server.log")
    try:
        deadline = time.monotonic() + 60
        while True:
            if proc.poll() is not None:
                raise RuntimeError(f"JupyterLab exited: {(tmp / 'server.log').read_text()[-2000:]}")
            try:
                _api(base, token, "/api/status")
                break
            except (urllib.error.URLError, ConnectionError, OSError):
                if time.monotonic() > deadline:
                    raise RuntimeError("JupyterLab did not answer within 60 s")
                time.sleep(0.25)
        yield server
    finally:
        _stop(proc)
        log.close()


def _stop(proc):
    if proc.poll() is not None:
        return
    try:
        os.killpg(proc.pid, signal.SIGTERM)  # the server's own group: the server and the kernels
        proc.wait(timeout=15)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)
    except ProcessLookupError:
        pass


KERNEL_IDLE = """() => {
  const app = window.jupyterapp;
  const w = app && app.shell.currentWidget;
  const k = w && w.sessionContext && w.sessionContext.session && w.sessionContext.session.kernel;
  return !!k && k.connectionStatus === 'connected' && k.status === 'idle';
}"""


def _shot(page, name):
    if SHOTS:
        Path(SHOTS).mkdir(parents=True, exist_ok=True)
        page.screenshot(path=str(Path(SHOTS) / f"{name}.png"), full_page=True)


def test_workbench_in_jupyterlab(lab):
    from playwright.sync_api import sync_playwright

    started = time.monotonic()
    workspace = f"msmkit-{uuid.uuid4().hex[:8]}"
    url = f"{lab.base}/lab/workspaces/{workspace}/tree/{NOTEBOOK.name}?token={lab.token}"
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1400, "height": 1000})
            page.set_default_timeout(90_000)
            page.goto(url)
            page.wait_for_function(KERNEL_IDLE, timeout=90_000)
            page.evaluate("window.jupyterapp.commands.execute('notebook:run-all-cells')")

            # Step 1: cluster.
            page.locator(".msmkit-cluster-button").click()
            page.locator(".msmkit-state-map .jp-RenderedImage img").wait_for(state="visible")
            assert "msmkit-error" not in page.locator(".msmkit-states-status").inner_html()
            _shot(page, "1-states")

            # Step 2: scan, then move the lag with the keyboard.
            page.locator(".msmkit-steps .lm-TabBar-tab", has_text="Lag time").click()
            page.locator(".msmkit-scan-button").click()
            plot_img = page.locator(".msmkit-timescale-plot .jp-RenderedImage img")
            plot_img.wait_for(state="visible")
            handle = page.locator(".msmkit-lag-slider .noUi-handle")
            page.wait_for_function(
                "() => !document.querySelector('.msmkit-lag-slider .noUi-handle').hasAttribute('disabled')"
                " && !document.querySelector('.msmkit-lag-slider').classList.contains('mod-disabled')")
            table = page.locator(".msmkit-populations-table")
            page.wait_for_function("() => document.querySelector('.msmkit-populations-table')"
                                   ".innerHTML.includes('<table')")
            src_before = plot_img.get_attribute("src")
            table_before = table.inner_html()
            index_before = float(handle.get_attribute("aria-valuenow"))
            at_end = index_before >= float(handle.get_attribute("aria-valuemax"))
            handle.press("ArrowLeft" if at_end else "ArrowRight")
            page.wait_for_function(
                "old => document.querySelector('.msmkit-timescale-plot .jp-RenderedImage img').src !== old",
                arg=src_before)
            page.wait_for_function(
                "old => document.querySelector('.msmkit-populations-table').innerHTML !== old", arg=table_before)
            assert float(handle.get_attribute("aria-valuenow")) == index_before + (-1 if at_end else 1)
            _shot(page, "2-lags")
            chosen = page.locator(".msmkit-lag-slider .widget-readout").inner_text()
            chosen_lag = int(chosen.split()[0])

            # Step 3 shows the new table; then save.
            page.locator(".msmkit-steps .lm-TabBar-tab", has_text="Populations").click()
            assert f"Lag {chosen_lag} frame" in table.inner_text()
            name = page.locator(".msmkit-save-name input")
            name.fill("browser_model.npz")
            name.press("Tab")
            page.locator(".msmkit-save-button").click()
            page.wait_for_function("() => document.querySelector('.msmkit-save-status').innerText.includes('Saved')")
            _shot(page, "3-populations")

            # Step 4: run the Chapman–Kolmogorov test; a verdict in words and the figure appear.
            page.locator(".msmkit-steps .lm-TabBar-tab", has_text="Validate").click()
            page.locator(".msmkit-validate-button").click()
            page.wait_for_function(
                "() => /(Passed|Failed):/.test(document.querySelector('.msmkit-ck-verdict').innerText)")
            page.locator(".msmkit-ck-plot .jp-RenderedImage img").wait_for(state="visible")
            assert "msmkit-error" not in page.locator(".msmkit-validate-status").inner_html()
            _shot(page, "4-validate")

            # A long scan is cancelled: the chosen model stays.
            page.locator(".msmkit-steps .lm-TabBar-tab", has_text="Lag time").click()
            samples = page.locator(".msmkit-lag-samples input")
            samples.fill("100000")
            samples.press("Tab")
            page.locator(".msmkit-scan-button").click()
            cancel = page.locator(".msmkit-lags .msmkit-cancel-button")
            page.wait_for_function("() => { const b = document.querySelector('.msmkit-lags .msmkit-cancel-button');"
                                   " return b && !b.disabled && getComputedStyle(b).visibility === 'visible'; }")
            cancel.click()
            page.wait_for_function("() => document.querySelector('.msmkit-lags-status').innerText"
                                   ".includes('cancelled')", timeout=60_000)
            assert "previous successful run" in page.locator(".msmkit-lags-status").inner_text()
            assert int(page.locator(".msmkit-lag-slider .widget-readout").inner_text().split()[0]) == chosen_lag
            _shot(page, "5-cancelled")

            # The report: written from the workbench, opened in Chromium with its figures.
            report_name = page.locator(".msmkit-report-name input")
            report_name.fill("browser_report.html")
            report_name.press("Tab")
            page.locator(".msmkit-report-button").click()
            page.wait_for_function("() => document.querySelector('.msmkit-report-status').innerText"
                                   ".includes('Wrote the report')")
            report_page = browser.new_page(viewport={"width": 1400, "height": 1000})
            report_page.goto((lab.root / "browser_report.html").as_uri())
            report_page.wait_for_load_state("load")
            sizes = report_page.evaluate("() => Array.from(document.images).map(i => i.complete ? i.naturalWidth : 0)")
            assert len(sizes) >= 3 and min(sizes) > 300, sizes
            assert report_page.locator("h2", has_text="Chapman–Kolmogorov test").count() == 1
            if SHOTS:
                report_page.screenshot(path=str(Path(SHOTS) / "6-report.png"), full_page=False)
            report_page.close()

            # At 1024 px nothing is clipped: every input ends inside the workbench.
            page.set_viewport_size({"width": 1024, "height": 900})
            page.locator(".msmkit-steps .lm-TabBar-tab", has_text="Microstates").click()
            page.wait_for_timeout(300)
            clipped = page.evaluate("""() => {
              const box = document.querySelector('.msmkit-workbench').getBoundingClientRect();
              return Array.from(document.querySelectorAll('.msmkit-workbench input, .msmkit-workbench button'))
                .filter(e => e.offsetParent !== null)
                .filter(e => e.getBoundingClientRect().right > box.right + 1).length; }""")
            assert clipped == 0
            _shot(page, "7-states-1024")

            # Re-clustering: the save row no longer offers a model, and Save says so.
            page.locator(".msmkit-cluster-button").click()
            page.wait_for_function("() => document.querySelector('.msmkit-save-status').innerText"
                                   ".includes('Nothing to save yet')")
            page.wait_for_function("() => document.querySelector('.msmkit-states-status').innerText"
                                   ".includes('microstates from')")
            page.locator(".msmkit-save-button").click()
            page.wait_for_function("() => document.querySelector('.msmkit-save-status').innerText"
                                   ".includes('no model to save')")
            _shot(page, "8-reclustered-1024")
            page.set_viewport_size({"width": 1400, "height": 1000})
        finally:
            browser.close()
            for session in _api(lab.base, lab.token, "/api/sessions") or []:
                _api(lab.base, lab.token, f"/api/sessions/{session['id']}", method="DELETE")

    import msmkit
    saved = lab.root / "browser_model.npz"
    assert saved.exists()
    model = msmkit.load_model(saved)
    assert model.lag == chosen_lag
    assert model.extras.get("centers") is not None
    print(f"browser test took {time.monotonic() - started:.1f} s")
