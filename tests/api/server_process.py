"""``propcalc serve --production`` on 127.0.0.1 for the live tests (a helper, not a test module).

One server per test session, started on first use (the schemathesis module
needs it while it is imported, the ``live_server`` fixture afterwards) and
stopped by ``pytest_sessionfinish`` in ``conftest.py``, with an ``atexit``
hook as a last resort, so it never outlives the run, even after a failure.
"""

from __future__ import annotations

import atexit
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import requests

__all__ = ["LiveServer", "shared", "stop_shared", "free_port"]

_STARTUP_SECONDS = 60.0


def free_port() -> int:
    """A TCP port that is free on 127.0.0.1 right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class LiveServer:
    """The production server (``propcalc serve --production``) on a free loopback port.

    Parameters
    ----------
    workers : int
    env : dict, optional
        Extra environment (``PROPCALC_*`` settings).
    """

    def __init__(self, workers: int = 2, env: dict[str, str] | None = None) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.workers = workers
        self._env = env or {}
        self._proc: subprocess.Popen[bytes] | None = None
        self._log = tempfile.NamedTemporaryFile(prefix="propcalc-server-", suffix=".log",
                                                delete=False)

    def start(self) -> "LiveServer":
        """Start the server and wait until /health answers (raises if it does not)."""
        env = {**os.environ, "OMP_NUM_THREADS": "1", **self._env}
        cmd = [sys.executable, "-m", "propcalc.cli", "serve", "--production",
               "--host", "127.0.0.1", "--port", str(self.port), "--workers", str(self.workers)]
        self._proc = subprocess.Popen(cmd, stdout=self._log, stderr=subprocess.STDOUT, env=env,
                                      cwd=tempfile.gettempdir(), start_new_session=True)
        deadline = time.monotonic() + _STARTUP_SECONDS
        while time.monotonic() < deadline:
            if self._proc.poll() is not None:
                raise RuntimeError(f"the server exited with status {self._proc.returncode}:\n"
                                   + self.log_text())
            try:
                if requests.get(self.url + "/health", timeout=2).status_code == 200:
                    return self
            except requests.ConnectionError:
                pass
            time.sleep(0.2)
        self.stop()
        raise RuntimeError(f"the server did not answer /health within {_STARTUP_SECONDS} s:\n"
                           + self.log_text())

    def log_text(self) -> str:
        """What the server wrote so far."""
        self._log.flush()
        return Path(self._log.name).read_text(errors="replace")

    def stop(self) -> None:
        """SIGTERM the arbiter (it stops its workers), then SIGKILL the group if needed."""
        proc, self._proc = self._proc, None
        if proc is not None and proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)  # our own process group (start_new_session)
                proc.wait(timeout=15)
        if not self._log.closed:
            self._log.close()
            Path(self._log.name).unlink(missing_ok=True)

    @property
    def running(self) -> bool:
        return self._proc is not None and self._proc.poll() is None


_SHARED: LiveServer | None = None


def shared() -> LiveServer:
    """The session's server, started on first call."""
    global _SHARED
    if _SHARED is None:
        server = LiveServer()
        atexit.register(server.stop)
        _SHARED = server.start()
    return _SHARED


def stop_shared() -> None:
    """Stop the session's server if it was started."""
    global _SHARED
    if _SHARED is not None:
        _SHARED.stop()
        _SHARED = None
