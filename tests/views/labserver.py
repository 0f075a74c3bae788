"""A throwaway headless JupyterLab on localhost for the browser tests, and the Chromium they drive.

The server runs with its own config/runtime/settings folders, picks a free port itself (read back from its
runtime file, so there is no port race) and stops with SIGTERM, which also shuts its kernels down.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
# The kernel's own status, not the toolbar indicator (which reads "idle" before any kernel exists).
KERNEL_IDLE_JS = ("() => window.jupyterapp && jupyterapp.shell.currentWidget"
                  "?.sessionContext?.session?.kernel?.status === 'idle'")


@contextlib.contextmanager
def jupyter_lab(workdir: Path, timeout: float = 90.0) -> Iterator[dict[str, Any]]:
    """Start JupyterLab in *workdir*; yield ``{"url", "root", "startup_s", "proc"}``; stop it on exit."""
    workdir = Path(workdir)
    d = {k: workdir / k for k in ("root", "runtime", "config", "settings", "workspaces")}
    for p in d.values():
        p.mkdir(parents=True, exist_ok=True)
    # no "get notified about Jupyter news?" toast over the page
    toast = d["settings"] / "@jupyterlab" / "apputils-extension" / "notification.jupyterlab-settings"
    toast.parent.mkdir(parents=True, exist_ok=True)
    toast.write_text(json.dumps({"fetchNews": "false", "checkForUpdates": False}))
    env = dict(os.environ, JUPYTER_RUNTIME_DIR=str(d["runtime"]), JUPYTER_CONFIG_DIR=str(d["config"]),
               JUPYTERLAB_SETTINGS_DIR=str(d["settings"]), JUPYTERLAB_WORKSPACES_DIR=str(d["workspaces"]),
               JUPYTER_PLATFORM_DIRS="1")
    cmd = [sys.executable, "-m", "jupyterlab", "--no-browser", "--allow-root",
           "--ip=127.0.0.1", "--port=0", "--ServerApp.port_retries=0",
           "--IdentityProvider.token=", "--ServerApp.password=",  # no auth: bound to localhost, test only
           f"--ServerApp.root_dir={d['root']}", "--LabApp.news_url=None",
           "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate",
           "--LabApp.expose_app_in_browser=True",  # window.jupyterapp, to run cells and read kernel state
           "--JupyterNotebookApp.expose_app_in_browser=True"]  # the same in Notebook 7 (/notebooks/...)
    log = open(workdir / "server.log", "w")
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, env=env, stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL)
    info = d["runtime"] / f"jpserver-{proc.pid}.json"
    try:
        url = None
        while True:
            if time.perf_counter() - t0 > timeout:
                raise TimeoutError(f"jupyter lab not ready after {timeout}s, see {workdir / 'server.log'}")
            if proc.poll() is not None:
                raise RuntimeError(f"jupyter lab exited rc={proc.returncode}, see {workdir / 'server.log'}")
            if url is None and info.exists():
                with contextlib.suppress(ValueError, KeyError):
                    url = f"http://127.0.0.1:{json.loads(info.read_text())['port']}/"
            if url is not None:
                with contextlib.suppress(OSError):
                    with urllib.request.urlopen(url + "api/status", timeout=2) as r:
                        if r.status == 200:
                            break
            time.sleep(0.1)
        yield {"url": url, "root": d["root"], "startup_s": time.perf_counter() - t0, "proc": proc}
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        log.close()


@contextlib.contextmanager
def chromium(playwright: Any, profile: Path, **viewport: int) -> Iterator[Any]:
    """A headless Debian Chromium context with a fresh profile (one ``sync_playwright()`` serves them all)."""
    ctx = playwright.chromium.launch_persistent_context(
        str(profile), executable_path=CHROMIUM, args=CHROMIUM_ARGS, headless=True,
        viewport={"width": viewport.get("width", 1500), "height": viewport.get("height", 1100)})
    try:
        yield ctx
    finally:
        ctx.close()


def open_notebook(page: Any, lab: dict[str, Any], name: str, timeout_ms: int = 60_000) -> None:
    """Open ``<root>/<name>.ipynb`` in a workspace of its own and wait until its kernel is really idle."""
    page.goto(f"{lab['url']}lab/workspaces/{name}/tree/{name}.ipynb")
    page.locator(".jp-Notebook .jp-Cell").first.wait_for(timeout=timeout_ms)
    page.wait_for_function(KERNEL_IDLE_JS, timeout=timeout_ms)


def open_notebook7(page: Any, lab: dict[str, Any], name: str, timeout_ms: int = 60_000) -> None:
    """Open ``<root>/<name>.ipynb`` in the Notebook 7 interface of the same server; wait for an idle kernel."""
    page.goto(f"{lab['url']}notebooks/{name}.ipynb")
    page.locator(".jp-Notebook .jp-Cell").first.wait_for(timeout=timeout_ms)
    page.wait_for_function(KERNEL_IDLE_JS, timeout=timeout_ms)


def run_all(page: Any) -> None:
    page.evaluate("() => jupyterapp.commands.execute('notebook:run-all-cells')")
