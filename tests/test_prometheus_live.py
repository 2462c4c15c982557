"""A real Prometheus scrapes a live thresher under traffic; every dashboard and rule expression
is evaluated through Prometheus's query API.

Dashboard queries and recording rules must return data. Alert expressions return nothing while
they are not firing, so for those the check is that they evaluate without error and that every
series they read exists.
"""

from __future__ import annotations

import asyncio
import json
import subprocess
import time
import urllib.parse
import urllib.request
from pathlib import Path
from typing import Any

import aiohttp
import yaml

from conftest import ServerProcess, free_port, require_binary
from monitoring_exprs import all_expressions, metric_names, recording_rule_names
from thresher.demo_traffic import DEMO_MODEL, ListingTraffic

ROOT = Path(__file__).resolve().parent.parent
# The demo's invented marketplace traffic: its fraud campaign shifts at SHIFT_AT labels, which
# raises the mistake rate and fires the drift alarm.
MODEL = {**DEMO_MODEL, "bits": 16}
SHIFT_AT = 1500


def _query(base: str, expr: str) -> dict[str, Any]:
    url = f"{base}/api/v1/query?" + urllib.parse.urlencode({"query": expr})
    try:
        with urllib.request.urlopen(url, timeout=10) as resp:
            body: dict[str, Any] = json.load(resp)
    except urllib.error.HTTPError as exc:
        body = json.load(exc)
    return body


async def _traffic(
    session: aiohttp.ClientSession, url: str, traffic: ListingTraffic, n: int
) -> None:
    """Score batches of listings by id, then label them by id alone, as moderators would."""
    for _ in range(0, n, 100):
        batch = traffic.batch(100)
        events = [{"id": event_id, "fields": fields} for event_id, fields, _ in batch]
        async with session.post(url + "/api/models/listings/score", json={"events": events}):
            pass
        labels = [{"id": event_id, "label": label} for event_id, _, label in batch]
        async with session.post(
            url + "/api/models/listings/labels", json={"labels": labels, "source": "moderators"}
        ) as resp:
            assert resp.status == 200, await resp.text()


async def test_every_expression_evaluates_on_live_data(tmp_path: Path) -> None:
    prometheus = require_binary("prometheus")
    server = ServerProcess(tmp_path / "data", snapshot_interval=0)
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    rules = [
        _fast_copy(ROOT / "deploy/prometheus" / n, tmp_path)
        for n in ("thresher-recording.rules.yml", "thresher-alerts.rules.yml")
    ]
    config = {
        "global": {"scrape_interval": "1s", "evaluation_interval": "1s"},
        "rule_files": rules,
        "scrape_configs": [
            {"job_name": "thresher", "static_configs": [{"targets": [f"127.0.0.1:{server.port}"]}]}
        ],
    }
    (tmp_path / "prometheus.yml").write_text(json.dumps(config))  # JSON is valid YAML
    async with aiohttp.ClientSession() as session:
        server.start()
        prom = None
        try:
            await server.wait_ready(session)
            async with session.post(server.url + "/api/models", json=MODEL) as resp:
                assert resp.status == 201
            with open(tmp_path / "prometheus.log", "wb") as log:
                prom = subprocess.Popen(
                    [
                        prometheus,
                        f"--config.file={tmp_path / 'prometheus.yml'}",
                        f"--storage.tsdb.path={tmp_path / 'tsdb'}",
                        f"--web.listen-address=127.0.0.1:{port}",
                    ],
                    stdout=log,
                    stderr=subprocess.STDOUT,
                )
            await _first_scrape(base)
            traffic = ListingTraffic(seed=0, shift_at=SHIFT_AT, fraud_rate=0.25)
            await _traffic(session, server.url, traffic, SHIFT_AT)
            await asyncio.sleep(3)
            await _traffic(session, server.url, traffic, 1500)  # the shift: a drift alarm
            async with session.post(server.url + "/api/models/listings/snapshots") as resp:
                assert resp.status == 201
            deadline = time.monotonic() + 30
            while time.monotonic() < deadline:  # more traffic until every query has data
                await _traffic(session, server.url, traffic, 200)
                await asyncio.sleep(1)
                missing = _check(base)[1]
                if not missing:
                    break
            errors, missing = _check(base)
        finally:
            if prom is not None:
                prom.terminate()
                prom.wait(timeout=30)
            server.stop()
    assert not errors, "\n".join(errors)
    assert not missing, "no data for:\n" + "\n".join(missing)


def _fast_copy(path: Path, tmp_path: Path) -> str:
    """The rule file with every group on the test's 1 s evaluation interval."""
    doc = yaml.safe_load(path.read_text())
    for group in doc["groups"]:
        group.pop("interval", None)
    out = tmp_path / path.name
    out.write_text(yaml.safe_dump(doc))
    return str(out)


async def _first_scrape(base: str) -> None:
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        try:
            if _query(base, 'up{job="thresher"} == 1').get("data", {}).get("result"):
                return
        except OSError:
            pass
        await asyncio.sleep(0.25)
    raise AssertionError("Prometheus did not scrape thresher within 30 s")


def _check(base: str) -> tuple[list[str], list[str]]:
    errors: list[str] = []
    missing: list[str] = []
    recorded = recording_rule_names()
    with urllib.request.urlopen(f"{base}/api/v1/rules", timeout=10) as resp:
        groups = json.load(resp)["data"]["groups"]
    for group in groups:
        for rule in group["rules"]:
            if rule.get("health") != "ok":
                where = f"rule {rule['name']} ({group['name']} every {group['interval']}s)"
                errors.append(f"{where}: {rule.get('health')} {rule.get('lastError', '')}")
    for origin, expr in all_expressions("listings"):
        body = _query(base, expr)
        if body.get("status") != "success":
            errors.append(f"{origin}: {body.get('error')}")
            continue
        if "alert " in origin:
            for name in metric_names(expr):
                if name in recorded or name.startswith("thresher_"):
                    series = _query(base, f"count({name})")
                    if not series.get("data", {}).get("result"):
                        missing.append(f"{origin}: series {name}")
            continue
        if not body["data"]["result"]:
            missing.append(f"{origin}: {expr}")
    return errors, missing
