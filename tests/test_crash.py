"""Crash recovery with real processes: SIGKILL a server under label traffic, again and again.

After every restart each acknowledged label must still be applied (re-sending it is a
duplicate), and at the end the weights digest must equal that of a server that was never
killed and received the same labels in the same order.
"""

from __future__ import annotations

import asyncio
import os
import random
import time
from pathlib import Path
from typing import Any

import aiohttp
import pytest

from conftest import ServerProcess as Server

MODEL = {
    "name": "signups",
    "classes": ["ok", "abuse"],
    "features": {
        "fields": {
            "email_domain": {"kind": "categorical"},
            "bio": {"kind": "text"},
            "age_days": {"kind": "numeric", "log1p": True},
        }
    },
    "bits": 18,
    "rule": "averaged",
}
KILLS = 20


def _labels(n: int, seed: int) -> list[dict[str, Any]]:
    rng = random.Random(seed)
    out = []
    for i in range(n):
        abuse = rng.random() < 0.3
        domain = rng.choice(
            ["mailbox.test", "post.test"]
            if not abuse
            else ["spam.test", "burner.test", "post.test"]
        )
        words = rng.sample(
            [
                "hello",
                "crypto",
                "free",
                "gardening",
                "bikes",
                "win",
                "cash",
                "books",
                "music",
                "offer",
            ],
            4,
        )
        out.append(
            {
                "id": f"s{i}",
                "label": "abuse" if abuse else "ok",
                "fields": {
                    "email_domain": domain,
                    "bio": " ".join(words),
                    "age_days": rng.randint(0, 900),
                },
            }
        )
    return out


async def _post(session: aiohttp.ClientSession, url: str, path: str, body: Any) -> Any:
    async with session.post(url + path, json=body) as resp:
        data = await resp.json()
        if resp.status not in (200, 201):
            raise AssertionError(f"{path}: {resp.status} {data}")
        return data


async def _digest(session: aiohttp.ClientSession, url: str) -> dict[str, Any]:
    async with session.get(url + "/api/models/signups") as resp:
        data: dict[str, Any] = await resp.json()
        return data


async def _feed_until_killed(
    session: aiohttp.ClientSession,
    server: Server,
    batches: list[list[dict[str, Any]]],
    start: int,
    acked: set[str],
    kill_after: float,
) -> int:
    """Send batches in order until the kill; return the index of the first unacknowledged."""
    loop = asyncio.get_running_loop()
    timer = loop.call_later(kill_after, server.kill)
    i = start
    try:
        while i < len(batches):
            try:
                await _post(
                    session,
                    server.url,
                    "/api/models/signups/labels",
                    {"labels": batches[i], "source": "signup-review"},
                )
            except (TimeoutError, aiohttp.ClientError, ConnectionError):
                return i
            acked.update(item["id"] for item in batches[i])
            i += 1
        return i
    finally:
        timer.cancel()


@pytest.mark.slow
async def test_sigkill_loses_no_acknowledged_label(tmp_path: Path) -> None:
    # Enough labels that the feed is still running at every kill, fast as label requests are.
    labels = _labels(40000, seed=11)
    batches = [labels[i : i + 5] for i in range(0, len(labels), 5)]
    rng = random.Random(5)
    server = Server(tmp_path / "crashy")
    timeout = aiohttp.ClientTimeout(total=10)
    async with aiohttp.ClientSession(timeout=timeout) as session:
        server.start()
        await server.wait_ready(session)
        await _post(session, server.url, "/api/models", MODEL)
        acked: set[str] = set()
        position = 0
        kills = 0
        interrupted = 0  # kills that landed while label requests were in flight
        try:
            while kills < KILLS:
                position = await _feed_until_killed(
                    session, server, batches, position, acked, rng.uniform(0.02, 0.3)
                )
                interrupted += position < len(batches)
                server.kill()
                kills += 1
                server.start()
                await server.wait_ready(session)
                # Every acknowledged label survived: re-sending them all is pure duplicates.
                sent = [x for b in batches[:position] for x in b if x["id"] in acked]
                for k in range(0, len(sent), 1000):
                    ack = await _post(
                        session,
                        server.url,
                        "/api/models/signups/labels",
                        {"labels": sent[k : k + 1000], "source": "signup-review"},
                    )
                    assert ack["applied"] == 0, f"after kill {kills}: lost labels {ack}"
            position = await _feed_until_killed(session, server, batches, position, acked, 3600)
            assert position == len(batches)
            crashed = await _digest(session, server.url)
            assert crashed["labelled"] == len(labels)
        finally:
            server.kill()

        reference = Server(tmp_path / "calm")
        reference.start()
        try:
            await reference.wait_ready(session)
            await _post(session, reference.url, "/api/models", MODEL)
            for batch in batches:
                await _post(
                    session,
                    reference.url,
                    "/api/models/signups/labels",
                    {"labels": batch, "source": "signup-review"},
                )
            calm = await _digest(session, reference.url)
        finally:
            assert reference.stop() == 0  # graceful SIGTERM exits 0
    assert kills >= KILLS and interrupted >= KILLS
    assert crashed["weights_digest"] == calm["weights_digest"]
    assert crashed["digest"] == calm["digest"]


async def test_sigterm_writes_final_snapshot_and_exits_zero(tmp_path: Path) -> None:
    server = Server(tmp_path / "term", snapshot_interval=0, snapshot_every=0)
    async with aiohttp.ClientSession() as session:
        server.start()
        try:
            await server.wait_ready(session)
            await _post(session, server.url, "/api/models", MODEL)
            await _post(
                session,
                server.url,
                "/api/models/signups/labels",
                {"labels": _labels(50, seed=3), "source": "s"},
            )
            # A dashboard left open must not hold the shutdown to its deadline.
            stream = await session.get(server.url + "/api/events")
            assert stream.status == 200
        finally:
            started = time.monotonic()
            code = server.stop()
            stopped_in = time.monotonic() - started
        stream.close()
    assert code == 0
    assert stopped_in < 10, f"graceful stop took {stopped_in:.1f} s"
    snaps = list((tmp_path / "term" / "models" / "signups" / "snapshots").iterdir())
    assert any(p.name.endswith(".snap") for p in snaps), snaps
    assert os.path.isdir(tmp_path / "term" / "models" / "signups" / "log")


async def test_flipped_byte_in_newest_snapshot_falls_back_to_older_one(tmp_path: Path) -> None:
    server = Server(tmp_path / "flip", snapshot_interval=0, snapshot_every=0)
    labels = _labels(300, seed=9)
    async with aiohttp.ClientSession() as session:
        server.start()
        try:
            await server.wait_ready(session)
            await _post(session, server.url, "/api/models", MODEL)
            for k in range(3):  # two snapshot generations, then labels only in the log
                await _post(
                    session,
                    server.url,
                    "/api/models/signups/labels",
                    {"labels": labels[k * 100 : (k + 1) * 100], "source": "s"},
                )
                if k < 2:
                    await _post(session, server.url, "/api/models/signups/snapshots", None)
            before = await _digest(session, server.url)
        finally:
            server.kill()  # no final snapshot: the newest generation stays the damaged one
        snaps = sorted((tmp_path / "flip" / "models" / "signups" / "snapshots").glob("*.snap"))
        assert len(snaps) == 2
        data = bytearray(snaps[-1].read_bytes())
        data[len(data) // 2] ^= 0x01
        snaps[-1].write_bytes(bytes(data))
        server.start()
        try:
            await server.wait_ready(session)
            after = await _digest(session, server.url)
            async with session.get(server.url + "/metrics") as resp:
                metrics = await resp.text()
        finally:
            server.stop()
    assert after["digest"] == before["digest"] and after["offset"] == 300
    assert 'thresher_snapshot_fallbacks_total{model="signups"} 1.0' in metrics
