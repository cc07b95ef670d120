"""``ensemblelab explore [PATH]``: serve the linked explorer in the browser with Voila.

The notebook Voila runs is generated into a temporary folder; it reads the
data path from a JSON literal written into its first cell (no code is built
from user input). Default PATH: the shipped demo data (``demo_data/`` in the
source tree), or, when the package is installed elsewhere, a copy regenerated
into the user cache folder.

Safety: the server listens on 127.0.0.1 only and needs a random token (printed in
the URL, ``?token=...``; it travels in a 0600 configuration file, never on a
command line other users could read); requests whose ``Host`` is not a loopback
name (DNS rebinding) or whose ``Origin`` does not match are refused
(``--allow-host NAME`` adds a name); kernels of closed or idle pages are culled
after ``--idle-timeout`` seconds and at most ``--max-kernels`` pages run at once;
exports go to one folder chosen at start (``--exports``, default
``<data>.exports/`` beside the data) and never outside it.
"""

from __future__ import annotations

import argparse
import json
import os
import secrets
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from .._atomic import atomic_file

__all__ = ["register", "default_data_path", "write_notebook", "voila_command", "free_port",
           "wait_for_port", "stop_process_group", "write_server_config", "default_exports",
           "LOOPBACK_NAMES"]

#: host names accepted in the Host header besides loopback addresses
LOOPBACK_NAMES = ("localhost",)

#: front-end extensions Voila need not load (one of them raises a harmless runtime error)
DENYLIST = ("@jupyter-notebook/lab-extension", "@voila-dashboards/jupyterlab-preview",
            "jupyterlab_pygments")


def register(subparsers: Any) -> None:
    """Add the ``explore`` sub-command."""
    p = subparsers.add_parser(
        "explore", help="serve the linked explorer (Voila on 127.0.0.1) and print its URL",
        description="Serve the linked explorer of an ensemble in the browser (Voila on "
                    "127.0.0.1). Default: the shipped, invented demo ensemble.")
    p.add_argument("path", nargs="?", default=None,
                   help="ensemble to explore (native store, extended-XYZ folder or table); "
                        "default: the demo data")
    p.add_argument("--port", type=int, default=0, help="port (default: a free one)")
    p.add_argument("--nonfinite", choices=("keep", "raise"), default="keep",
                   help="what to do with NaN/inf values in the data (default: keep them; "
                        "the quality view flags those trajectories)")
    p.add_argument("--notebook-dir", default=None,
                   help="where to write the generated notebook (default: a temporary folder)")
    p.add_argument("--exports", default=None,
                   help="the only folder the export panel may write to (default: "
                        "<data>.exports beside the data)")
    p.add_argument("--allow-host", action="append", default=[], metavar="NAME",
                   help="also accept this Host name (default: loopback names only)")
    p.add_argument("--idle-timeout", type=int, default=1800,
                   help="seconds after which the kernel of an idle or closed page is culled "
                        "(default 1800)")
    p.add_argument("--max-kernels", type=int, default=4,
                   help="most explorer pages (kernels) served at once (default 4)")
    p.add_argument("--observable", choices=("photoelectron", "absorption", "scattering"),
                   default="photoelectron",
                   help="the map shown first (the map view's observable switch; default "
                        "photoelectron). The demo gets invented transition strengths for "
                        "its absorption map; other data need their own")
    p.set_defaults(func=run)


def default_data_path() -> Path:
    """The demo data: ``demo_data/`` beside the package sources, else a cached regenerated copy."""
    here = Path(__file__).resolve()
    for parent in here.parents[1:4]:
        for candidate in (parent / "demo_data" / "ensemble", parent / "demo_data"):
            if candidate.is_dir() and (any(candidate.glob("*.xyz*"))
                                       or (candidate / "manifest.json").exists()):
                return candidate
    cache = Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "ensemblelab"
    target = cache / "demo_data"
    if not (target.is_dir() and any(target.glob("*.xyz*"))):
        from ..demo import make_ensemble
        from ..io import write_extxyz

        cache.mkdir(parents=True, exist_ok=True)
        print(f"ensemblelab explore: writing the demo ensemble to {target} ...", file=sys.stderr)
        write_extxyz(make_ensemble(), target, compress=True)
    return target


def write_notebook(folder: str | os.PathLike[str], data_path: str | os.PathLike[str], *,
                   nonfinite: str = "keep", explorer: dict[str, Any] | None = None,
                   observable: str = "photoelectron", demo_strengths: bool = False) -> Path:
    """Write the explorer notebook for `data_path` into `folder`; returns its path.

    `observable` is the map shown first; `demo_strengths` adds the invented transition
    strengths of :mod:`ensemblelab.demo.strengths` when the data have none (the demo).
    """
    import nbformat

    data_path = Path(data_path).resolve()
    # a measured map shipped with the data: inside the data folder or beside it
    found = [p for p in (data_path / "measured_map.csv", data_path.parent / "measured_map.csv")
             if data_path.is_dir() and p.is_file()]
    config = {"path": str(data_path), "nonfinite": nonfinite,
              "measured": str(found[0]) if found else None,
              "explorer": dict(explorer or {}), "observable": str(observable),
              "demo_strengths": bool(demo_strengths)}
    literal = json.dumps(json.dumps(config))
    cells = [
        nbformat.v4.new_code_cell(
            "import json\n"
            "import ensemblelab\n"
            "from ensemblelab.widgets import Explorer\n"
            f"config = json.loads({literal})\n"
            "ens = ensemblelab.load(config['path'], nonfinite=config['nonfinite'], "
            "progress=False)\n"
            "if config['demo_strengths'] and ens.transition_strengths is None:\n"
            "    # invented, labelled in ens.metadata (the demo's absorption map needs them)\n"
            "    from ensemblelab.demo.strengths import with_demo_transition_strengths\n"
            "    ens = with_demo_transition_strengths(ens)\n"
            "measured = None\n"
            "if config['measured']:\n"
            "    from ensemblelab.io.maps import load_measured_map\n"
            "    measured = load_measured_map(config['measured'])\n"
            "app = Explorer(ens, data_path=config['path'], measured=measured, "
            "**config['explorer'])\n"
            "if config['observable'] != 'photoelectron' and app.observable_switch is not None:\n"
            "    app.observable_switch.show(config['observable'])\n"
            "app"),
    ]
    nb = nbformat.v4.new_notebook(cells=cells)
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3",
                                 "language": "python"}
    path = Path(folder) / "ensemblelab_explorer.ipynb"
    with atomic_file(path, "w", encoding="utf-8") as fh:
        nbformat.write(nb, fh)
    return path


def default_exports(data: Path, *, demo: bool) -> Path:
    """``<data>.exports`` beside the data; for the shipped demo, in the user cache folder."""
    if demo:
        cache = Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "ensemblelab"
        return cache / "demo.exports"
    data = Path(data).resolve()
    return data.with_name(data.name + ".exports")


def write_server_config(folder: str | os.PathLike[str], *, token: str,
                        allow_hosts: list[str] | tuple[str, ...] = (),
                        idle_timeout: int = 1800, max_kernels: int = 4) -> Path:
    """Write ``voila.json`` (mode 0600) with the token, host checks, culling and kernel cap.

    Voila reads it from its working folder. Returns its path.
    """
    if idle_timeout < 1 or max_kernels < 1:
        raise ValueError("--idle-timeout and --max-kernels must be >= 1.")
    config = {
        "Voila": {
            "token": token,
            "tornado_settings": {
                "allow_remote_access": False,  # check the Host header: loopback names only
                "local_hostnames": [*LOOPBACK_NAMES, *allow_hosts],
                "allow_origin": "",  # websockets and API calls: Origin must match Host
            },
        },
        "VoilaConfiguration": {
            "multi_kernel_manager_class": "ensemblelab.cli._voila_kernels.CappedKernelManager",
        },
        "CappedKernelManager": {"max_kernels": int(max_kernels)},
        "MappingKernelManager": {
            "cull_idle_timeout": int(idle_timeout),
            "cull_interval": max(1, min(60, int(idle_timeout) // 2)),
            "cull_connected": True,  # an open but idle page is culled too
            "cull_busy": False,
        },
    }
    path = Path(folder) / "voila.json"
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        os.fchmod(fh.fileno(), 0o600)
        json.dump(config, fh)
    return path


def free_port() -> int:
    """A TCP port free on 127.0.0.1 now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def voila_command(notebook: str | os.PathLike[str], port: int) -> list[str]:
    """The Voila command line serving `notebook` on 127.0.0.1:`port` (no browser)."""
    cmd = [sys.executable, "-m", "voila", str(notebook), f"--port={int(port)}",
           "--Voila.ip=127.0.0.1", "--no-browser", "--Voila.port_retries=0",
           "--VoilaConfiguration.show_tracebacks=True"]
    cmd += [f"--VoilaConfiguration.extension_denylist={name}" for name in DENYLIST]
    return cmd


def wait_for_port(port: int, *, timeout: float = 60.0, proc: Any = None) -> bool:
    """Wait until something listens on 127.0.0.1:`port` (a TCP connect, no HTTP request)."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if proc is not None and proc.poll() is not None:
            return False
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            s.settimeout(0.5)
            if s.connect_ex(("127.0.0.1", port)) == 0:
                return True
        time.sleep(0.2)
    return False


def stop_process_group(proc: subprocess.Popen, *, timeout: float = 10.0) -> None:
    """Stop a process started with ``start_new_session=True`` and all its children."""
    if proc.poll() is not None:
        return
    try:
        pgid = os.getpgid(proc.pid)
    except ProcessLookupError:
        return
    os.killpg(pgid, signal.SIGTERM)
    try:
        proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        os.killpg(pgid, signal.SIGKILL)
        proc.wait(timeout=timeout)


def run(args: argparse.Namespace) -> int:
    """Serve the explorer until interrupted."""
    from ..errors import UnknownFormatError

    data = Path(args.path).expanduser() if args.path else default_data_path()
    if not data.exists():
        raise UnknownFormatError(f"{data}: no such file or folder. Hint: pass the path of an "
                                 "ensemble, or nothing for the demo data.")
    folder = Path(args.notebook_dir) if args.notebook_dir else Path(
        tempfile.mkdtemp(prefix="ensemblelab-explore-"))
    folder.mkdir(parents=True, exist_ok=True)
    exports = (Path(args.exports).expanduser() if args.exports
               else default_exports(data, demo=args.path is None)).resolve()
    exports.mkdir(parents=True, exist_ok=True)
    notebook = write_notebook(folder, data, nonfinite=args.nonfinite,
                              explorer={"export_folder": str(exports)},
                              observable=args.observable, demo_strengths=args.path is None)
    token = secrets.token_hex(24)
    write_server_config(folder, token=token, allow_hosts=list(args.allow_host),
                        idle_timeout=args.idle_timeout, max_kernels=args.max_kernels)
    port = int(args.port) or free_port()
    proc = subprocess.Popen(voila_command(notebook, port), cwd=str(folder),
                            start_new_session=True)

    def _terminate(signum: int, frame: Any) -> None:  # SIGTERM: stop Voila too
        raise SystemExit(0)

    previous = signal.signal(signal.SIGTERM, _terminate)
    try:
        if not wait_for_port(port, timeout=120.0, proc=proc):
            print("ensemblelab explore: error: the Voila server did not start "
                  f"(exit status {proc.poll()}).", file=sys.stderr)
            return 1
        print(f"ensemblelab explorer of {data} at http://127.0.0.1:{port}/?token={token}",
              flush=True)
        print(f"(exports go to {exports})", flush=True)
        print("(first render takes a few seconds; press Ctrl-C to stop)", flush=True)
        return int(proc.wait() or 0)
    except KeyboardInterrupt:
        return 0
    finally:
        stop_process_group(proc)
        signal.signal(signal.SIGTERM, previous)
