"""``evenhand serve`` as a child process on a free loopback port: for the demo, the
reliability tests and the benchmarks, which all talk to a real server over HTTP.

The child runs in its own process group, so :meth:`ServerProcess.kill` (SIGKILL, like
``kill -9``) and :meth:`ServerProcess.stop` reach uvicorn's worker processes too, and only
them.
"""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from types import TracebackType

import httpx

LOOPBACK = "127.0.0.1"


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        port: int = s.getsockname()[1]
        return port


class ServerFailed(RuntimeError):
    """The server did not come up; the message carries the end of its output."""


class ServerProcess:
    """One server child process; a context manager that always stops it."""

    def __init__(
        self,
        env: Mapping[str, str],
        log_path: Path,
        port: int | None = None,
        workers: int = 1,
        command: Sequence[str] | None = None,
        ready_path: str = "/readyz",
    ) -> None:
        self.port = port or free_port()
        self.ready_path = ready_path
        self.log_path = log_path
        self.workers = workers
        self._env = {**os.environ, **env}
        self._command = list(command) if command is not None else self.serve_command()
        self._proc: subprocess.Popen[bytes] | None = None

    def serve_command(self) -> list[str]:
        return [
            sys.executable,
            "-m",
            "service.cli.main",
            "serve",
            "--host",
            LOOPBACK,
            "--port",
            str(self.port),
            "--workers",
            str(self.workers),
        ]

    @property
    def base_url(self) -> str:
        return f"http://{LOOPBACK}:{self.port}"

    @property
    def pid(self) -> int | None:
        return None if self._proc is None else self._proc.pid

    def start(self, timeout: float = 30.0) -> None:
        if self._proc is not None and self._proc.poll() is None:
            raise RuntimeError("server already running")
        log = self.log_path.open("ab")
        try:
            self._proc = subprocess.Popen(
                self._command,
                env=self._env,
                stdin=subprocess.DEVNULL,
                stdout=log,
                stderr=subprocess.STDOUT,
                start_new_session=True,
            )
        finally:
            log.close()
        deadline = time.monotonic() + timeout
        with httpx.Client(base_url=self.base_url, timeout=2.0) as client:
            while time.monotonic() < deadline:
                if self._proc.poll() is not None:
                    raise ServerFailed(
                        f"server exited with {self._proc.returncode}:\n{self.log_tail()}"
                    )
                try:
                    if client.get(self.ready_path).status_code == 200:
                        return
                except httpx.TransportError:
                    pass
                time.sleep(0.1)
        self.kill()
        raise ServerFailed(f"server not ready after {timeout:g} s:\n{self.log_tail()}")

    def log_tail(self, lines: int = 30) -> str:
        try:
            text = self.log_path.read_text(encoding="utf-8", errors="replace")
        except FileNotFoundError:
            return "(no output)"
        return "\n".join(text.splitlines()[-lines:])

    def _signal_group(self, sig: signal.Signals) -> None:
        if self._proc is None or self._proc.poll() is not None:
            return
        with contextlib.suppress(ProcessLookupError):
            os.killpg(self._proc.pid, sig)  # the group this child leads: the server only

    def kill(self) -> None:
        """SIGKILL: no shutdown handlers run, as in a crash."""
        self._signal_group(signal.SIGKILL)
        if self._proc is not None:
            self._proc.wait(10)

    def stop(self, timeout: float = 15.0) -> None:
        """SIGTERM, then SIGKILL if the server has not ended after ``timeout`` seconds."""
        if self._proc is None:
            return
        self._signal_group(signal.SIGTERM)
        try:
            self._proc.wait(timeout)
        except subprocess.TimeoutExpired:
            self.kill()

    def __enter__(self) -> ServerProcess:
        self.start()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()
