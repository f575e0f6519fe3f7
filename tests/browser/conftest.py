"""Fixtures for the real-browser tests: Debian's headless Chromium driven by Playwright, a JupyterLab server on a
free localhost port (always shut down), and a real scan.

Chromium comes from the Debian package (``/usr/bin/chromium``); Playwright is never allowed to download a
browser. Without Chromium the tests install it when running as root, else they skip with the reason.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest
from scanning import build_real_scan  # noqa: E402  (tests/browser is on sys.path)

REPO = Path(__file__).resolve().parents[2]
ARTIFACTS = REPO / "test-artifacts"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync"]


def _find_chromium() -> str | None:
    for cand in (shutil.which("chromium"), "/usr/bin/chromium"):
        if cand and os.path.exists(cand):
            return cand
    return None


@pytest.fixture(scope="session")
def chromium_path(request) -> str:
    path = _find_chromium()
    if path is None and hasattr(os, "geteuid") and os.geteuid() == 0:
        # say so on a line of its own (the terminal reporter writes past pytest's capture): it takes minutes
        reporter = request.config.pluginmanager.get_plugin("terminalreporter")
        if reporter is not None:
            reporter.write_line("browser tests: installing Debian's chromium with apt-get (a few minutes, once)")
        env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
        subprocess.run(["apt-get", "update"], env=env, check=False, capture_output=True, timeout=300)
        subprocess.run(["apt-get", "install", "-y", "chromium", "chromium-driver"], env=env, check=False,
                       capture_output=True, timeout=600)
        path = _find_chromium()
    if path is None:
        pytest.skip("Debian's chromium is not installed (/usr/bin/chromium) and we are not root to install it: "
                    "run `apt-get install -y chromium chromium-driver`")
    return path


@pytest.fixture(scope="session")
def browser(chromium_path):
    sync_api = pytest.importorskip("playwright.sync_api", reason="the playwright Python package is not installed")
    os.environ.setdefault("PLAYWRIGHT_SKIP_BROWSER_DOWNLOAD", "1")
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=chromium_path, args=CHROMIUM_ARGS, headless=True)
        try:
            yield b
        finally:
            b.close()


@pytest.fixture(scope="session")
def artifacts() -> Path:
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _get(url: str, timeout: float = 2.0) -> int:
    try:
        with urllib.request.urlopen(url, timeout=timeout) as r:
            return r.status
    except Exception:
        return 0


@pytest.fixture(scope="module")
def jupyterlab(tmp_path_factory):
    """A JupyterLab server on a free localhost port; yields (base_url, token, root_dir). Always shut down."""
    pytest.importorskip("jupyterlab")
    base = tmp_path_factory.mktemp("lab")
    root = base / "root"
    root.mkdir()
    cfg = base / "config"
    (cfg / "labconfig").mkdir(parents=True)
    # no news/update pop-ups over the page we screenshot
    (cfg / "labconfig" / "page_config.json").write_text(json.dumps(
        {"disabledExtensions": {"@jupyterlab/apputils-extension:announcements": True}}))
    # start the notebook's kernel without asking ("Always start the preferred kernel")
    tracker = base / "settings" / "@jupyterlab" / "notebook-extension"
    tracker.mkdir(parents=True)
    # ... and render every cell (JupyterLab 4 otherwise renders only the cells in view)
    (tracker / "tracker.jupyterlab-settings").write_text(json.dumps({"autoStartDefaultKernel": True,
                                                                     "windowingMode": "none"}))
    port, token = _free_port(), "attnpos-test-" + os.urandom(8).hex()
    env = dict(os.environ, HF_HUB_OFFLINE="1", TRANSFORMERS_OFFLINE="1", JUPYTER_CONFIG_DIR=str(cfg),
               JUPYTER_RUNTIME_DIR=str(base / "runtime"), JUPYTERLAB_SETTINGS_DIR=str(base / "settings"),
               JUPYTERLAB_WORKSPACES_DIR=str(base / "workspaces"), JUPYTER_PLATFORM_DIRS="1",
               PYTHONPATH=os.pathsep.join([str(REPO)] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]))
    cmd = [sys.executable, "-m", "jupyterlab", "--no-browser", "--ip=127.0.0.1", f"--port={port}",
           "--ServerApp.port_retries=0", f"--IdentityProvider.token={token}", "--ServerApp.password=",
           f"--ServerApp.root_dir={root}", "--ServerApp.disable_check_xsrf=True", "--ServerApp.open_browser=False",
           "--LabApp.news_url=", "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate"]
    if hasattr(os, "geteuid") and os.geteuid() == 0:
        cmd.append("--allow-root")
    log = open(base / "server.log", "wb")
    proc = subprocess.Popen(cmd, cwd=root, env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    url = f"http://127.0.0.1:{port}"
    try:
        deadline = time.time() + 90
        while time.time() < deadline:
            if proc.poll() is not None:
                raise RuntimeError("JupyterLab exited: " + (base / "server.log").read_text(errors="replace")[-2000:])
            if _get(f"{url}/api/status?token={token}") == 200:
                break
            time.sleep(0.5)
        else:
            raise RuntimeError("JupyterLab did not start in 90 s: " + (base / "server.log").read_text(errors="replace")[-2000:])
        yield url, token, root
    finally:
        # ask the server to stop its kernels and itself, then make sure our process group is gone
        try:
            req = urllib.request.Request(f"{url}/api/shutdown?token={token}", method="POST", data=b"")
            urllib.request.urlopen(req, timeout=10).close()
        except Exception:
            pass
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGTERM)
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(timeout=10)
        log.close()


@pytest.fixture(scope="session")
def real_scan():
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    return build_real_scan()
