"""Shared fixtures: free ports and real components.

A test that needs a real component calls :func:`require_binary`. Locally a missing component
skips the test; under ``CI=true`` it fails, so CI can never pass by skipping.
"""

from __future__ import annotations

import os
import shutil
import socket

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
