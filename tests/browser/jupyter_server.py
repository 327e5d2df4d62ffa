"""A Jupyter server on 127.0.0.1 for browser tests: own config dirs, port and token.

``frontend="lab"`` starts ``jupyter lab`` (JupyterLab 4) and opens notebooks at
``/lab/tree/<name>``; ``frontend="notebook7"`` starts ``jupyter notebook``
(Notebook 7, the ``notebook`` package) and opens them at ``/notebooks/<name>``.
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from dataclasses import dataclass
from pathlib import Path
from typing import Any

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = [
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


# front-end name -> (jupyter subcommand, extra options, notebook URL path template)
FRONTENDS = {
    # The app object on window (window.jupyterapp) lets the test open the side panel
    # and the log console through the front-end's public commands.
    "lab": (
        "lab",
        ["--LabApp.news_url=None", "--LabApp.expose_app_in_browser=True"],
        "/lab/tree/{name}?token={token}&reset",
    ),
    "notebook7": (
        "notebook",
        ["--JupyterNotebookApp.expose_app_in_browser=True"],
        "/notebooks/{name}?token={token}",
    ),
}


@dataclass
class JupyterServer:
    frontend: str
    root: Path
    port: int
    token: str
    process: subprocess.Popen
    log: Path
    log_handle: Any

    def url(self, notebook: str) -> str:
        path = FRONTENDS[self.frontend][2].format(name=notebook, token=self.token)
        return f"http://127.0.0.1:{self.port}{path}"

    def stop(self) -> None:
        try:
            self._stop_process()
        finally:
            self.log_handle.close()

    def _stop_process(self) -> None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=20)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=10)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start_jupyter(
    workdir: Path, notebooks: list[Path], *, frontend: str = "lab", timeout: float = 90.0
) -> JupyterServer:
    """Start the ``frontend``'s server serving copies of ``notebooks`` from ``workdir/root``."""
    if frontend not in FRONTENDS:
        raise ValueError(f"unknown front-end {frontend!r}; use one of {sorted(FRONTENDS)}")
    command, options, _ = FRONTENDS[frontend]
    root = workdir / "root"
    root.mkdir(parents=True)
    for nb in notebooks:
        shutil.copy(nb, root / nb.name)
    env = dict(os.environ)
    for name in ("JUPYTER_CONFIG_DIR", "JUPYTER_DATA_DIR", "JUPYTER_RUNTIME_DIR", "IPYTHONDIR"):
        d = workdir / name.lower()
        d.mkdir()
        env[name] = str(d)
    # Both front-ends read labconfig/page_config.json: no news toast over the notebook.
    labconfig = workdir / "jupyter_config_dir" / "labconfig"
    labconfig.mkdir(parents=True)
    (labconfig / "page_config.json").write_text(
        json.dumps({"disabledExtensions": {"@jupyterlab/apputils-extension:announcements": True}})
    )
    env["PYTHONPATH"] = os.pathsep.join(
        filter(None, [str(Path(__file__).resolve().parents[2]), env.get("PYTHONPATH")])
    )
    port, token = _free_port(), secrets.token_hex(16)
    log = workdir / f"jupyter-{frontend}.log"
    handle = log.open("w")
    process = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "jupyter",
            command,
            "--no-browser",
            "--ip=127.0.0.1",
            f"--port={port}",
            "--port-retries=0",
            "--allow-root",
            f"--IdentityProvider.token={token}",
            f"--ServerApp.root_dir={root}",
            *options,
        ],
        env=env,
        stdout=handle,
        stderr=subprocess.STDOUT,
    )
    server = JupyterServer(frontend, root, port, token, process, log, handle)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if process.poll() is not None:
            server.stop()
            raise RuntimeError(f"jupyter {command} exited early:\n{log.read_text()[-3000:]}")
        try:
            with urllib.request.urlopen(
                f"http://127.0.0.1:{port}/api/status?token={token}", timeout=2
            ) as r:
                if r.status == 200:
                    return server
        except OSError:
            time.sleep(0.3)
    server.stop()
    raise RuntimeError(
        f"jupyter {command} did not answer within {timeout} s:\n{log.read_text()[-3000:]}"
    )
