"""The HTTP API over a real socket: every route, every error path, auth roles, metrics."""

from __future__ import annotations

import asyncio
import json
from collections.abc import AsyncIterator, Callable
from pathlib import Path
from typing import Any

import msgpack
import pytest
from aiohttp import ClientSession, web
from aiohttp.test_utils import TestServer

from thresher.auth import add_token
from thresher.http import create_app
from thresher.settings import Settings

LISTINGS = {
    "name": "listings",
    "classes": ["fine", "fraud"],
    "features": {
        "fields": {
            "title": {"kind": "text", "ngrams": 2},
            "price": {"kind": "numeric", "log1p": True},
            "category": {"kind": "categorical"},
        },
        "strict": True,
    },
    "bits": 16,
}


class Api:
    """A running server and a session that speaks to it."""

    def __init__(self, server: TestServer, session: ClientSession) -> None:
        self.server = server
        self.session = session

    def url(self, path: str) -> str:
        return str(self.server.make_url(path))

    async def call(
        self,
        method: str,
        path: str,
        body: Any = None,
        *,
        token: str | None = None,
        raw: bytes | None = None,
        ctype: str = "application/json",
        accept: str | None = None,
    ) -> tuple[int, Any, Any]:
        headers = {}
        if token:
            headers["Authorization"] = f"Bearer {token}"
        if accept:
            headers["Accept"] = accept
        data = raw
        if body is not None:
            data = json.dumps(body).encode()
        if data is not None:
            headers["Content-Type"] = ctype
        async with self.session.request(method, self.url(path), data=data, headers=headers) as resp:
            payload = await resp.read()
            kind = resp.content_type
            if kind == "application/msgpack":
                parsed: Any = msgpack.unpackb(payload)
            elif kind in ("application/json", "application/problem+json"):
                parsed = json.loads(payload)
            else:
                parsed = payload.decode()
            return resp.status, parsed, resp.headers


async def _start(settings: Settings) -> tuple[TestServer, ClientSession]:
    app: web.Application = create_app(settings)
    server = TestServer(app, host="127.0.0.1")
    await server.start_server()
    session = ClientSession()
    for _ in range(200):  # wait for recovery to finish
        async with session.get(server.make_url("/readyz")) as resp:
            if resp.status == 200:
                break
    return server, session


@pytest.fixture
async def make_api(tmp_path: Path) -> AsyncIterator[Callable[..., Any]]:
    started: list[tuple[TestServer, ClientSession]] = []

    async def make(**overrides: Any) -> Api:
        values = {"data_dir": str(tmp_path / "data"), "snapshot_interval": 0}
        values.update(overrides)
        server, session = await _start(Settings.from_mapping(values))
        started.append((server, session))
        return Api(server, session)

    yield make
    for server, session in started:
        await session.close()
        await server.close()


@pytest.fixture
async def api(make_api: Callable[..., Any]) -> Api:
    result: Api = await make_api()
    return result


async def _listing_model(api: Api, **changes: Any) -> dict[str, Any]:
    status, body, _ = await api.call("POST", "/api/models", {**LISTINGS, **changes})
    assert status == 201, body
    return dict(body)


def _event(i: int, fraud: bool) -> dict[str, Any]:
    if fraud:
        return {
            "title": f"urgent sale phone {i % 3} pay first",
            "price": 20.0,
            "category": "phones",
        }
    return {
        "title": f"oak table number {i % 5} pickup only",
        "price": 150.0,
        "category": "furniture",
    }


async def test_create_score_label_quality_round_trip(api: Api) -> None:
    created = await _listing_model(api)
    assert created["name"] == "listings" and created["labelled"] == 0 and created["offset"] == 0

    events = [{"id": f"e{i}", "fields": _event(i, i % 2 == 0)} for i in range(40)]
    status, body, _ = await api.call("POST", "/api/models/listings/score", {"events": events})
    assert status == 200
    assert [r["id"] for r in body["results"]] == [e["id"] for e in events]
    assert all(r["label"] == "fine" and r["margin"] == 0.0 for r in body["results"])

    labels = [{"id": f"e{i}", "label": "fraud" if i % 2 == 0 else "fine"} for i in range(40)]
    status, ack, _ = await api.call(
        "POST", "/api/models/listings/labels", {"labels": labels, "source": "review"}
    )
    assert status == 200, ack
    assert ack["applied"] == 40 and ack["duplicates"] == 0 and ack["offset"] == 40
    assert 1 <= ack["mistakes"] < 40

    status, body, _ = await api.call(
        "POST",
        "/api/models/listings/score",
        {"events": [{"fields": _event(99, True)}, {"fields": _event(98, False)}], "explain": 3},
    )
    assert status == 200
    fraud, fine = body["results"]
    assert fraud["label"] == "fraud" and fraud["margin"] > 0
    assert fine["label"] == "fine" and fine["margin"] <= 0
    assert len(fraud["explain"]) == 3
    assert all({"token", "weight", "value", "contribution"} <= set(x) for x in fraud["explain"])

    status, q, _ = await api.call("GET", "/api/models/listings/quality")
    assert status == 200
    assert q["labelled"] == 40 and q["mistakes"] == ack["mistakes"]
    assert q["served"]["labelled"] == 40  # every label came back for a served prediction
    assert q["by_source"] == {"review": 40}

    status, model, _ = await api.call("GET", "/api/models/listings")
    assert model["labelled"] == 40 and model["offset"] == 40 and len(model["digest"]) == 64


async def test_label_retry_is_duplicate_and_different_label_conflicts(api: Api) -> None:
    await _listing_model(api)
    item = {"id": "x1", "label": "fraud", "fields": _event(1, True)}
    path = "/api/models/listings/labels"
    status, first, _ = await api.call("POST", path, {"labels": [item], "source": "app"})
    assert status == 200 and first["applied"] == 1
    status, again, _ = await api.call("POST", path, {"labels": [item], "source": "app"})
    assert status == 200 and again["applied"] == 0 and again["duplicates"] == 1
    status, problem, _ = await api.call(
        "POST", path, {"labels": [{**item, "label": "fine"}], "source": "app"}
    )
    assert status == 409 and problem["type"] == "/problems/conflict"
    assert problem["path"] == "labels[0].label"
    status, model, _ = await api.call("GET", "/api/models/listings")
    assert model["labelled"] == 1


async def test_unknown_id_without_fields_says_send_fields(api: Api) -> None:
    await _listing_model(api)
    status, problem, _ = await api.call(
        "POST",
        "/api/models/listings/labels",
        {"labels": [{"id": "never-scored", "label": "fine"}], "source": "app"},
    )
    assert status == 422
    assert problem["path"] == "labels[0].fields"
    assert "send the event's 'fields'" in problem["detail"]


@pytest.mark.parametrize(
    ("body", "status", "slug", "path"),
    [
        (
            {"events": [{"fields": {"price": "cheap"}}]},
            422,
            "invalid-event",
            "events[0].fields.price",
        ),
        (
            {"events": [{"fields": {"colour": "red"}}]},
            422,
            "invalid-event",
            "events[0].fields.colour",
        ),
        ({"events": []}, 422, "invalid-input", "events"),
        ({"events": [{"fields": 3}]}, 422, "invalid-event", "events[0].fields"),
        ({"events": [{"id": 5, "fields": {}}]}, 422, "invalid-event", "events[0].id"),
        ({"events": [{"fields": {}}], "explain": -1}, 422, "invalid-input", "explain"),
        ({"events": [{"fields": {}}], "extra": 1}, 422, "invalid-input", "extra"),
    ],
)
async def test_score_errors_are_problem_details(
    api: Api, body: Any, status: int, slug: str, path: str
) -> None:
    await _listing_model(api)
    got, problem, headers = await api.call("POST", "/api/models/listings/score", body)
    assert got == status, problem
    assert headers["Content-Type"].startswith("application/problem+json")
    assert problem["type"] == f"/problems/{slug}" and problem["status"] == status
    assert problem["path"] == path
    assert problem["detail"]


async def test_concurrent_score_requests_answer_as_sequential_ones(api: Api) -> None:
    # Requests that reach a model in one loop turn are scored as one batch (thresher.scoring):
    # over a real socket, each must still get exactly its own answer, and a bad one its error.
    await _listing_model(api)
    labels = [{"label": "fraud" if i % 2 == 0 else "fine", "fields": _event(i, i % 2 == 0)}
              for i in range(40)]  # fmt: skip
    status, _, _ = await api.call(
        "POST", "/api/models/listings/labels", {"labels": labels, "source": "test"}
    )
    assert status == 200
    score = "/api/models/listings/score"
    bodies: list[Any] = [
        {"events": [{"id": f"c{i}", "fields": _event(i, i % 3 == 0)}]} for i in range(30)
    ]
    bodies[7] = {"events": [{"fields": {"price": "cheap"}}]}
    bodies[19] = {"events": "none"}
    sequential = [await api.call("POST", score, body) for body in bodies]
    concurrent = await asyncio.gather(*(api.call("POST", score, body) for body in bodies))
    for (status_a, body_a, _), (status_b, body_b, _) in zip(sequential, concurrent, strict=True):
        assert (status_a, body_a) == (status_b, body_b)
    assert [s for s, _, _ in concurrent].count(200) == 28
    assert concurrent[7][0] == 422 and concurrent[7][1]["path"] == "events[0].fields.price"
    assert concurrent[19][0] == 422 and concurrent[19][1]["path"] == "events"
    assert len({b["results"][0]["label"] for s, b, _ in concurrent if s == 200}) == 2


async def test_malformed_media_size_and_routes(make_api: Callable[..., Any]) -> None:
    api = await make_api(max_body_bytes=2048, max_events=3)
    await _listing_model(api)
    score = "/api/models/listings/score"
    status, p, _ = await api.call("POST", score, raw=b"{not json", ctype="application/json")
    assert status == 400 and p["type"] == "/problems/malformed"
    status, p, _ = await api.call("POST", score, raw=b"NaN", ctype="application/json")
    assert status == 400
    status, p, _ = await api.call("POST", score, raw=b"<xml/>", ctype="text/xml")
    assert status == 415 and p["type"] == "/problems/unsupported-media-type"
    status, p, _ = await api.call("POST", score, raw=b"x" * 5000)
    assert status == 413
    four = {"events": [{"fields": {}}] * 4}
    status, p, _ = await api.call("POST", score, four)
    assert status == 413 and p["path"] == "events"
    status, p, _ = await api.call("POST", "/api/models/nope/score", {"events": [{"fields": {}}]})
    assert status == 404 and "nope" in p["detail"]
    status, p, _ = await api.call("GET", "/api/nowhere")
    assert status == 404 and p["type"] == "/problems/not-found"
    status, p, headers = await api.call("PUT", "/api/models")
    assert status == 405 and "POST" in headers["Allow"]


async def test_create_model_validation(api: Api) -> None:
    cases = [
        ({**LISTINGS, "name": "bad name!"}, "name"),
        ({**LISTINGS, "classes": ["only"]}, "classes"),
        ({**LISTINGS, "bits": 40}, "bits"),
        ({**LISTINGS, "rule": "mystery"}, "rule"),
        ({**LISTINGS, "rule": "margin"}, "margin"),
        ({**LISTINGS, "colour": 1}, "colour"),
        (
            {**LISTINGS, "features": {"fields": {"a": {"kind": "wavelet"}}}},
            "features.fields.a.kind",
        ),
    ]
    for body, path in cases:
        status, p, _ = await api.call("POST", "/api/models", body)
        assert status == 422, (body, p)
        assert p["path"] == path, p
    await _listing_model(api)
    status, p, _ = await api.call("POST", "/api/models", LISTINGS)
    assert status == 409


async def test_msgpack_bodies_and_answers(api: Api) -> None:
    await _listing_model(api)
    body = msgpack.packb({"events": [{"id": "m1", "fields": _event(1, False)}]})
    status, answer, headers = await api.call(
        "POST",
        "/api/models/listings/score",
        raw=body,
        ctype="application/msgpack",
        accept="application/msgpack",
    )
    assert status == 200 and headers["Content-Type"].startswith("application/msgpack")
    assert answer["results"][0]["id"] == "m1"


async def test_multiclass_margins(api: Api) -> None:
    status, _, _ = await api.call(
        "POST", "/api/models", {"name": "route", "classes": ["billing", "bug", "other"]}
    )
    assert status == 201
    labels = [
        {"label": c, "fields": {"topic": c, "words": [c, "x"]}}
        for c in ["billing", "bug", "other"] * 5
    ]
    status, ack, _ = await api.call(
        "POST", "/api/models/route/labels", {"labels": labels, "source": "triage"}
    )
    assert status == 200 and ack["applied"] == 15
    status, body, _ = await api.call(
        "POST", "/api/models/route/score", {"events": [{"fields": {"topic": "bug"}}]}
    )
    result = body["results"][0]
    assert result["label"] == "bug" and set(result["margins"]) == {"billing", "bug", "other"}
    assert result["margin"] == result["margins"]["bug"]


async def test_roles(tmp_path: Path, make_api: Callable[..., Any]) -> None:
    tokens = tmp_path / "tokens.json"
    secrets = {
        role: add_token(str(tokens), name=f"t-{role}", roles=[role])
        for role in ("score", "label", "admin")
    }
    limited = add_token(str(tokens), name="t-other", roles=["admin"], models=["other"])
    api = await make_api(tokens_file=str(tokens))
    status, _, headers = await api.call("GET", "/api/models")
    assert status == 401 and headers["WWW-Authenticate"].startswith("Bearer")
    status, _, _ = await api.call("GET", "/api/models", token="wrong")
    assert status == 401
    status, _, _ = await api.call("POST", "/api/models", LISTINGS, token=secrets["score"])
    assert status == 403
    status, _, _ = await api.call("POST", "/api/models", LISTINGS, token=secrets["admin"])
    assert status == 201
    score_body = {"events": [{"id": "r1", "fields": _event(1, True)}]}
    label_body = {"labels": [{"id": "r1", "label": "fraud"}], "source": "app"}
    score, labels = "/api/models/listings/score", "/api/models/listings/labels"
    assert (await api.call("POST", score, score_body, token=secrets["score"]))[0] == 200
    assert (await api.call("POST", score, score_body, token=secrets["label"]))[0] == 403
    assert (await api.call("POST", labels, label_body, token=secrets["score"]))[0] == 403
    assert (await api.call("POST", labels, label_body, token=secrets["label"]))[0] == 200
    assert (await api.call("POST", score, score_body, token=limited))[0] == 403
    assert (await api.call("DELETE", "/api/models/listings", token=secrets["label"]))[0] == 403
    assert (await api.call("GET", "/metrics"))[0] == 200  # scrapes need no token
    assert (await api.call("DELETE", "/api/models/listings", token=secrets["admin"]))[0] == 204


async def test_label_rate_cap(make_api: Callable[..., Any]) -> None:
    api = await make_api(labels_per_second=5)
    await _listing_model(api)
    labels = [{"label": "fine", "fields": _event(i, False)} for i in range(10)]
    body = {"labels": labels, "source": "app"}
    status, _, _ = await api.call("POST", "/api/models/listings/labels", body)
    assert status == 200  # within the burst
    status, _, headers = await api.call("POST", "/api/models/listings/labels", body)
    assert status == 429 and int(headers["Retry-After"]) >= 1


async def test_metrics_expose_model_and_route_series(api: Api) -> None:
    await _listing_model(api)
    events = [{"id": f"e{i}", "fields": _event(i, i % 2 == 0)} for i in range(10)]
    await api.call("POST", "/api/models/listings/score", {"events": events})
    labels = [{"id": f"e{i}", "label": "fraud" if i % 2 == 0 else "fine"} for i in range(10)]
    await api.call("POST", "/api/models/listings/labels", {"labels": labels, "source": "review"})
    status, text, _ = await api.call("GET", "/metrics")
    assert status == 200
    assert 'thresher_events_scored_total{model="listings"} 10.0' in text
    assert 'thresher_labels_applied_total{model="listings",source="review"} 10.0' in text
    assert (
        'thresher_labelled_total{measure="progressive",model="listings"} 10.0' in text
        or 'thresher_labelled_total{model="listings",measure="progressive"} 10.0' in text
    )
    assert "thresher_http_request_duration_seconds_bucket" in text
    assert 'route="/api/models/{model}/score"' in text
    assert "process_resident_memory_bytes" in text


async def test_snapshot_restore_and_rebuild(api: Api) -> None:
    await _listing_model(api)
    labels_path = "/api/models/listings/labels"
    good = [
        {"id": f"g{i}", "label": "fraud" if i % 2 else "fine", "fields": _event(i, i % 2 == 1)}
        for i in range(20)
    ]
    await api.call("POST", labels_path, {"labels": good, "source": "review"})
    status, snap, _ = await api.call("POST", "/api/models/listings/snapshots")
    assert status == 201 and snap["offset"] == 20
    _, before, _ = await api.call("GET", "/api/models/listings")

    poison = [{"id": f"p{i}", "label": "fine", "fields": _event(i, True)} for i in range(20)]
    await api.call("POST", labels_path, {"labels": poison, "source": "buggy-feed"})
    _, poisoned, _ = await api.call("GET", "/api/models/listings")
    assert poisoned["weights_digest"] != before["weights_digest"]

    status, rebuilt, _ = await api.call(
        "POST", "/api/models/listings/rebuild", {"exclude_sources": ["buggy-feed"]}
    )
    assert status == 200
    assert rebuilt["weights_digest"] == before["weights_digest"]
    assert rebuilt["offset"] == 40

    status, listing, _ = await api.call("GET", "/api/models/listings/snapshots")
    assert [s["generation"] for s in listing["snapshots"]] == [2, 1]
    status, restored, _ = await api.call("POST", "/api/models/listings/snapshots/1/restore")
    assert status == 200 and restored["weights_digest"] == before["weights_digest"]
    status, _, _ = await api.call("POST", "/api/models/listings/snapshots/99/restore")
    assert status == 404


async def test_restart_recovers_exact_weights(tmp_path: Path) -> None:
    settings = Settings.from_mapping({"data_dir": str(tmp_path / "d"), "snapshot_interval": 0})
    server, session = await _start(settings)
    api = Api(server, session)
    await _listing_model(api)
    labels = [
        {"id": f"k{i}", "label": "fraud" if i % 3 == 0 else "fine", "fields": _event(i, i % 3 == 0)}
        for i in range(30)
    ]
    await api.call("POST", "/api/models/listings/labels", {"labels": labels, "source": "a"})
    _, before, _ = await api.call("GET", "/api/models/listings")
    await session.close()
    await server.close()  # graceful: writes a final snapshot

    server, session = await _start(settings)
    api = Api(server, session)
    try:
        _, after, _ = await api.call("GET", "/api/models/listings")
        assert after["digest"] == before["digest"] and after["offset"] == 30
        _, listing, _ = await api.call("GET", "/api/models/listings/snapshots")
        assert listing["snapshots"][0]["offset"] == 30
        status, again, _ = await api.call(
            "POST", "/api/models/listings/labels", {"labels": labels[:5], "source": "a"}
        )
        assert status == 200 and again["duplicates"] == 5  # applied ids survive restarts
    finally:
        await session.close()
        await server.close()


async def test_health_ready_openapi(api: Api) -> None:
    assert (await api.call("GET", "/healthz"))[0] == 200
    assert (await api.call("GET", "/readyz"))[0] == 200
    status, doc, _ = await api.call("GET", "/api/openapi.json")
    assert status == 200 and doc["openapi"].startswith("3.1")
    assert "/api/models/{model}/labels" in doc["paths"]


def test_refuses_public_bind_without_tokens(tmp_path: Path) -> None:
    from thresher.errors import Forbidden

    settings = Settings.from_mapping({"data_dir": str(tmp_path), "host": "0.0.0.0"})
    with pytest.raises(Forbidden, match="tokens-file"):
        create_app(settings)
    create_app(settings.replace(insecure=True))  # explicit opt-in is allowed


async def test_a_label_whose_fields_the_log_cannot_store_is_refused_cleanly(api: Api) -> None:
    # JSON allows integers of any size; msgpack, the label log's encoding, stops at 64 bits.
    await _listing_model(api, features={"fields": {"ref": {"kind": "categorical"}}})
    huge = {"ref": 2**70}
    status, body, _ = await api.call(
        "POST", "/api/models/listings/score", {"events": [{"id": "h1", "fields": huge}]}
    )
    assert status == 200  # scoring needs no storage: the integer is a categorical token
    for label in ({"id": "h1", "label": "fine"}, {"label": "fine", "fields": huge}):
        status, body, headers = await api.call(
            "POST",
            "/api/models/listings/labels",
            {"labels": [{"label": "fine", "fields": {"ref": 7}}, label], "source": "r"},
        )
        assert status == 422, body
        assert headers["Content-Type"].startswith("application/problem+json")
        assert body["path"] == "labels[1].fields" and "64 bits" in body["detail"]
    status, model, _ = await api.call("GET", "/api/models/listings")
    assert model["labelled"] == 0 and model["head"] == 0  # nothing of the refused requests kept
