"""A reusable real-browser harness: JupyterLab on 127.0.0.1 plus headless Chromium driven by Playwright.

    with JupyterLab(notebooks=["notebooks/01-tour.ipynb"], output="test-output/browser") as lab:
        page = lab.open("01-tour.ipynb")
        lab.run_all(page)
        lab.wait_for(page, ".nbkit-explorer canvas")
        before = lab.canvas_digest(page, ".nbkit-layer-map")

Everything runs on a temporary copy of the notebooks (Lab autosaves) with all Jupyter state in a
temporary folder; every request that is not to 127.0.0.1 is aborted (some front ends try a CDN
and then stall). Uses the Debian chromium at /usr/bin/chromium (Playwright's own browser download
does not work on these machines). See ../shared/notes/browser-and-notebook-testing.md.

Wait with `page.wait_for_timeout`, never `time.sleep`, while a page is open: Playwright's sync API
runs route handlers (and so lets the page's requests through) only inside its own calls.
"""
from __future__ import annotations

import json
import os
import secrets
import shutil
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

CHROMIUM = os.environ.get("NBKIT_CHROMIUM", "/usr/bin/chromium")
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]

# A digest of a canvas's pixels, computed in the page (ipympl draws into the first canvas of its view).
_DIGEST_JS = """(selector) => {
  const canvas = document.querySelector(selector + ' canvas');
  if (!canvas || canvas.width === 0) return null;
  const data = canvas.getContext('2d').getImageData(0, 0, canvas.width, canvas.height).data;
  let h1 = 2166136261 >>> 0, nonwhite = 0;
  for (let i = 0; i < data.length; i += 4) {
    const v = (data[i] << 16) ^ (data[i + 1] << 8) ^ data[i + 2];
    h1 = Math.imul(h1 ^ v, 16777619) >>> 0;
    if (data[i] < 250 || data[i + 1] < 250 || data[i + 2] < 250) nonwhite++;
  }
  return h1.toString(16) + ':' + nonwhite;
}"""


def browser_available() -> str | None:
    """None when the browser test can run here, else why not."""
    if not Path(CHROMIUM).exists():
        return f"no Chromium at {CHROMIUM} (make browser-deps installs Debian's chromium)"
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        return "the playwright package is not installed (pip install -e '.[dev]')"
    return None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class JupyterLab:
    """A JupyterLab server and one headless Chromium, both ended on exit."""

    def __init__(self, notebooks, output, *, extra_files=(), server_timeout=90.0):
        self.sources = [Path(n) for n in notebooks] + [Path(f) for f in extra_files]
        self.output = Path(output)
        self.server_timeout = server_timeout
        self.token = secrets.token_hex(16)
        self.port = _free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        self._server = self._browser = self._playwright = None

    # --- set-up and tear-down -------------------------------------------------------------------
    def __enter__(self):
        self.output.mkdir(parents=True, exist_ok=True)
        self.tmp = Path(tempfile.mkdtemp(prefix="nbkit-lab-"))
        self.root = self.tmp / "root"
        self.root.mkdir()
        for source in self.sources:
            shutil.copy(source, self.root / source.name)
        env = dict(os.environ)
        for name in ("JUPYTER_CONFIG_DIR", "JUPYTER_DATA_DIR", "JUPYTER_RUNTIME_DIR", "JUPYTERLAB_SETTINGS_DIR",
                     "JUPYTERLAB_WORKSPACES_DIR", "IPYTHONDIR", "MPLCONFIGDIR"):
            env[name] = str(self.tmp / name.lower())
            os.makedirs(env[name], exist_ok=True)
        # Kernels must find the kernelspec of this interpreter: keep the default data path as well.
        env["JUPYTER_PATH"] = str(Path(sys.prefix) / "share" / "jupyter")
        env["PYTHONPATH"] = os.pathsep.join([str(Path(__file__).resolve().parents[1]), env.get("PYTHONPATH", "")])
        news = Path(env["JUPYTERLAB_SETTINGS_DIR"]) / "@jupyterlab" / "apputils-extension"
        news.mkdir(parents=True)
        (news / "notification.jupyterlab-settings").write_text(json.dumps({"fetchNews": "false"}))
        self.log = open(self.output / "jupyterlab.log", "w")
        command = [sys.executable, "-m", "jupyterlab", "--no-browser", "--ServerApp.ip=127.0.0.1",
                   f"--ServerApp.port={self.port}", "--ServerApp.port_retries=0",
                   f"--IdentityProvider.token={self.token}", f"--ServerApp.root_dir={self.root}",
                   "--LabApp.news_url=None", "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate"]
        if hasattr(os, "geteuid") and os.geteuid() == 0:
            command.append("--allow-root")
        self._server = subprocess.Popen(command, env=env, stdout=self.log, stderr=subprocess.STDOUT, cwd=self.root)
        self._wait_for_server()
        from playwright.sync_api import sync_playwright

        self._playwright = sync_playwright().start()
        self._browser = self._playwright.chromium.launch(executable_path=CHROMIUM, headless=True, args=CHROMIUM_ARGS)
        return self

    def __exit__(self, *exc):
        for closer in (lambda: self._browser and self._browser.close(),
                       lambda: self._playwright and self._playwright.stop()):
            try:
                closer()
            except Exception:           # noqa: BLE001 - tear-down goes on whatever happened
                pass
        if self._server is not None:
            self._server.terminate()
            try:
                self._server.wait(20)
            except subprocess.TimeoutExpired:
                self._server.kill()
        self.log.close()
        shutil.rmtree(self.tmp, ignore_errors=True)
        return False

    def api(self, path):
        with urllib.request.urlopen(f"{self.base}{path}?token={self.token}", timeout=5) as response:
            return json.loads(response.read())

    def _wait_for_server(self):
        deadline = time.monotonic() + self.server_timeout
        while time.monotonic() < deadline:
            if self._server.poll() is not None:
                raise RuntimeError(f"JupyterLab exited early; see {self.output / 'jupyterlab.log'}")
            try:
                self.api("/api/status")
                return
            except OSError:
                time.sleep(0.5)
        raise TimeoutError(f"JupyterLab did not answer within {self.server_timeout} s")

    # --- pages ----------------------------------------------------------------------------------
    def open(self, notebook: str, *, timeout=120.0, front_end="lab"):
        """Open `notebook` (a name in the copied folder) and wait until its kernel is connected and idle.
        front_end="notebook": in Notebook 7 (the `notebook` package, served by the same Jupyter server
        as a server extension) instead of JupyterLab."""
        page = self._browser.new_page(viewport={"width": 1500, "height": 1100})
        page.route("**/*", lambda route: route.continue_() if route.request.url.startswith(self.base)
                   or route.request.url.startswith("data:") or route.request.url.startswith("blob:")
                   else route.abort())
        where = f"lab/tree/{notebook}" if front_end == "lab" else f"notebooks/{notebook}"
        page.goto(f"{self.base}/{where}?token={self.token}" + ("&reset" if front_end == "lab" else ""),
                  wait_until="domcontentloaded")
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            kernel = self.kernel_of(notebook)
            if kernel and kernel.get("execution_state") == "idle" and kernel.get("connections", 0) > 0:
                page.wait_for_selector(".jp-Notebook", timeout=30_000)
                page.wait_for_timeout(1000)        # "idle" can show before the notebook panel is usable
                return page
            page.wait_for_timeout(500)
        raise TimeoutError(f"no connected idle kernel for {notebook} after {timeout} s")

    def kernel_of(self, notebook: str) -> dict | None:
        """The kernel model (/api/kernels) of the session that has `notebook` open, or None."""
        for session in self.api("/api/sessions"):
            if session.get("path", "").endswith(notebook) and session.get("kernel"):
                kernel_id = session["kernel"]["id"]
                return next((k for k in self.api("/api/kernels") if k["id"] == kernel_id), None)
        return None

    def run_all(self, page):
        """Run > Run All Cells, from the menu bar."""
        page.locator(".lm-MenuBar-itemLabel", has_text="Run").first.click()
        page.locator(".lm-Menu-itemLabel", has_text="Run All Cells").first.click()

    def wait_idle(self, page, notebook, timeout=300.0):
        """Wait until the kernel of `notebook` is idle (its cells have finished)."""
        deadline = time.monotonic() + timeout
        page.wait_for_timeout(1000)
        while time.monotonic() < deadline:
            kernel = self.kernel_of(notebook)
            if kernel and kernel.get("execution_state") == "idle":
                return
            page.wait_for_timeout(500)
        raise TimeoutError(f"kernel still busy after {timeout} s")

    @staticmethod
    def wait_for(page, selector, timeout=180.0):
        page.wait_for_selector(selector, state="visible", timeout=timeout * 1000)
        return page.locator(selector).first

    @staticmethod
    def canvas_digest(page, selector):
        """A digest of the pixels of the first canvas under `selector` (None before it is drawn)."""
        return page.evaluate(_DIGEST_JS, selector)

    def stable_digest(self, page, selector, *, quiet=0.6, timeout=30.0):
        """The digest once the canvas stopped changing for `quiet` seconds (frames arrive while drawing)."""
        deadline = time.monotonic() + timeout
        last, since = self.canvas_digest(page, selector), time.monotonic()
        while time.monotonic() < deadline:
            page.wait_for_timeout(150)
            now = self.canvas_digest(page, selector)
            if now != last:
                last, since = now, time.monotonic()
            elif now is not None and time.monotonic() - since >= quiet:
                return now
        return last

    def screenshot(self, page, name):
        path = self.output / f"{name}.png"
        page.screenshot(path=str(path), full_page=True)
        return path

    @staticmethod
    def drag(page, selector, start_fraction, end_fraction, *, y_fraction=0.3, steps=8):
        """Press, move and release the mouse across the element under `selector` (fractions of its box,
        measured right before, as the page may have scrolled)."""
        box = page.locator(selector).first.bounding_box()
        y = box["y"] + y_fraction * box["height"]
        page.mouse.move(box["x"] + start_fraction * box["width"], y)
        page.mouse.down()
        page.mouse.move(box["x"] + end_fraction * box["width"], y, steps=steps)
        page.mouse.up()
