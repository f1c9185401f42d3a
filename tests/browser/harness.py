"""Real-browser test harness: JupyterLab, Voila and headless Chromium driven by Playwright.

Servers listen on 127.0.0.1 only, on ports the OS reports free; each runs in its own
process group, is asked to stop with SIGTERM (which shuts its kernels down) and is then
killed with its group. Every wait is bounded and says what it waited for when it gives up.
"""
from __future__ import annotations

import contextlib
import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

CHROMIUM = Path("/usr/bin/chromium")
# These work as root on a machine with no network (see the design notes).
CHROMIUM_ARGS = [
    "--no-sandbox", "--disable-gpu", "--disable-background-networking",
    "--disable-component-update", "--disable-sync", "--no-first-run",
]
REPO_ROOT = Path(__file__).resolve().parents[2]
ARTIFACTS = REPO_ROOT / "test-artifacts"
KERNEL_NAME = "python3"
SERVER_START_TIMEOUT_S = 90.0
NOTEBOOK_RUN_TIMEOUT_S = 120.0
WIDGET_TIMEOUT_S = 120.0


# ---------------------------------------------------------------------------- environment
def require_chromium() -> None:
    """Skip when Chromium is missing on a developer machine; fail in CI, which installs it."""
    if CHROMIUM.is_file():
        return
    message = f"headless Chromium is not installed at {CHROMIUM} (Debian package 'chromium')"
    if os.environ.get("CI", "").lower() in {"1", "true", "yes"}:
        pytest.fail(f"{message}; .ci/run should have installed it", pytrace=False)
    pytest.skip(f"{message}; install it to run the browser tests")


def free_port() -> int:
    """A localhost port nothing listens on right now (the OS picks it when binding port 0)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def jupyter_environment(base: Path) -> dict[str, str]:
    """Environment for a test server: this interpreter's kernel, scratch config and data folders.

    The kernelspec names ``sys.executable`` outright, so the kernel that runs the notebook
    is the test environment's Python whatever other kernels the machine has.
    """
    kernel_dir = base / "data" / "kernels" / KERNEL_NAME
    kernel_dir.mkdir(parents=True, exist_ok=True)
    spec = {
        "argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
        "display_name": "Python 3 (jostle tests)",
        "language": "python",
    }
    (kernel_dir / "kernel.json").write_text(json.dumps(spec), encoding="utf-8")
    (base / "config").mkdir(exist_ok=True)
    (base / "runtime").mkdir(exist_ok=True)
    env = dict(os.environ)
    env.update(
        JUPYTER_PATH=str(base / "data"),
        JUPYTER_CONFIG_DIR=str(base / "config"),
        JUPYTER_RUNTIME_DIR=str(base / "runtime"),
        JUPYTER_PLATFORM_DIRS="1",
        PYTHONUNBUFFERED="1",
        OMP_NUM_THREADS=env.get("OMP_NUM_THREADS", "2"),
    )
    env.pop("JUPYTERLAB_SETTINGS_DIR", None)
    env.pop("JUPYTERLAB_WORKSPACES_DIR", None)
    return env


def write_lab_settings(settings_dir: Path) -> None:
    """User settings: every notebook output stays in the DOM (windowing off), and no
    notification toast (the news prompt) sits over the widgets a test clicks."""
    settings = {
        ("notebook-extension", "tracker"): {"windowingMode": "none"},
        ("apputils-extension", "notification"): {"fetchNews": "false", "checkForUpdates": False,
                                                 "doNotDisturbMode": True},
    }
    for (plugin, name), values in settings.items():
        path = settings_dir / "@jupyterlab" / plugin / f"{name}.jupyterlab-settings"
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(values), encoding="utf-8")


def write_notebook(path: Path, cells: list[str | tuple[str, str]]) -> Path:
    """Write an nbformat v4 notebook whose kernelspec names the test kernel.

    ``cells`` holds code strings, or ``("markdown", text)`` / ``("code", text)`` pairs.
    """
    import nbformat

    nb = nbformat.v4.new_notebook()
    nb.metadata["kernelspec"] = {"name": KERNEL_NAME, "display_name": "Python 3", "language": "python"}
    nb.metadata["language_info"] = {"name": "python"}
    for cell in cells:
        kind, source = ("code", cell) if isinstance(cell, str) else cell
        maker = nbformat.v4.new_code_cell if kind == "code" else nbformat.v4.new_markdown_cell
        nb.cells.append(maker(source))
    nbformat.validate(nb)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    nbformat.write(nb, str(path))
    return path


# ---------------------------------------------------------------------------- servers
@dataclass
class Server:
    """A server process started by a test, with its log and base URL."""

    name: str
    process: subprocess.Popen
    url: str
    log_path: Path
    token: str = ""
    root: Path | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    def log_tail(self, chars: int = 4000) -> str:
        try:
            return self.log_path.read_text(encoding="utf-8", errors="replace")[-chars:]
        except OSError:
            return "(no log)"

    def stop(self, timeout: float = 15.0) -> int | None:
        """Terminate (SIGTERM to the process group), then kill whatever is left."""
        return stop_process_group(self.process, timeout)


def start_server(name: str, command: list[str], cwd: Path, env: dict[str, str], log_path: Path,
                 ready_url: str, url: str, token: str = "", root: Path | None = None,
                 timeout: float = SERVER_START_TIMEOUT_S, any_status: bool = False) -> Server:
    """Start ``command`` in its own process group and wait until ``ready_url`` answers.

    ``any_status`` counts any HTTP answer as ready (for servers with no cheap 200 page).
    """
    log = open(log_path, "wb")
    process = subprocess.Popen(command, cwd=cwd, env=env, stdout=log, stderr=subprocess.STDOUT,
                               stdin=subprocess.DEVNULL, start_new_session=True, preexec_fn=stop_with_parent)
    log.close()
    server = Server(name, process, url, log_path, token, root)
    try:
        wait_for_http(ready_url, timeout, process=process, what=name, log=server.log_tail, any_status=any_status)
    except BaseException:
        server.stop()
        raise
    return server


def wait_for_http(url: str, timeout: float, process: subprocess.Popen | None = None, what: str = "server",
                  log=None, any_status: bool = False) -> str:
    """Poll ``url`` until it answers 200 (or anything, with ``any_status``); return the body.

    Fails naming the URL, the time waited, the last answer and the server's log.
    """
    deadline = time.monotonic() + timeout
    last = "no answer yet"
    while time.monotonic() < deadline:
        if process is not None and process.poll() is not None:
            tail = log() if log else ""
            raise AssertionError(f"{what} exited with code {process.returncode} before {url} answered\n{tail}")
        try:
            with urllib.request.urlopen(url, timeout=5) as response:
                if response.status == 200:
                    return response.read().decode("utf-8", errors="replace")
                last = f"HTTP {response.status}"
        except urllib.error.HTTPError as err:
            if any_status:
                return ""
            last = f"HTTP {err.code}"
        except (urllib.error.URLError, OSError) as err:
            last = str(err)
        time.sleep(0.25)
    tail = log() if log else ""
    raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what} at {url} ({last})\n{tail}")


def stop_process_group(process: subprocess.Popen, timeout: float = 15.0) -> int | None:
    """SIGTERM the group ``process`` leads, wait up to ``timeout``, then SIGKILL the group."""
    try:
        pgid = os.getpgid(process.pid)
    except ProcessLookupError:
        pgid = None
    if process.poll() is None and pgid is not None:
        _signal_group(pgid, signal.SIGTERM)
        try:
            process.wait(timeout)
        except subprocess.TimeoutExpired:
            pass
    if pgid is not None:
        # Whatever the server left in its group goes too. Kernels run in sessions of their
        # own: the server shuts them down on SIGTERM, and an orphaned kernel exits by itself
        # when its parent process is gone.
        _signal_group(pgid, signal.SIGKILL)
    try:
        return process.wait(5)
    except subprocess.TimeoutExpired:
        return None


def stop_with_parent() -> None:
    """In the child before exec: on Linux, get SIGTERM if the test process dies.

    A test run killed from outside (a timeout, Ctrl-C twice) skips fixture teardown; the
    server then still shuts itself and its kernels down instead of lingering.
    """
    if sys.platform.startswith("linux"):
        import ctypes

        PR_SET_PDEATHSIG = 1
        ctypes.CDLL(None, use_errno=True).prctl(PR_SET_PDEATHSIG, signal.SIGTERM)


def _signal_group(pgid: int, sig: int) -> None:
    try:
        os.killpg(pgid, sig)
    except (ProcessLookupError, PermissionError):
        pass


def lab_command(port: int, token: str, root: Path, settings_dir: Path, workspaces_dir: Path) -> list[str]:
    """The JupyterLab command line that browser tests rely on (see the design notes)."""
    return [
        sys.executable, "-m", "jupyter", "lab", "--no-browser", "--allow-root", "--ip=127.0.0.1",
        f"--port={port}", "--ServerApp.port_retries=0", f"--IdentityProvider.token={token}",
        "--LabApp.expose_app_in_browser=True", "--LabApp.news_url=",
        "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate",
        f"--ServerApp.root_dir={root}", f"--LabApp.user_settings_dir={settings_dir}",
        f"--LabApp.workspaces_dir={workspaces_dir}",
    ]


def voila_command(notebook: Path, port: int) -> list[str]:
    return [
        sys.executable, "-m", "voila", str(notebook), "--no-browser", f"--port={port}",
        "--Voila.ip=127.0.0.1", "--show_tracebacks=True",
    ]


# ---------------------------------------------------------------------------- browser fixtures
# Defined here rather than in conftest so that tests in other folders can import them.
@pytest.fixture(scope="session")
def chromium_browser():
    """Headless Debian Chromium (no browser download is possible here)."""
    require_chromium()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS, headless=True)
        try:
            yield browser
        finally:
            browser.close()


@pytest.fixture
def page(chromium_browser):
    """A fresh browser context and page that fails the test on uncaught page errors."""
    context = chromium_browser.new_context(viewport={"width": 1400, "height": 1000})
    page = context.new_page()
    block_outside_traffic(page)
    errors = PageErrors(page)
    yield page
    context.close()
    errors.check()


# ---------------------------------------------------------------------------- pages
class PageErrors:
    """Collects the page's uncaught errors (``pageerror`` events) so a test can fail on them."""

    def __init__(self, page):
        self.errors: list[str] = []
        page.on("pageerror", lambda err: self.errors.append(f"pageerror: {err}"))

    def check(self) -> None:
        if self.errors:
            raise AssertionError("the page reported errors:\n" + "\n".join(self.errors))


def block_outside_traffic(page) -> None:
    """Abort every request that is not for 127.0.0.1 (no network is available anyway)."""
    def route(r):
        url = r.request.url
        if url.startswith(("http://127.0.0.1", "ws://127.0.0.1", "data:", "blob:", "about:")):
            r.continue_()
        else:
            r.abort()
    page.route("**/*", route)


def wait_for(scope, testid: str, timeout: float = WIDGET_TIMEOUT_S, state: str = "visible"):
    """The first element with ``data-testid=testid`` inside ``scope`` once it is ``state``."""
    from playwright.sync_api import TimeoutError as PlaywrightTimeout

    locator = scope.get_by_test_id(testid).first
    try:
        locator.wait_for(state=state, timeout=timeout * 1000)
    except PlaywrightTimeout:
        raise AssertionError(
            f"timed out after {timeout:.0f} s waiting for data-testid={testid!r} to be {state}"
        ) from None
    return locator


def wait_until(page, expression: str, arg: Any = None, timeout: float = WIDGET_TIMEOUT_S, what: str = "",
               describe: str | None = None, polling: int | str = 50):
    """Wait until the JavaScript ``expression`` (a function of ``arg``) is truthy; return its value.

    On timeout the error names ``what`` and, when given, the value of the JavaScript
    function ``describe(arg)`` at that moment (what the page showed instead). ``polling``
    is milliseconds or ``"raf"`` (every animation frame).
    """
    from playwright.sync_api import TimeoutError as PlaywrightTimeout

    try:
        return page.wait_for_function(expression, arg=arg, timeout=timeout * 1000, polling=polling).json_value()
    except PlaywrightTimeout:
        seen = ""
        if describe:
            try:
                seen = f"; the page showed {page.evaluate(describe, arg)!r}"[:2000]
            except Exception as err:  # the page may be gone; the timeout is the finding
                seen = f"; (could not read the page: {err})"
        raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what or expression}{seen}") from None


# The notebook panel is found by its path, not as the current tab: the page may hold others.
_FIND_PANEL = """(name) => {
  const app = window.jupyterapp;
  if (!app) return null;
  return Array.from(app.shell.widgets('main')).find(w => w.context && w.context.path === name) || null;
}"""

_NOTEBOOK_READY = f"""(name) => {{
  const panel = ({_FIND_PANEL})(name);
  return !!(panel && panel.context.isReady && panel.sessionContext && panel.sessionContext.session
            && panel.sessionContext.session.kernel);
}}"""

_RUN_ALL = f"""async (name) => {{
  const panel = ({_FIND_PANEL})(name);
  window.jupyterapp.shell.activateById(panel.id);
  await window.jupyterapp.commands.execute('notebook:run-all-cells');
  return true;
}}"""

_NOTEBOOK_DONE = f"""(name) => {{
  const panel = ({_FIND_PANEL})(name);
  if (!panel) return false;
  const kernel = panel.sessionContext.session && panel.sessionContext.session.kernel;
  const cells = panel.content.widgets.filter(c => c.model.type === 'code');
  const errors = [];
  for (const cell of cells) {{
    for (const out of cell.model.outputs.toJSON()) {{
      if (out.output_type === 'error') {{
        errors.push(out.ename + ': ' + out.evalue + '\\n' + (out.traceback || []).join('\\n'));
      }}
    }}
  }}
  if (errors.length) return {{errors}};
  const done = cells.every(c => c.model.executionCount !== null);
  return done && kernel && kernel.status === 'idle' ? {{errors: []}} : false;
}}"""


@contextlib.contextmanager
def lab_notebook(browser, lab: Server, name: str, cells: list[str | tuple[str, str]] | None = None,
                 viewport: tuple[int, int] = (1400, 1000),
                 timeout: float = NOTEBOOK_RUN_TIMEOUT_S) -> Iterator[tuple[Any, PageErrors]]:
    """A fresh browser context and page with notebook ``name`` (written from ``cells`` first,
    when given) open in JupyterLab and every cell run; yields ``(page, errors)``. On leaving,
    the context closes and the page's uncaught errors fail the test."""
    if cells is not None:
        write_notebook(lab.root / name, cells)
    context = browser.new_context(viewport={"width": viewport[0], "height": viewport[1]})
    page = context.new_page()
    block_outside_traffic(page)
    errors = PageErrors(page)
    try:
        open_and_run(page, lab, name, timeout=timeout)
        yield page, errors
    finally:
        context.close()
    errors.check()


def open_and_run(page, lab: Server, name: str, timeout: float = NOTEBOOK_RUN_TIMEOUT_S) -> None:
    """Open ``name`` (relative to the lab root) in JupyterLab, run every cell, wait until done.

    JupyterLab's saved layout is dropped first, so the page opens this notebook alone
    instead of reopening (and rerunning) what an earlier test left open. Fails with the
    traceback if a cell raised.
    """
    forget_workspace(lab)
    page.goto(f"{lab.url}/lab/tree/{name}?token={lab.token}", wait_until="domcontentloaded")
    wait_until(page, _NOTEBOOK_READY, arg=name, timeout=timeout, what=f"JupyterLab to open {name} with a kernel")
    page.evaluate(_RUN_ALL, name)
    result = wait_until(page, _NOTEBOOK_DONE, arg=name, timeout=timeout, what=f"every cell of {name} to finish")
    if result["errors"]:
        raise AssertionError(f"a cell of {name} raised:\n" + "\n\n".join(result["errors"]))


def forget_workspace(lab: Server) -> None:
    """Delete JupyterLab's saved layouts, so the next page restores no earlier notebook."""
    for workspace in _api(lab, "GET", "/lab/api/workspaces").get("workspaces", {}).get("ids", []):
        _api(lab, "DELETE", f"/lab/api/workspaces/{workspace}")


def shutdown_kernels(lab: Server) -> None:
    """Shut down every kernel of ``lab``, so an idle or runaway notebook cannot slow later tests."""
    for kernel in _api(lab, "GET", "/api/kernels") or []:
        _api(lab, "DELETE", f"/api/kernels/{kernel['id']}")


def _api(lab: Server, method: str, path: str) -> Any:
    request = urllib.request.Request(f"{lab.url}{path}?token={lab.token}", method=method)
    try:
        with urllib.request.urlopen(request, timeout=30) as response:
            body = response.read()
    except urllib.error.HTTPError as err:
        if err.code == 404:
            return {}
        raise
    return json.loads(body) if body else {}


def close_all_tabs(page) -> None:
    """Close notebooks (shutting their kernels down) so the next test starts clean."""
    page.evaluate("""async () => {
      const app = window.jupyterapp;
      if (!app) return;
      for (const w of Array.from(app.shell.widgets('main'))) {
        if (w.sessionContext) { await w.sessionContext.shutdown(); }
        if (w.context) { w.context.model.dirty = false; }
        w.dispose();
      }
    }""")


def open_voila(page, voila: Server, timeout: float = NOTEBOOK_RUN_TIMEOUT_S) -> None:
    """Load the Voila page; Voila runs the notebook while it streams the page."""
    page.goto(voila.url + "/", wait_until="domcontentloaded", timeout=timeout * 1000)


def screenshot(target, name: str) -> Path:
    """Save a PNG of a page or element as test-artifacts/<name>.png."""
    ARTIFACTS.mkdir(exist_ok=True)
    path = ARTIFACTS / f"{name}.png"
    target.screenshot(path=str(path))
    return path


# ---------------------------------------------------------------------------- the jostle command
START_TIMEOUT_S = SERVER_START_TIMEOUT_S
STOP_TIMEOUT_S = 30.0


def jostle_command() -> list[str]:
    """The installed ``jostle`` entry point beside this interpreter (or ``python -m jostle.cli``)."""
    script = Path(sys.executable).with_name("jostle")
    return [str(script)] if script.is_file() else [sys.executable, "-m", "jostle.cli"]


def port_closed(port: int) -> bool:
    with socket.socket() as sock:
        return sock.connect_ex(("127.0.0.1", port)) != 0


class JostleCommand:
    """A ``jostle`` subcommand running as a subprocess in its own group, output in a log file."""

    def __init__(self, args: list[str], base: Path):
        self.log_path = base / f"cli-{time.monotonic_ns()}.log"
        self.runtime = base / "runtime"
        with open(self.log_path, "wb") as log:
            self.process = subprocess.Popen(
                jostle_command() + args, env=jupyter_environment(base), stdout=log,
                stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, start_new_session=True,
                preexec_fn=stop_with_parent,
            )

    def log(self) -> str:
        return self.log_path.read_text(encoding="utf-8", errors="replace")

    def wait_for_line(self, pattern: str, timeout: float = START_TIMEOUT_S) -> re.Match:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            match = re.search(pattern, self.log())
            if match:
                return match
            if self.process.poll() is not None:
                break
            time.sleep(0.2)
        raise AssertionError(f"no line matching {pattern!r} within {timeout:.0f} s; output:\n{self.log()[-3000:]}")

    def stop_with(self, sig: int) -> int:
        self.process.send_signal(sig)
        try:
            return self.process.wait(STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired as err:
            stop_process_group(self.process)
            raise AssertionError(
                f"still running {STOP_TIMEOUT_S:.0f} s after signal {sig}:\n{self.log()[-3000:]}"
            ) from err

    def kernel_processes(self) -> list[list[str]]:
        """Command lines of live kernels whose connection file lies in this run's runtime folder."""
        found = []
        for entry in Path("/proc").iterdir():
            if not entry.name.isdigit():
                continue
            try:
                argv = (entry / "cmdline").read_bytes().decode(errors="replace").split("\0")
            except OSError:
                continue
            if "ipykernel_launcher" in argv and any(str(self.runtime) in a for a in argv):
                found.append(argv)
        return found
