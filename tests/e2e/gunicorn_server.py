"""One way for end-to-end tests to run a real gunicorn process on a loopback port.

The server runs the command the compose file runs (``heldout serve``'s argv), in its own
process group so that it and its workers stop together. Every wait is bounded.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import requests

from service.cli import gunicorn_argv

BIN = Path(sys.executable).parent
START_TIMEOUT = 60.0


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass(frozen=True)
class RunningServer:
    base: str
    env: dict[str, str]
    log: Path
    proc: subprocess.Popen[bytes]


@contextmanager
def running_gunicorn(
    workdir: Path, settings: Mapping[str, str], *, port: int | None = None
) -> Iterator[RunningServer]:
    """Start gunicorn with ``HELDOUT_*`` ``settings`` in ``workdir``; stop it on exit.

    Waits (at most ``START_TIMEOUT`` seconds) until ``/readyz`` answers 200.
    """
    port = port or free_port()
    env = {**os.environ, "HELDOUT_BIND": f"127.0.0.1:{port}", **settings}
    log = workdir / "gunicorn.log"
    argv = gunicorn_argv()
    argv[0] = str(BIN / argv[0])
    with log.open("wb") as sink:
        proc = subprocess.Popen(
            argv,
            env=env,
            stdout=sink,
            stderr=subprocess.STDOUT,
            cwd=workdir,
            start_new_session=True,
        )
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + START_TIMEOUT
        while True:
            assert proc.poll() is None, log.read_text()
            try:
                if requests.get(f"{base}/readyz", timeout=5).status_code == 200:
                    break
            except (requests.ConnectionError, requests.Timeout):  # still booting
                pass
            assert time.monotonic() < deadline, "gunicorn did not become ready"
            time.sleep(0.2)
        yield RunningServer(base, env, log, proc)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGTERM)
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(timeout=10)
