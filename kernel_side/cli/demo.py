"""Subcommands ``jostle demo`` (the tour notebooks in JupyterLab) and ``jostle present`` (Voila).

``demo`` copies the notebooks shipped in ``jostle.demo_notebooks`` into a folder the user
owns and never overwrites a file already there, so edits survive a second run. Both
commands run their server in this process, bound to 127.0.0.1, with a kernel that is
this very Python (the one jostle is installed in), whatever other kernels the machine has.
"""
from __future__ import annotations

import argparse
import contextlib
import json
import os
import secrets
import signal
import socket
import sys
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

from jostle.cli.errors import CommandError
from jostle.common.checks import check_int

__all__ = ["FIRST_TOUR", "CopyReport", "copy_demo_notebooks", "register"]

FIRST_TOUR = "01_first_tour.ipynb"
DEFAULT_DEMO_DIR = "jostle-demo"
LAB_FIRST_PORT = 8888
VOILA_FIRST_PORT = 8866
HOST = "127.0.0.1"
KERNEL_NAME = "python3"


@dataclass
class CopyReport:
    """What :func:`copy_demo_notebooks` did, as paths relative to the target folder."""

    copied: list[str] = field(default_factory=list)
    unchanged: list[str] = field(default_factory=list)
    kept_edited: list[str] = field(default_factory=list)

    def lines(self) -> list[str]:
        out = [f"copied {name}" for name in self.copied]
        out += [f"kept your edited copy of {name} (delete it to get the shipped version back)"
                for name in self.kept_edited]
        if self.unchanged:
            out.append(f"{len(self.unchanged)} file(s) already up to date")
        return out


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add ``demo`` and ``present``."""
    demo = subparsers.add_parser(
        "demo", help="copy the tour notebooks into a folder and open the first one in JupyterLab",
        description="Copy jostle's tour notebooks into a working folder (files already there are kept), "
                    "then start JupyterLab there and open the first tour.",
    )
    demo.add_argument("--dir", default=DEFAULT_DEMO_DIR,
                      help=f"working folder for the notebooks (default: ./{DEFAULT_DEMO_DIR})")
    demo.add_argument("--port", type=int, help=f"port on {HOST} (default: first free from {LAB_FIRST_PORT})")
    demo.add_argument("--no-browser", action="store_true", help="print the address instead of opening a browser")
    demo.set_defaults(handler=_demo)

    present = subparsers.add_parser(
        "present", help="serve a notebook as an app with Voila (code hidden)",
        description="Run a notebook with Voila and serve its outputs and widgets, without the code cells.",
    )
    present.add_argument("notebook", help="the .ipynb file to present")
    present.add_argument("--port", type=int, help=f"port on {HOST} (default: first free from {VOILA_FIRST_PORT})")
    present.add_argument("--no-browser", action="store_true", help="print the address instead of opening a browser")
    present.set_defaults(handler=_present)


def copy_demo_notebooks(target: str | os.PathLike) -> CopyReport:
    """Copy the shipped demo files into ``target``, leaving every existing file alone.

    Parameters
    ----------
    target : path
        The working folder; created if missing.

    Returns
    -------
    CopyReport
        Which files were copied, which were already identical, which differ (the user's edits).
    """
    target = Path(target)
    if target.exists() and not target.is_dir():
        raise CommandError(f"--dir must be a folder; got {str(target)!r}, which is a file")
    target.mkdir(parents=True, exist_ok=True)
    report = CopyReport()
    for relative, source in _shipped_files(resources.files("jostle.demo_notebooks"), ""):
        destination = target / relative
        data = source.read_bytes()
        if destination.exists():
            same = destination.is_file() and destination.read_bytes() == data
            (report.unchanged if same else report.kept_edited).append(relative)
            continue
        destination.parent.mkdir(parents=True, exist_ok=True)
        _write_new(destination, data)
        report.copied.append(relative)
    return report


# ---------------------------------------------------------------------------- handlers
def _demo(args: argparse.Namespace) -> int:
    port = _choose_port(args.port, LAB_FIRST_PORT)
    target = Path(args.dir).expanduser().resolve()
    report = copy_demo_notebooks(target)
    for line in report.lines():
        print(f"jostle demo: {line}")
    if not (target / FIRST_TOUR).is_file():
        raise CommandError(f"the first tour {FIRST_TOUR} is missing from {target}; reinstall jostle")
    token = secrets.token_hex(24)
    print(f"jostle demo: JupyterLab for {target}\n"
          f"jostle demo: open http://{HOST}:{port}/lab/tree/{FIRST_TOUR}?token={token}\n"
          f"jostle demo: press Ctrl-C to stop", flush=True)
    argv = [
        FIRST_TOUR, f"--ServerApp.root_dir={target}", f"--ip={HOST}", f"--port={port}",
        "--ServerApp.port_retries=0", f"--IdentityProvider.token={token}",
    ]
    if args.no_browser:
        argv.append("--no-browser")
    if hasattr(os, "geteuid") and os.geteuid() == 0:
        # Containers often run as root; JupyterLab refuses that unless told it is deliberate.
        argv.append("--allow-root")
    from jupyterlab.labapp import LabApp

    with _working_directory(target), _kernel_of_this_python():
        server = LabApp.initialize_server(argv=argv)
        _stop_on_sigint(server)
        server.start()
    return 0


def _present(args: argparse.Namespace) -> int:
    notebook = Path(args.notebook).expanduser().resolve()
    if notebook.suffix != ".ipynb" or not notebook.is_file():
        raise CommandError(f"NOTEBOOK must be an existing .ipynb file; got {args.notebook!r}")
    port = _choose_port(args.port, VOILA_FIRST_PORT)
    print(f"jostle present: {notebook.name} at http://{HOST}:{port}/ (press Ctrl-C to stop)", flush=True)
    argv = [str(notebook), f"--port={port}", f"--Voila.ip={HOST}", "--Voila.port_retries=0"]
    if args.no_browser:
        argv.append("--no-browser")
    try:
        from voila.app import Voila
    except ImportError:
        raise CommandError("present needs Voila; install it with: pip install 'jostle[present]'") from None
    with _working_directory(notebook.parent), _kernel_of_this_python():
        # Voila stops its kernels itself on SIGTERM and on Ctrl-C.
        Voila.launch_instance(argv=argv)
    return 0


# ---------------------------------------------------------------------------- helpers
def _shipped_files(folder, prefix: str) -> Iterator[tuple[str, object]]:
    for entry in sorted(folder.iterdir(), key=lambda e: e.name):
        if entry.name.startswith(("__", ".")):
            continue
        name = f"{prefix}{entry.name}"
        if entry.is_dir():
            yield from _shipped_files(entry, f"{name}/")
        else:
            yield name, entry


def _write_new(path: Path, data: bytes) -> None:
    """Write ``path`` atomically, and never over a file that appeared meanwhile."""
    fd, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
        os.link(temporary, path)
    except FileExistsError:
        pass
    except OSError:
        # Some file systems have no hard links; exclusive creation still never overwrites.
        with contextlib.suppress(FileExistsError), open(path, "xb") as handle:
            handle.write(data)
    finally:
        os.unlink(temporary)


def _choose_port(requested: int | None, first: int) -> int:
    if requested is not None:
        try:
            port = check_int("--port", requested, low=1, high=65535)
        except ValueError as err:
            raise CommandError(str(err)) from None
        if not _port_is_free(port):
            raise CommandError(f"--port {port} is already in use on {HOST}; choose another")
        return port
    for port in range(first, first + 50):
        if _port_is_free(port):
            return port
    raise CommandError(f"no free port in {first}..{first + 49} on {HOST}; pass one with --port")


def _port_is_free(port: int) -> bool:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        try:
            sock.bind((HOST, port))
        except OSError:
            return False
    return True


def _stop_on_sigint(server) -> None:
    """Make Ctrl-C shut the server down cleanly (kernels included) when stdin is no terminal.

    At a terminal JupyterLab asks for confirmation itself; elsewhere a bare
    KeyboardInterrupt would leave the loop without shutting the kernels down.
    """
    if not (sys.stdin and sys.stdin.isatty()):
        signal.signal(signal.SIGINT, lambda sig, frame: server.stop(from_signal=True))


@contextlib.contextmanager
def _working_directory(path: Path) -> Iterator[None]:
    previous = os.getcwd()
    os.chdir(path)
    try:
        yield
    finally:
        os.chdir(previous)


@contextlib.contextmanager
def _kernel_of_this_python() -> Iterator[None]:
    """Put a ``python3`` kernelspec naming ``sys.executable`` first on JUPYTER_PATH.

    The notebooks ask for ``python3``; a user-wide kernel of that name may be another
    Python without jostle, so this one takes precedence while the server runs.
    """
    previous = os.environ.get("JUPYTER_PATH")
    with tempfile.TemporaryDirectory(prefix="jostle-kernel-") as base:
        kernel_dir = Path(base) / "kernels" / KERNEL_NAME
        kernel_dir.mkdir(parents=True)
        spec = {"argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
                "display_name": "Python 3 (jostle)", "language": "python"}
        (kernel_dir / "kernel.json").write_text(json.dumps(spec), encoding="utf-8")
        os.environ["JUPYTER_PATH"] = os.pathsep.join(p for p in (base, previous) if p)
        try:
            yield
        finally:
            if previous is None:
                os.environ.pop("JUPYTER_PATH", None)
            else:
                os.environ["JUPYTER_PATH"] = previous
