"""One real-browser test: JupyterLab + Debian's Chromium driven by Playwright.

It proves the whole path the headless tests cannot: the quickstart notebook
runs in a real kernel, the panel renders in the page, a slider moved with
the keyboard and a typed value reach the kernel, the Train button starts a
background fit whose figure appears, Save writes a file that
``rnnkit.load_config`` reads back, a sweep runs from the grid's sliders and
lists, and the same controls then scrub through the sweep's runs. It also
saves the screenshot shown in the README (docs/panel.png), and others in the
test's temporary folder (shots/) for a person to look at.

Skipped only when /usr/bin/chromium or the playwright package is missing.
"""
import json
import os
import re
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


def _shot(page, locator, path: Path) -> None:
    """A screenshot of `locator`, written atomically (the README's picture among them)."""
    page.wait_for_timeout(600)  # let a tab switch or a new image paint
    path.parent.mkdir(parents=True, exist_ok=True)
    write_bytes(path, locator.screenshot())


@pytest.mark.timeout(900)
def test_quickstart_panel_trains_sweeps_and_scrubs_in_a_real_browser(lab):
    export_path = lab["dir"] / "from_browser.json"
    winner_path = lab["dir"] / "winner.json"
    shots = lab["dir"] / "shots"  # the other screenshots, for a person to look at
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
            status = page.locator(".rnnkit-status")
            # Lab's news question covers the bottom right of the screenshots: answer it.
            no = page.locator(".jp-toast-button", has_text="No")
            if no.count():
                no.first.click()
            # The demo frame has gaps: the panel says so on the first tab, where the policy is.
            assert "missing values" in page.locator(".rnnkit-gaps").inner_text()
            assert page.locator(".rnnkit-settings .lm-TabBar-tab.lm-mod-current").inner_text() == "Model"

            # A slider moved with the keyboard: its typed box follows (epochs 3 -> 5).
            handle = page.locator(".rnnkit-epochs .noUi-handle")
            handle.focus()
            handle.press("ArrowRight")
            handle.press("ArrowRight")
            epochs_box = page.locator(".rnnkit-epochs-value input")
            page.wait_for_function(
                "() => document.querySelector('.rnnkit-epochs-value input').value === '5'",
                timeout=30_000)
            # A typed value: 4 epochs, and the slider follows it in the kernel.
            epochs_box.fill("4")
            epochs_box.press("Enter")
            page.locator(".rnnkit-hidden-value input").click()  # blur: the value syncs

            page.locator("button.rnnkit-train").click()
            status.get_by_text("Trained 4 epochs").wait_for(timeout=240_000)
            # The training-curve figure is an <img> whose PNG has loaded in the page.
            img = page.locator("img.rnnkit-fig-training")
            img.wait_for(state="visible", timeout=30_000)
            width = img.evaluate("el => el.complete ? el.naturalWidth : 0")
            assert width > 200, "the training-curve PNG did not load in the page"
            page.locator(".rnnkit-progress-label", has_text="done:").wait_for(timeout=240_000)
            _shot(page, panel, shots / "trained.png")
            # The page's own stylesheet (plain CSS from the panel, no script) greys a figure
            # marked as previous; the test adds and removes the class itself to read it.
            opacity = page.evaluate(
                "() => { const i = document.querySelector('img.rnnkit-fig-training');"
                " i.classList.add('rnnkit-previous'); const o = getComputedStyle(i).opacity;"
                " i.classList.remove('rnnkit-previous'); return o; }")
            assert opacity == "0.4"

            page.locator(".rnnkit-path input").fill(str(export_path))
            page.locator(".rnnkit-path input").press("Tab")
            page.locator("button.rnnkit-export").click()
            status.get_by_text("Wrote the current settings").wait_for(timeout=30_000)
            assert page.locator(".rnnkit-document").inner_text().count('"epochs": 4') == 1

            # The grid: a how-many slider rewrites the list it shows; a typed list is taken.
            page.locator(".rnnkit-settings .lm-TabBar-tab", has_text="Grid").click()
            windows = page.locator(".rnnkit-sweep-windows input")
            before = windows.input_value()
            count = page.locator(".rnnkit-sweep-windows-count .noUi-handle")
            count.focus()
            count.press("ArrowLeft")  # 3 values -> 2
            page.wait_for_function(
                "() => document.querySelector('.rnnkit-sweep-windows input').value.split(',')"
                ".length === 2", timeout=30_000)
            assert windows.input_value() != before
            _shot(page, panel, shots / "grid.png")
            for box, text in ((".rnnkit-sweep-windows", "12, 24"), (".rnnkit-sweep-hidden", "4, 8"),
                              (".rnnkit-sweep-seeds", "1")):
                page.locator(f"{box} input").fill(text)
                page.locator(f"{box} input").press("Tab")
            page.locator("button.rnnkit-sweep").click()
            status.get_by_text("Sweep finished: 8 runs").wait_for(timeout=480_000)
            page.locator(".rnnkit-progress-label", has_text="every page drawn").wait_for(
                timeout=240_000)
            _shot(page, panel, shots / "sweep.png")

            # Scrub: the same controls pick another run of the grid; every page switches.
            page.locator(".rnnkit-settings .lm-TabBar-tab", has_text="Model").click()
            shown = page.locator(".rnnkit-activation select").input_value()
            other = "relu" if shown == "tanh" else "tanh"
            page.locator(".rnnkit-activation select").select_option(other)
            status.get_by_text(f"{other} units").wait_for(timeout=60_000)
            run = re.search(r"sweep run \d+ of 8", status.inner_text()).group(0)
            page.locator(".rnnkit-progress-label", has_text=f"every page drawn ({run})").wait_for(
                timeout=240_000)
            hidden = page.locator(".rnnkit-hidden-value input")
            hidden.fill("7")  # off the grid: snaps to 8 on a log scale
            hidden.press("Enter")
            page.wait_for_function(
                "() => document.querySelector('.rnnkit-hidden-value input').value === '8'",
                timeout=60_000)
            status.get_by_text(f"8 {other} units").wait_for(timeout=60_000)
            run = re.search(r"sweep run \d+ of 8", status.inner_text()).group(0)
            page.locator(".rnnkit-progress-label", has_text=f"every page drawn ({run})").wait_for(
                timeout=240_000)
            for name, file in (("Surface", "surface.png"), ("States", "states.png"),
                               ("Gradients", "gradients.png"), ("Scores", "scores.png")):
                page.locator(".rnnkit-pages .lm-TabBar-tab", has_text=name).click()
                _shot(page, panel, shots / file)
            page.locator(".rnnkit-pages .lm-TabBar-tab", has_text="Forecast").click()
            page.locator("img.rnnkit-fig-forecast").wait_for(state="visible", timeout=30_000)
            _shot(page, panel, SCREENSHOT)

            page.locator(".rnnkit-path input").fill(str(winner_path))
            page.locator(".rnnkit-path input").press("Tab")
            page.locator("button.rnnkit-export-best").click()
            status.get_by_text("Wrote the sweep winner").wait_for(timeout=30_000)
        finally:
            browser.close()

    cfg = rnnkit.load_config(export_path)
    # The notebook's settings, with the one control changed in the browser.
    # (the document names the inputs the run used: every other numeric column)
    assert cfg == rnnkit.Config(target="load_kw", missing="interpolate", window=24,
                                hidden=8, epochs=4, batch_size=32,
                                features=("outdoor_temp_c", "doors_open"))
    best = rnnkit.load_config(winner_path)
    assert best.window in (12, 24) and best.hidden in (4, 8) and best.epochs == 4
    assert best.activation in ("tanh", "relu") and best.seed == 0
