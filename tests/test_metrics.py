"""The live /metrics answer passes Prometheus's own linter (`promtool check metrics`)."""

from __future__ import annotations

import subprocess
from pathlib import Path

import aiohttp

from conftest import ServerProcess, require_binary

MODEL = {"name": "tickets", "classes": ["billing", "bug", "other"]}


async def test_promtool_check_metrics_on_live_answer(tmp_path: Path) -> None:
    promtool = require_binary("promtool")
    server = ServerProcess(tmp_path / "data", snapshot_interval=0)
    async with aiohttp.ClientSession() as session:
        server.start()
        try:
            await server.wait_ready(session)
            async with session.post(server.url + "/api/models", json=MODEL) as resp:
                assert resp.status == 201
            labels = [
                {"id": f"t-{i}", "label": c, "fields": {"topic": c, "words": ["refund", c]}}
                for i, c in enumerate(("billing", "bug", "other") * 20)
            ]
            async with session.post(
                server.url + "/api/models/tickets/labels",
                json={"labels": labels, "source": "triage"},
            ) as resp:
                assert resp.status == 200
            async with session.post(
                server.url + "/api/models/tickets/score",
                json={"events": [{"fields": {"topic": "bug"}}]},
            ) as resp:
                assert resp.status == 200
            async with session.get(server.url + "/metrics") as resp:
                text = await resp.text()
        finally:
            server.stop()
    assert 'error="wrong_class"' in text
    assert 'thresher_labels_applied_total{model="tickets",source="triage"} 60.0' in text
    assert 'thresher_applied_ids{model="tickets"} 60.0' in text
    applied_bytes = [ln for ln in text.splitlines() if ln.startswith("thresher_applied_ids_bytes{")]
    assert len(applied_bytes) == 1 and float(applied_bytes[0].split()[-1]) > 0, applied_bytes
    result = subprocess.run(
        [promtool, "check", "metrics"], input=text, capture_output=True, text=True, timeout=60
    )
    assert result.returncode == 0, result.stdout + result.stderr
    assert result.stdout.strip() == "" and result.stderr.strip() == "", result.stderr
