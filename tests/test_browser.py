"""One real-browser test: JupyterLab + Debian's Chromium driven by Playwright.

It proves the whole path the headless tests cannot: the quickstart notebook
runs in a real kernel, the panel renders in the page, a typed value reaches
the kernel, the Train button starts a background fit whose figure appears,
and the Save JSON button writes a file that ``rnnkit.load_config`` reads back.
It also saves the screenshot shown in the README (docs/panel.png).

Skipped only when /usr/bin/chromium or the playwright package is missing.
"""
import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

import rnnkit
from rnnkit.data._atomic import write_bytes

CHROMIUM = "/usr/bin/chromium"
REPO = Path(__file__).resolve().parents[1]
NOTEBOOK = REPO / "examples" / "quickstart.ipynb"
SCREENSHOT = REPO / "docs" / "panel.png"

if not os.path.exists(CHROMIUM):
    pytest.skip(f"{CHROMIUM} is missing (apt-get install chromium)", allow_module_level=True)
sync_api = pytest.importorskip("playwright.sync_api", reason="the playwright package is missing")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def lab(tmp_path):
    """A JupyterLab server on 127.0.0.1 in a temp dir holding the quickstart; always killed."""
    nb = json.loads(NOTEBOOK.read_text(encoding="utf-8"))
    # Without kernelspec metadata Lab opens a "Select Kernel" dialog that blocks every click.
    nb.setdefault("metadata", {})["kernelspec"] = {
        "name": "python3", "display_name": "Python 3", "language": "python"}
    (tmp_path / "quickstart.ipynb").write_text(json.dumps(nb), encoding="utf-8")
    port, token = _free_port(), "rnnkit-" + os.urandom(8).hex()
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(REPO), env.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    for var in ("JUPYTER_CONFIG_DIR", "JUPYTER_RUNTIME_DIR", "JUPYTERLAB_WORKSPACES_DIR",
                "IPYTHONDIR"):
        env[var] = str(tmp_path / ("." + var.lower()))  # nothing leaks into the user's home
    env.pop("MPLBACKEND", None)  # the kernel picks the inline backend itself
    log = open(tmp_path / "lab.log", "wb")
    proc = subprocess.Popen(
        [sys.executable, "-m", "jupyter", "lab", "--no-browser", "--ip=127.0.0.1",
         f"--port={port}", f"--IdentityProvider.token={token}",
         f"--ServerApp.root_dir={tmp_path}", "--allow-root"],
        cwd=tmp_path, env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        url = f"http://127.0.0.1:{port}"
        deadline = time.monotonic() + 90
        while True:
            try:
                with urllib.request.urlopen(f"{url}/api/status?token={token}", timeout=2):
                    break
            except OSError:
                if proc.poll() is not None or time.monotonic() > deadline:
                    log.flush()
                    raise RuntimeError("JupyterLab did not start:\n"
                                       + (tmp_path / "lab.log").read_text(errors="replace")[-3000:])
                time.sleep(0.5)
        yield dict(url=url, token=token, dir=tmp_path)
    finally:
        # The server and the kernels it started share one new session: end that group only.
        try:
            os.killpg(proc.pid, signal.SIGTERM)
            proc.wait(timeout=15)
        except (ProcessLookupError, subprocess.TimeoutExpired):
            try:
                os.killpg(proc.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            proc.wait(timeout=15)
        log.close()


@pytest.mark.timeout(600)
def test_quickstart_panel_trains_and_exports_in_a_real_browser(lab):
    export_path = lab["dir"] / "from_browser.json"
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(
            executable_path=CHROMIUM, headless=True,
            args=["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync"])
        try:
            page = browser.new_page(viewport={"width": 1500, "height": 1100})
            page.goto(f"{lab['url']}/lab/tree/quickstart.ipynb?token={lab['token']}")
            page.wait_for_selector(".jp-Notebook .jp-Cell", timeout=120_000)
            # The kernel is connected and idle once the status bar says so.
            page.locator(".jp-StatusBar-Widget", has_text="Idle").first.wait_for(timeout=120_000)
            # Fold the file browser away: the notebook (and the screenshot) gets the width.
            page.locator(".jp-SideBar.jp-mod-left .lm-TabBar-tab.lm-mod-current").click()
            # Run the cells one by one, as a reader would: Shift+Enter from the first.
            n_cells = page.locator(".jp-Notebook .jp-Cell").count()
            page.locator(".jp-Notebook .jp-Cell").first.click()
            for _ in range(n_cells):
                page.keyboard.press("Shift+Enter")
                page.wait_for_timeout(300)
            panel = page.locator(".rnnkit-panel")
            panel.wait_for(state="visible", timeout=180_000)

            # Change a control in the page: 4 epochs instead of the notebook's 3.
            epochs = page.locator(".rnnkit-epochs input")
            epochs.fill("4")
            epochs.press("Enter")
            page.locator(".rnnkit-hidden input").click()  # blur: the value syncs to the kernel

            page.locator("button.rnnkit-train").click()
            status = page.locator(".rnnkit-status")
            status.get_by_text("Trained 4 epochs").wait_for(timeout=240_000)
            # The training-curve figure is an <img> whose PNG has loaded in the page.
            img = page.locator("img.rnnkit-fig-training")
            img.wait_for(state="visible", timeout=30_000)
            width = img.evaluate("el => el.complete ? el.naturalWidth : 0")
            assert width > 200, "the training-curve PNG did not load in the page"

            # The job ends after the loss surface is drawn; then the README screenshot.
            page.locator(".rnnkit-panel .widget-label", has_text="done:").wait_for(timeout=240_000)
            page.locator(".rnnkit-pages .lm-TabBar-tab", has_text="Forecast").click()
            page.locator("img.rnnkit-fig-forecast").wait_for(state="visible", timeout=30_000)
            page.wait_for_timeout(500)  # let the tab switch paint
            SCREENSHOT.parent.mkdir(parents=True, exist_ok=True)
            write_bytes(SCREENSHOT, panel.screenshot())

            page.locator(".rnnkit-path input").fill(str(export_path))
            page.locator(".rnnkit-path input").press("Tab")
            page.locator("button.rnnkit-export").click()
            status.get_by_text("Wrote the current settings").wait_for(timeout=30_000)
            assert page.locator(".rnnkit-document").inner_text().count('"epochs": 4') == 1
        finally:
            browser.close()

    cfg = rnnkit.load_config(export_path)
    # The notebook's settings, with the one control changed in the browser.
    # (the document names the inputs the run used: every other numeric column)
    assert cfg == rnnkit.Config(target="load_kw", missing="interpolate", window=24,
                                hidden=8, epochs=4, batch_size=32,
                                features=("outdoor_temp_c", "doors_open"))
