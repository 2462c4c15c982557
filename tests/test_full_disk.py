"""A full disk under a real server: labels get 503, scoring goes on, nothing acknowledged is lost.

The data directory lives on a real tmpfs of a few MiB that the test fills with a filler file;
removing the filler gives the space back.
"""

from __future__ import annotations

import asyncio
import subprocess
from pathlib import Path
from typing import Any

import aiohttp
import pytest

from conftest import ServerProcess as Server
from conftest import mounted_tmpfs

MODEL = {
    "name": "payments",
    "classes": ["ok", "chargeback"],
    "features": {
        "fields": {
            "merchant": {"kind": "categorical"},
            "amount": {"kind": "numeric", "log1p": True},
        }
    },
    "bits": 14,
}


def _labels(start: int, n: int) -> list[dict[str, Any]]:
    return [
        {
            "id": f"p{i}",
            "label": "chargeback" if i % 4 == 0 else "ok",
            "fields": {"merchant": f"m{i % 7}", "amount": float(i % 300)},
        }
        for i in range(start, start + n)
    ]


async def _call(session: aiohttp.ClientSession, url: str, body: Any) -> tuple[int, Any, Any]:
    async with session.post(url, json=body) as resp:
        return resp.status, await resp.json(content_type=None), resp.headers


def _fill(path: Path) -> None:
    # dd stops at ENOSPC with a non-zero status; that is the point.
    subprocess.run(["dd", "if=/dev/zero", f"of={path}", "bs=64k"], capture_output=True, timeout=60)


async def test_full_disk_refuses_labels_and_recovers(tmp_path: Path) -> None:
    with mounted_tmpfs(tmp_path / "disk", "8m") as disk:
        server = Server(disk / "data", snapshot_interval=0, snapshot_every=0)
        async with aiohttp.ClientSession() as session:
            server.start()
            try:
                await server.wait_ready(session)
                base = server.url + "/api/models/payments"
                assert (await _call(session, server.url + "/api/models", MODEL))[0] == 201
                status, ack, _ = await _call(
                    session, base + "/labels", {"labels": _labels(0, 50), "source": "bank"}
                )
                assert status == 200 and ack["applied"] == 50

                filler = disk / "filler"
                _fill(filler)
                refused = 0
                for k in range(5):  # a few batches, so the segment's page-cache slack is used up
                    status, problem, headers = await _call(
                        session,
                        base + "/labels",
                        {"labels": _labels(1000 + 2000 * k, 2000), "source": "bank"},
                    )
                    if status == 503:
                        refused += 1
                        assert problem["type"] == "/problems/log-unavailable"
                        assert "No space left" in problem["detail"]
                        assert int(headers["Retry-After"]) >= 1
                assert refused >= 1
                status, scored, _ = await _call(
                    session, base + "/score", {"events": [{"fields": {"merchant": "m1"}}]}
                )
                assert status == 200 and scored["results"][0]["label"] in ("ok", "chargeback")

                filler.unlink()
                status, ack, _ = await _call(
                    session, base + "/labels", {"labels": _labels(50, 50), "source": "bank"}
                )
                assert status == 200 and ack["applied"] == 50
                status, again, _ = await _call(
                    session, base + "/labels", {"labels": _labels(0, 100), "source": "bank"}
                )
                assert again["applied"] == 0 and again["duplicates"] == 100
            finally:
                server.kill()
            # Restart from the same disk: every acknowledged label is still there.
            server.start()
            try:
                await server.wait_ready(session)
                status, again, _ = await _call(
                    session,
                    server.url + "/api/models/payments/labels",
                    {"labels": _labels(0, 100), "source": "bank"},
                )
                assert status == 200 and again["duplicates"] == 100
            finally:
                server.kill()
                await asyncio.sleep(0)


pytestmark = pytest.mark.slow
