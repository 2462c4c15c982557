"""Servers under test: started by the bench on loopback, each pinned to one CPU, then stopped."""

from __future__ import annotations

import importlib.util
import json
import os
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
from pathlib import Path
from types import TracebackType
from typing import Any

from .common import ROOT, demo_events, free_port, on_cpu

READY_TIMEOUT = 60.0


def event_loop() -> str:
    """The loop every server under test runs on: uvloop when installed (thresher's default)."""
    return "uvloop" if importlib.util.find_spec("uvloop") else "asyncio"


class ServerFailed(RuntimeError):
    """A server under test did not start or answered a setup call with an error."""


class Server:
    """One server process: thresher, the scikit-learn peer or the HTTP floor.

    Use as a context manager; the process starts with this thread's CPU set narrowed to
    ``cpu`` (children inherit it) and is terminated, then killed if it lingers, on exit.
    """

    def __init__(
        self, kind: str, cpu: int, *, options: tuple[str, ...] = (), gc_log: Path | None = None
    ) -> None:
        self.kind, self.cpu, self.options, self.gc_log = kind, cpu, options, gc_log
        self.port = free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        self._dir = tempfile.TemporaryDirectory(prefix=f"bench-{kind}-")
        self.data_dir = Path(self._dir.name) / "data"
        self._log = open(Path(self._dir.name) / "server.log", "w+b")  # noqa: SIM115
        self.proc: subprocess.Popen[bytes] | None = None

    def command(self) -> list[str]:
        if self.kind == "thresher":
            # gc_log only for hot-spot diagnostics: the same command line, pauses logged.
            launch = ["bench.gcwatch", str(self.gc_log)] if self.gc_log else ["thresher.cli"]
            return [sys.executable, "-m", *launch, "serve", "--data-dir",
                    str(self.data_dir), "--port", str(self.port), "--log-level", "warning",
                    "--loop", event_loop(), *self.options]  # fmt: skip
        return [sys.executable, "-m", "bench.peer_app", "--kind", self.kind, "--port",
                str(self.port), "--loop", event_loop()]  # fmt: skip

    def __enter__(self) -> Server:
        with on_cpu(self.cpu):
            self.proc = subprocess.Popen(
                self.command(), cwd=ROOT, stdout=self._log, stderr=subprocess.STDOUT
            )
        self._wait_ready()
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        error: BaseException | None,
        trace: TracebackType | None,
    ) -> None:
        self.stop()

    @property
    def pid(self) -> int:
        if self.proc is None:
            raise ServerFailed(f"{self.kind} server is not running")
        return self.proc.pid

    def cpu_seconds(self) -> float:
        """User + system CPU the server process has used so far (Linux /proc); 0 if unknown."""
        try:
            fields = Path(f"/proc/{self.pid}/stat").read_text().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            return 0.0
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

    def _wait_ready(self) -> None:
        path = "/readyz" if self.kind == "thresher" else "/healthz"
        deadline = time.monotonic() + READY_TIMEOUT
        while time.monotonic() < deadline:
            if self.proc is not None and self.proc.poll() is not None:
                raise ServerFailed(f"{self.kind} server exited at start:\n{self.log_tail()}")
            try:
                with urllib.request.urlopen(self.base + path, timeout=2) as answer:
                    if answer.status == 200:
                        return
            except (urllib.error.URLError, ConnectionError, TimeoutError):
                pass
            time.sleep(0.1)
        raise ServerFailed(f"{self.kind} server was not ready in {READY_TIMEOUT:.0f} s")

    def log_tail(self, lines: int = 20) -> str:
        self._log.flush()
        self._log.seek(0)
        return "\n".join(self._log.read().decode(errors="replace").splitlines()[-lines:])

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc = None
        self._log.close()
        self._dir.cleanup()

    # -- setup calls -------------------------------------------------------------------------

    def post(self, path: str, body: Any, *, timeout: float = 60.0) -> Any:
        """POST JSON and return the decoded answer; ServerFailed on an error status."""
        data = json.dumps(body).encode()
        request = urllib.request.Request(
            self.base + path, data=data, headers={"Content-Type": "application/json"}
        )
        try:
            with urllib.request.urlopen(request, timeout=timeout) as answer:
                raw = answer.read()
        except urllib.error.HTTPError as error:
            detail = error.read().decode(errors="replace")[:300]
            raise ServerFailed(f"{self.kind} POST {path}: {error.code} {detail}") from None
        return json.loads(raw) if raw else None

    def train(self, model: str, n: int, *, seed: int = 11, batch: int = 500) -> None:
        """Teach a model ``n`` demo labels (with fields, no ids) so its weights are real."""
        listings = demo_events(n, seed=seed)
        for lo in range(0, n, batch):
            labels = [{"label": label, "fields": f} for _, f, label in listings[lo : lo + batch]]
            self.post(f"/api/models/{model}/labels", {"labels": labels, "source": "bench-setup"})
