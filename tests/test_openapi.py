"""The OpenAPI document against the running server, fuzzed by schemathesis.

A real `thresher serve` with a tokens file is started; schemathesis generates requests from
`/api/openapi.json` (examples, coverage, fuzzing and stateful phases, following the document's
links from model creation) and checks every answer: no 5xx, documented status codes, content
types, headers and bodies that match the schemas, schema-violating requests rejected, missing
or bad tokens refused. `positive_data_acceptance` is left out: a schema cannot say that a
label must be one of the model's own classes or that a cross must name declared fields, and
those well-formed but invalid requests are answered 422 on purpose.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

from conftest import free_port
from thresher.auth import add_token

HOOKS = """
import msgpack
import schemathesis


@schemathesis.deserializer("application/msgpack")
def _msgpack(ctx, response):
    return msgpack.unpackb(response.content)
"""


def _wait_ready(url: str, proc: subprocess.Popen[bytes]) -> None:
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise AssertionError(f"server exited with {proc.returncode}")
        try:
            with urllib.request.urlopen(url + "/readyz", timeout=2) as resp:
                if resp.status == 200:
                    return
        except OSError:
            time.sleep(0.1)
    raise AssertionError("server did not become ready")


def test_schemathesis_finds_no_violations(tmp_path: Path) -> None:
    # The command sits beside this interpreter in a virtual environment that is not on PATH.
    here = Path(sys.executable).parent
    beside = [str(here / name) for name in ("schemathesis", "st") if (here / name).exists()]
    st = next(iter(beside), None) or shutil.which("schemathesis") or shutil.which("st")
    if st is None:
        pytest.fail("schemathesis is part of the test extra; install it with pip")
    tokens = tmp_path / "tokens.json"
    secret = add_token(str(tokens), name="fuzzer", roles=["admin"])
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    log = open(tmp_path / "server.log", "wb")  # noqa: SIM115 - closed in finally
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "thresher.cli",
            "serve",
            "--data-dir",
            str(tmp_path / "data"),
            "--port",
            str(port),
            "--tokens-file",
            str(tokens),
            "--log-level",
            "warning",
            "--snapshot-interval",
            "0",
        ],
        stdout=subprocess.DEVNULL,
        stderr=log,
    )
    try:
        _wait_ready(url, proc)
        (tmp_path / "st_hooks.py").write_text(HOOKS)
        env = {
            **os.environ,
            "PYTHONPATH": str(tmp_path),
            "SCHEMATHESIS_HOOKS": "st_hooks",
        }
        result = subprocess.run(
            [
                st,
                "run",
                f"{url}/api/openapi.json",
                "--checks",
                "all",
                "--exclude-checks",
                "positive_data_acceptance",
                "-H",
                f"Authorization: Bearer {secret}",
                "--max-examples",
                "25",
                "--workers",
                "1",
                "--seed",
                "1",
                "--request-timeout",
                "20",
            ],
            capture_output=True,
            text=True,
            env=env,
            timeout=600,
            cwd=tmp_path,
        )
        report = result.stdout + result.stderr
        assert result.returncode == 0, report[-6000:]
        assert " passed" in report and "failures" not in report.lower().split("summary")[-1]
    finally:
        proc.terminate()
        proc.wait(timeout=30)
        log.close()
    server_log = (tmp_path / "server.log").read_text(errors="replace")
    assert "Traceback" not in server_log, server_log[-4000:]
