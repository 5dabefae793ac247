"""End to end in a real browser: JupyterLab on 127.0.0.1, headless Chromium driven by Playwright.

The test opens template notebook 03 (parameters injected for the shared light demo run), runs all its
cells from the menu, clicks the cross-validation panel's button and waits until the panel, updated from
its background thread, shows the finished folds.  It is skipped, with the reason, where Chromium,
Playwright or JupyterLab is missing (``.ci/run`` installs Debian's chromium; the Python packages come
with the ``test`` extra).  Playwright's own browser download is never used: it drives the system Chromium.
"""

from __future__ import annotations

import os
import re
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

CHROMIUM = os.environ.get("WETLANDFLOW_CHROMIUM", "/usr/bin/chromium")
# Keep Chromium from reaching for the network (updates, sync, field trials).
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]
NOTEBOOK = Path(__file__).resolve().parent.parent / "notebooks" / "03_validation_and_training.ipynb"


def _requirements() -> None:
    if not (Path(CHROMIUM).exists() or shutil.which(CHROMIUM)):
        pytest.skip(
            f"no Chromium at {CHROMIUM}: install Debian's package (apt-get install -y chromium) or set "
            "WETLANDFLOW_CHROMIUM to a Chromium executable to run the browser test"
        )
    pytest.importorskip(
        "playwright.sync_api",
        reason="the browser test needs the Python package playwright (pip install -e '.[test]')",
    )
    pytest.importorskip("jupyterlab", reason="the browser test needs JupyterLab (pip install -e '.[test]')")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_for(url: str, server: subprocess.Popen, seconds: float) -> None:
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        if server.poll() is not None:
            raise RuntimeError(f"JupyterLab exited with code {server.returncode} before serving {url}")
        try:
            urllib.request.urlopen(url, timeout=2)
            return
        except OSError:
            time.sleep(0.5)
    raise TimeoutError(f"JupyterLab did not answer at {url} within {seconds:.0f} s")


IDLE = ".jp-Notebook-ExecutionIndicator[data-status='idle']"


def _wait_idle(page, seconds: float) -> None:
    """Wait until the kernel is idle, accepting any dialog that shows up meanwhile (e.g. a kernel choice)."""
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        accept = page.locator(".jp-Dialog .jp-mod-accept")
        if accept.count():
            accept.first.click()
        elif page.locator(IDLE).count():
            return
        page.wait_for_timeout(500)
    raise TimeoutError(f"the kernel was not idle within {seconds:.0f} s")


def _run_all_cells(page) -> None:
    """Run every cell from the Run menu, and make sure execution started (the first prompt shows [1]).

    The notebook is clicked first so that it is JupyterLab's current widget, which the menu command acts on.
    """
    for _ in range(3):
        page.locator(".jp-Notebook .jp-Cell").first.click()
        page.get_by_role("menuitem", name="Run", exact=True).click()
        page.get_by_text("Run All Cells", exact=True).click()
        try:
            page.get_by_text("[1]:", exact=True).first.wait_for(timeout=60_000)
            return
        except Exception:  # the click went nowhere (a toast or a late dialog took it): try again
            page.keyboard.press("Escape")
    raise AssertionError("JupyterLab did not start running the notebook after three tries")


@pytest.fixture()
def lab(tmp_path):
    """A JupyterLab server on 127.0.0.1 with an empty token, serving ``tmp_path``; yields its base URL."""
    _requirements()
    port = _free_port()
    env = {
        **os.environ,
        "JUPYTER_CONFIG_DIR": str(tmp_path / ".config"),
        "JUPYTER_RUNTIME_DIR": str(tmp_path / ".runtime"),
    }
    log = (tmp_path / "server.log").open("w")
    server = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "jupyter",
            "lab",
            "--no-browser",
            "--allow-root",
            "--ServerApp.ip=127.0.0.1",
            f"--ServerApp.port={port}",
            "--ServerApp.token=",
            "--ServerApp.password=",
            f"--ServerApp.root_dir={tmp_path}",
            "--LabApp.news_url=",
        ],
        env=env,
        stdout=log,
        stderr=subprocess.STDOUT,
    )
    base = f"http://127.0.0.1:{port}"
    try:
        _wait_for(f"{base}/api/status", server, 120)
        yield base
    finally:
        server.terminate()  # the server shuts its kernels down on SIGTERM
        try:
            server.wait(30)
        except subprocess.TimeoutExpired:
            server.kill()
        log.close()


@pytest.fixture()
def project_file(tmp_path_factory) -> Path:
    """The shared light demo run (made only when the browser test can run, before the server starts)."""
    _requirements()
    from test_notebooks import shared_notebook_run

    return shared_notebook_run(tmp_path_factory)


def test_notebook_runs_in_jupyterlab_and_its_panel_answers_a_click(project_file, lab, tmp_path):
    import nbformat
    from playwright.sync_api import expect, sync_playwright

    from wetlandflow.ui.widgets import inject_parameters

    nb = nbformat.read(NOTEBOOK, as_version=4)
    inject_parameters(
        nb,
        {
            "project_file": str(project_file),
            "run_if_missing": False,
            "experiment_trees": 10,
            "model_kinds": ["xgboost"],
            "tune_grid": {"max_depth": [3]},
            "selection_max_features": 2,
            "selection_pool": 3,
        },
    )
    nbformat.write(nb, tmp_path / "validation.ipynb")

    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=CHROMIUM, headless=True, args=CHROMIUM_ARGS)
        page = browser.new_page(viewport={"width": 1400, "height": 1000})
        try:
            t0 = time.monotonic()

            def step(what: str) -> None:  # printed with the failure report only
                print(f"{time.monotonic() - t0:6.1f} s  {what}")

            page.goto(f"{lab}/lab/tree/validation.ipynb")
            page.wait_for_selector(".jp-Notebook", timeout=90_000)
            step("notebook open")
            _wait_idle(page, 90)
            step("kernel idle")

            _run_all_cells(page)
            step("cells running")
            button = page.get_by_role("button", name="Cross-validate")
            button.wait_for(timeout=300_000)  # the panel is the last cell: every cell before it has run
            _wait_idle(page, 300)
            step("all cells run")
            assert (
                page.locator(".jp-OutputArea-output[data-mime-type='application/vnd.jupyter.stderr']")
                .filter(has_text="Traceback")
                .count()
                == 0
            )

            button.scroll_into_view_if_needed()
            button.click()
            status = page.get_by_text(re.compile(r"^done: "))
            status.wait_for(timeout=300_000)  # redrawn from the job's background thread
            step("panel done")
            assert re.search(r"fold 3 of 3 \(3 of 3\)", status.inner_text())
            panel = page.locator(".widget-vbox", has=button).first
            expect(panel).to_contain_text("folds_done", timeout=60_000)
            expect(panel.locator("img")).to_have_count(1, timeout=60_000)  # the fold map
        except Exception:
            try:  # for the reader of a CI log: what the page showed when the test gave up
                page.screenshot(path=str(tmp_path / "failure.png"))
                print(f"screenshot of the failure: {tmp_path / 'failure.png'}")
            except Exception as exc:  # noqa: BLE001  (the original failure matters more)
                print(f"no screenshot: {exc}")
            raise
        finally:
            browser.close()
