"""The explorer notebook in a real browser: JupyterLab + headless Chromium driven by Playwright.

What a user does: open notebooks/explore_region.ipynb in JupyterLab, run all cells, pick
another extinction law in the panel's *Law* menu, and see the profile change; then, in the
second explorer (the 3-D density model), tick *Show dust features*, read the table and move
the least-probability slider. The test checks the kernel side (the status line reports the
model rebuilt with the new law, the features found) and the browser side (the profile and
sky canvases show different pictures, the table is on the page), and saves screenshots.

Requirements (installed by .ci/run): Debian's ``chromium`` package (``/usr/bin/chromium``,
or set ``DUSTKIT_CHROMIUM``) and the ``playwright`` Python package. Playwright's own browser
download (``playwright install``) is never used. When something is missing the test is
skipped with a loud reason naming what to install.

JupyterLab runs on 127.0.0.1 on a free port with a random token, in temporary Jupyter
folders (conftest.py ``jupyter_dirs``), serving a temporary copy of the notebook (it
autosaves). The browser may only talk to that server.
"""

import os
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

NOTEBOOK = Path(__file__).resolve().parents[1] / "notebooks" / "explore_region.ipynb"
CHROMIUM = os.environ.get("DUSTKIT_CHROMIUM", "/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
SHOT_COPY = Path("/tmp/dustkit_browser.png")  # a fixed place for people to look at the last run
NEW_LAW = "fitzpatrick99"  # A_J/A_V differs from ccm89's by ~9%, so the J-band profile visibly moves


def _requirements():
    """Skip loudly (with what to install) unless chromium, playwright and jupyterlab are present."""
    if not (os.path.isfile(CHROMIUM) and os.access(CHROMIUM, os.X_OK)):
        pytest.skip(f"BROWSER TEST SKIPPED: no Chromium at {CHROMIUM}. Install Debian's package "
                    "(apt-get install chromium) or set DUSTKIT_CHROMIUM to a Chromium executable.")
    try:
        from playwright.sync_api import sync_playwright  # noqa: F401
    except ImportError as exc:
        pytest.skip(f"BROWSER TEST SKIPPED: the playwright Python package is missing ({exc}). "
                    "pip install playwright (do not run 'playwright install'; the test uses Debian's chromium).")
    for module in ("jupyterlab", "ipympl", "ipywidgets"):
        pytest.importorskip(module, reason=f"BROWSER TEST SKIPPED: {module} is not installed (pip install {module}).")


def _free_port():
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class _Lab:
    """A JupyterLab server in its own process group; stopped through its Popen handle."""

    def __init__(self, root, env, log_path):
        self.port = _free_port()
        self.token = secrets.token_hex(16)
        self.url = f"http://127.0.0.1:{self.port}"
        self.log_path = log_path
        cmd = [
            sys.executable, "-m", "jupyterlab", "--no-browser", "--ip=127.0.0.1", f"--port={self.port}",
            "--ServerApp.port_retries=0", f"--IdentityProvider.token={self.token}",
            f"--ServerApp.root_dir={root}", "--allow-root", "--LabApp.expose_app_in_browser=True",
            "--LabApp.news_url=None", "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate",
        ]
        self._log = open(log_path, "wb")
        self.proc = subprocess.Popen(cmd, cwd=root, env=env, stdout=self._log, stderr=subprocess.STDOUT,
                                     start_new_session=True)

    def log_tail(self, n=40):
        self._log.flush()
        return "\n".join(Path(self.log_path).read_text(errors="replace").splitlines()[-n:])

    def wait_ready(self, timeout=90):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"JupyterLab exited with code {self.proc.returncode}:\n{self.log_tail()}")
            try:
                with urllib.request.urlopen(f"{self.url}/api/status?token={self.token}", timeout=2) as r:
                    if r.status == 200:
                        return
            except OSError:
                pass
            time.sleep(0.3)
        raise RuntimeError(f"JupyterLab did not answer within {timeout} s:\n{self.log_tail()}")

    def stop(self):
        """Ask the server to shut down (it stops its kernels), then terminate its process group if needed."""
        if self.proc.poll() is None:
            try:
                req = urllib.request.Request(f"{self.url}/api/shutdown?token={self.token}", method="POST")
                urllib.request.urlopen(req, timeout=5).close()
            except OSError:
                pass
            try:
                self.proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                for sig, wait in ((signal.SIGTERM, 10), (signal.SIGKILL, 5)):
                    try:
                        os.killpg(self.proc.pid, sig)  # the group we created for this server
                    except ProcessLookupError:
                        break
                    try:
                        self.proc.wait(timeout=wait)
                        break
                    except subprocess.TimeoutExpired:
                        continue
        self._log.close()


_KERNEL_IDLE = """() => {
  const app = window.jupyterapp;
  const w = app && app.shell.currentWidget;
  const k = w && w.sessionContext && w.sessionContext.session && w.sessionContext.session.kernel;
  return !!k && k.status === 'idle';
}"""


# (non-white pixels, checksum) of an ipympl canvas: its first <canvas> holds the figure image
_CANVAS_STATE = """c => {
  if (!c.width || !c.height) return [0, 0];  // not sized yet
  const d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data;
  let nonwhite = 0, sum = 0;
  for (let i = 0; i < d.length; i += 4) {
    if (d[i + 3] > 0 && (d[i] < 250 || d[i + 1] < 250 || d[i + 2] < 250)) nonwhite++;
    sum = (sum * 31 + d[i] + 7 * d[i + 1] + 13 * d[i + 2]) % 1000000007;
  }
  return [nonwhite, sum];
}"""


def _drawn_canvas(canvas, timeout=120.0, differs_from=None):
    """Wait until the canvas shows a figure (not blank), unchanged over two looks, and unlike ``differs_from``."""
    deadline = time.monotonic() + timeout
    last = None
    while time.monotonic() < deadline:
        state = canvas.evaluate(_CANVAS_STATE)
        drawn = state[0] > 5000  # a blank canvas has no non-white pixels; a drawn profile ~50000
        if drawn and state == last and state != differs_from:
            return state
        last = state
        time.sleep(0.7)
    raise AssertionError(f"the profile canvas did not show a (new) figure within {timeout:g} s "
                         f"(last state {last}, previous {differs_from})")


def test_explorer_in_jupyterlab_changes_law_and_redraws(tmp_path, jupyter_dirs):
    _requirements()
    from playwright.sync_api import sync_playwright

    root = tmp_path / "lab"
    shots = tmp_path / "screenshots"
    root.mkdir()
    shots.mkdir()
    shutil.copy(NOTEBOOK, root / NOTEBOOK.name)  # JupyterLab autosaves: never serve the repository's file
    env = dict(os.environ, **jupyter_dirs)
    env.pop("MPLBACKEND", None)

    lab = _Lab(root, env, tmp_path / "jupyterlab.log")
    page_errors, console_errors = [], []
    try:
        lab.wait_ready()
        with sync_playwright() as p:
            browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS, headless=True)
            try:
                ctx = browser.new_context(viewport={"width": 1500, "height": 1400})
                # only the local server: anything else (CDNs, fonts, telemetry) is refused
                ctx.route("**/*", lambda r: r.continue_() if r.request.url.startswith(
                    (lab.url, "data:", "blob:")) else r.abort())
                page = ctx.new_page()
                page.on("pageerror", lambda e: page_errors.append(str(e)))
                page.on("console", lambda m: console_errors.append(m.text) if m.type == "error" else None)
                page.set_default_timeout(120_000)

                page.goto(f"{lab.url}/lab/tree/{NOTEBOOK.name}?token={lab.token}")
                page.wait_for_function(_KERNEL_IDLE, timeout=120_000)
                page.evaluate("() => window.jupyterapp.shell.collapseLeft()")  # more room for the panel

                # Run > Run All Cells, through the menu as a user would
                page.locator('.lm-MenuBar-itemLabel:text-is("Run")').click()
                page.locator('.lm-Menu-itemLabel:text-is("Run All Cells")').click()

                # the explorer appears; the next cells select the Long Shadow sight line and the J band
                panel = page.locator(".dustkit-explorer").first
                law = panel.locator(".dustkit-law select")
                law.wait_for(state="visible", timeout=180_000)
                status = panel.locator(".dustkit-status")
                status.filter(has_text="Sight line l = 58.00").wait_for(timeout=180_000)
                page.wait_for_function(_KERNEL_IDLE, timeout=120_000)
                profile = panel.locator(".dustkit-profile canvas").first
                profile.scroll_into_view_if_needed()
                state_before = _drawn_canvas(profile)
                before = profile.screenshot(path=str(shots / "profile_before.png"))
                assert page.locator(".dustkit-status.dustkit-error").count() == 0, status.inner_text()

                # change the law through the page
                labels = law.locator("option").evaluate_all("os => os.map(o => o.textContent.trim())")
                choice = [t for t in labels if t.split()[0] == NEW_LAW]  # (ipywidgets shows spaces as nbsp)
                assert choice, f"no option for {NEW_LAW!r} in the law menu: {labels}"
                law.select_option(label=choice[0])

                # kernel side: the model was rebuilt with the new law (the observer ran, no error)
                status.filter(has_text=f"law {NEW_LAW}").wait_for(timeout=180_000)
                assert page.locator(".dustkit-status.dustkit-error").count() == 0, status.inner_text()
                # browser side: the profile canvas shows a new picture (A_J = 0.257 A_V instead of 0.282)
                _drawn_canvas(profile, differs_from=state_before)
                after = profile.screenshot(path=str(shots / "profile_after.png"))
                assert after != before, "the profile did not change on the page after the law changed"

                shot = shots / "explorer_after_law_change.png"
                panel.screenshot(path=str(shot))
                page.screenshot(path=str(shots / "jupyterlab_window.png"))
                shutil.copy(shot, SHOT_COPY)

                # the second explorer (3-D density model): tick "Show dust features" as a user would
                panel2 = page.locator(".dustkit-explorer").nth(1)
                status2 = panel2.locator(".dustkit-status")
                status2.filter(has_text="Sight line l = 58.00").wait_for(timeout=180_000)
                page.wait_for_function(_KERNEL_IDLE, timeout=120_000)
                sky2 = panel2.locator(".dustkit-sky canvas").first
                sky2.scroll_into_view_if_needed()
                sky_before = _drawn_canvas(sky2)
                panel2.locator(".dustkit-feature-layer input[type=checkbox]").check()
                status2.filter(has_text="dust feature(s) with probability >= 0.99").wait_for(timeout=120_000)
                assert page.locator(".dustkit-status.dustkit-error").count() == 0, status2.inner_text()
                # the table lists them: the invented Long Shadow located (distance +- error), the two
                # near clouds only bounded ("nearer than"); the map shows their circles
                table = panel2.locator(".dustkit-feature-table")
                table.filter(has_text="nearer than").wait_for(timeout=60_000)
                assert "±" in table.inner_text() and table.locator("tr").count() >= 2
                _drawn_canvas(sky2, differs_from=sky_before)
                # the least-probability slider (free once the look-elsewhere cut is unticked), moved
                # with the keyboard (its handle takes arrow keys)
                panel2.locator(".dustkit-look-elsewhere input[type=checkbox]").uncheck()
                handle = panel2.locator(".dustkit-min-probability .noUi-handle").first
                handle.focus()
                handle.press("Home")
                status2.filter(has_text="probability >= 0.50").wait_for(timeout=60_000)
                panel2.screenshot(path=str(shots / "explorer_dust_features.png"))
                print(f"\nscreenshots: {shots} (panel also copied to {SHOT_COPY})")

                # no cell ended in a Python error
                assert page.locator('[data-mime-type="application/vnd.jupyter.error"]').count() == 0
            finally:
                browser.close()
    finally:
        lab.stop()

    # JavaScript errors on the page would mean the widgets failed to render or update
    assert page_errors == [], f"JavaScript errors on the page: {page_errors}"
    ours = [m for m in console_errors if "dustkit" in m.lower()]
    assert ours == [], f"console errors mentioning dustkit: {ours}"
