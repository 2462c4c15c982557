"""Shared fixtures: free ports and real components.

A test that needs a real component calls :func:`require_binary`. Locally a missing component
skips the test; under ``CI=true`` it fails, so CI can never pass by skipping.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import aiohttp
import pytest

IN_CI = os.environ.get("CI", "").lower() in {"1", "true", "yes"}


def require_binary(name: str, *candidates: str) -> str:
    """Return the path of a needed executable; skip locally, fail under CI, when it is missing."""
    for candidate in (name, *candidates):
        path = shutil.which(candidate)
        if path:
            return path
    message = f"{name} is not installed (tests/run.sh installs it with apt-get)"
    if IN_CI:
        pytest.fail(message)
    pytest.skip(message)
    raise AssertionError("unreachable")


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def _run(*argv: str) -> None:
    subprocess.run(argv, check=True, capture_output=True, timeout=60)


def _unmount(path: Path) -> None:
    """Unmount, lazily when a failed test still holds files open there."""
    if subprocess.run(["umount", str(path)], capture_output=True, timeout=60).returncode:
        _run("umount", "-l", str(path))


@contextlib.contextmanager
def mounted_tmpfs(path: Path, size: str) -> Iterator[Path]:
    """A real tmpfs of ``size``; skips locally (fails in CI) where this process may not mount."""
    require_binary("mount")
    path.mkdir(parents=True, exist_ok=True)
    done = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)],
        capture_output=True,
        timeout=60,
    )
    if done.returncode != 0:
        message = f"cannot mount a tmpfs here: {done.stderr.decode().strip()}"
        if IN_CI:
            pytest.fail(message)
        pytest.skip(message)
    try:
        yield path
    finally:
        _unmount(path)


class ServerProcess:
    """``thresher serve`` in a subprocess on a free loopback port."""

    def __init__(self, data_dir: Path, **flags: Any) -> None:
        self.data_dir = data_dir
        self.port = free_port()
        self.flags = {"snapshot_interval": 0.5, "snapshot_every": 150, **flags}
        self.proc: subprocess.Popen[bytes] | None = None
        self.url = f"http://127.0.0.1:{self.port}"

    def start(self) -> None:
        args = [
            sys.executable,
            "-m",
            "thresher.cli",
            "serve",
            "--data-dir",
            str(self.data_dir),
            "--port",
            str(self.port),
            "--log-level",
            "warning",
        ]
        for key, value in self.flags.items():
            args += ["--" + key.replace("_", "-"), str(value)]
        self.log_path = self.data_dir.parent / f"{self.data_dir.name}.server.log"
        with open(self.log_path, "ab") as log:
            self.proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=log)

    async def wait_ready(self, session: aiohttp.ClientSession, timeout: float = 30.0) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            self._check_running()
            try:
                async with session.get(self.url + "/readyz") as resp:
                    if resp.status == 200:
                        return
            except aiohttp.ClientError:
                pass
            await asyncio.sleep(0.05)
        raise AssertionError("server did not become ready")

    def wait_ready_blocking(self, timeout: float = 30.0) -> None:
        """`wait_ready` for a caller without an event loop (a fixture, or a worker thread)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            self._check_running()
            # A 503 from /readyz while it recovers is an HTTPError, an OSError.
            with contextlib.suppress(OSError), urllib.request.urlopen(self.url + "/readyz") as resp:
                if resp.status == 200:
                    return
            time.sleep(0.05)
        raise AssertionError(f"server not ready: {self.log_path.read_text()[-2000:]}")

    def _check_running(self) -> None:
        if self.proc is not None and self.proc.poll() is not None:
            err = self.log_path.read_text(errors="replace")
            raise AssertionError(f"server exited with {self.proc.returncode}: {err[-2000:]}")

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait()

    def stop(self) -> int:
        if self.proc is None:
            return 0
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(timeout=30)
