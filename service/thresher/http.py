"""The HTTP service: ``create_app(settings) -> web.Application``.

Handlers translate between HTTP and `ModelRegistry`/`Model` calls and hold no learning logic.
The edge in `http_edge`, wrapped around every route's handler, maps every `ThresherError` (and
aiohttp's own HTTP errors) to RFC 9457 problem details, counts responses and latency per route,
caps requests in flight and authenticates;
`http_io` reads bodies and writes answers.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import math
import time
from pathlib import Path
from typing import Any

from aiohttp import web
from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, generate_latest

from . import __version__
from .auth import Principal, RateLimiter, TokenStore
from .errors import (
    Forbidden,
    InvalidInput,
    NotFound,
    PayloadTooLarge,
    RateLimited,
    Unavailable,
)
from .http_background import BACKGROUND, STOPPING, auto_snapshot, lifecycle_ctx, stop_streams
from .http_edge import EDGE, PRINCIPAL, Edge, Handler, guard, principal, unmatched
from .http_io import answer, read_body, require_object
from .lifecycle import ModelRegistry
from .metrics import HttpMetrics, build_registry
from .openapi import openapi_document
from .settings import Settings

SETTINGS = web.AppKey("settings", Settings)
MODELS = web.AppKey("models", ModelRegistry)
TOKENS = web.AppKey("tokens", TokenStore)
LIMITER = web.AppKey("limiter", RateLimiter)
PROM = web.AppKey("prometheus", CollectorRegistry)
HTTP_METRICS = web.AppKey("http_metrics", HttpMetrics)
PAGE_DIR = Path(__file__).with_name("page")
__all__ = ["EDGE", "PRINCIPAL", "create_app"]


# -- handlers ------------------------------------------------------------------------------


async def create_model(request: web.Request) -> web.Response:
    principal(request, "admin")
    body = await read_body(request, request.app[SETTINGS].max_body_bytes)
    name = body.get("name") if isinstance(body, dict) else None
    principal(request, "admin", name if isinstance(name, str) else None)
    model = await request.app[MODELS].create(body)
    return answer(request, model.summary(), status=201)


async def list_models(request: web.Request) -> web.Response:
    who = principal(request, "score")
    registry = request.app[MODELS]
    shown = [registry.models[n] for n in registry.names() if who.models is None or n in who.models]
    for model in shown:
        await model.refresh()  # hash and count the weights off the event loop
    return answer(request, {"models": [model.summary() for model in shown]})


def _model(request: web.Request, role: str) -> Any:
    name = request.match_info["model"]
    principal(request, role, name)
    return request.app[MODELS].get(name)


async def get_model(request: web.Request) -> web.Response:
    model = _model(request, "score")
    await model.refresh()  # hash and count the weights off the event loop
    summary = model.summary()
    info = request.app[MODELS].last_snapshot.get(model.name)
    summary["snapshot"] = None if info is None else _snapshot_json(info)
    return answer(request, summary)


async def delete_model(request: web.Request) -> web.Response:
    model = _model(request, "admin")
    await request.app[MODELS].delete(model.name)
    return web.Response(status=204)


async def score(request: web.Request) -> web.Response:
    model = _model(request, "score")
    settings = request.app[SETTINGS]
    body = require_object(await read_body(request, settings.max_body_bytes), "events", "explain")
    events = body.get("events")
    if not isinstance(events, list) or not events:
        raise InvalidInput("events must be a non-empty list of events", path="events")
    if len(events) > settings.max_events:
        raise PayloadTooLarge(
            f"{len(events)} events is over the limit of {settings.max_events} per request; "
            "split the batch",
            path="events",
        )
    explain = body.get("explain", 0)
    if isinstance(explain, bool) or not isinstance(explain, int) or not 0 <= explain <= 50:
        raise InvalidInput("explain must be an integer from 0 to 50", path="explain")
    results = await model.gather(events, explain, request.content_length or 0)
    if model.shared is not None:  # skipped, not awaited, on the hot path of a file log
        await model.share(events, results, time.time())
    return answer(request, {"results": results})


async def post_labels(request: web.Request) -> web.Response:
    model = _model(request, "label")
    who: Principal = request[PRINCIPAL]
    settings = request.app[SETTINGS]
    body = require_object(
        await read_body(request, settings.max_body_bytes), "labels", "source", "wait"
    )
    labels = body.get("labels")
    if not isinstance(labels, list) or not labels:
        raise InvalidInput("labels must be a non-empty list of labels", path="labels")
    if len(labels) > settings.max_labels:
        raise PayloadTooLarge(
            f"{len(labels)} labels is over the limit of {settings.max_labels} per request",
            path="labels",
        )
    source = body.get("source")
    if not isinstance(source, str) or not 0 < len(source) <= 128:
        raise InvalidInput(
            "source must name where the labels come from (1-128 characters), e.g. "
            "'review-queue' or 'chargebacks'",
            path="source",
        )
    wait = body.get("wait", False)
    if not isinstance(wait, bool):
        raise InvalidInput("wait must be true or false", path="wait")
    rate = who.labels_per_second or settings.labels_per_second
    if rate:
        delay = request.app[LIMITER].allow(who.name, len(labels), time.monotonic(), rate)
        if delay > 0:
            raise RateLimited(
                f"token {who.name!r} is over its cap of {rate:g} labels per second",
                retry_after=delay,
            )
    registry = request.app[MODELS]
    ack = await model.label(labels, source=source, now=time.time(), wait=wait)
    if registry.note_applied(model.name, ack.applied):
        request.app[BACKGROUND].append(asyncio.ensure_future(auto_snapshot(registry, model.name)))
    return answer(
        request,
        {
            "applied": ack.applied,
            "duplicates": ack.duplicates,
            "mistakes": ack.mistakes,
            "offset": ack.offset,
        },
    )


async def quality(request: web.Request) -> web.Response:
    model = _model(request, "score")
    return answer(request, quality_report(model))


def quality_report(model: Any) -> dict[str, Any]:
    report: dict[str, Any] = model.quality.report()
    report["model"] = model.name
    report["recent_mistakes"] = list(model.recent_mistakes)
    report["offset"] = model.offset
    return _finite(report)


def _finite(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    return value


def _snapshot_json(info: Any) -> dict[str, Any]:
    return {
        "generation": info.generation,
        "offset": info.offset,
        "time": info.time,
        "bytes": info.bytes,
    }


async def list_snapshots(request: web.Request) -> web.Response:
    model = _model(request, "score")
    infos = request.app[MODELS].snapshots(model.name)
    return answer(request, {"snapshots": [_snapshot_json(i) for i in infos]})


async def take_snapshot(request: web.Request) -> web.Response:
    model = _model(request, "admin")
    info = await request.app[MODELS].snapshot(model.name)
    return answer(request, _snapshot_json(info), status=201)


async def restore_snapshot(request: web.Request) -> web.Response:
    model = _model(request, "admin")
    raw = request.match_info["generation"]
    if not raw.isdigit():
        raise InvalidInput("generation must be a whole number", path="generation")
    restored = await request.app[MODELS].restore(model.name, int(raw))
    return answer(request, restored.summary())


async def rebuild(request: web.Request) -> web.Response:
    model = _model(request, "admin")
    body = require_object(
        await read_body(request, request.app[SETTINGS].max_body_bytes),
        "exclude_sources",
        "from_snapshot",
    )
    sources = body.get("exclude_sources", [])
    if not isinstance(sources, list) or not all(isinstance(s, str) for s in sources):
        raise InvalidInput("exclude_sources must be a list of source names", path="exclude_sources")
    from_snapshot = body.get("from_snapshot", False)
    if not isinstance(from_snapshot, bool):
        raise InvalidInput("from_snapshot must be true or false", path="from_snapshot")
    rebuilt = await request.app[MODELS].rebuild(
        model.name, exclude_sources=sources, from_snapshot=from_snapshot
    )
    return answer(request, rebuilt.summary())


async def events_stream(request: web.Request) -> web.StreamResponse:
    """Server-sent events: every model's quality report once a second, for the page."""
    principal(request, "score")
    registry = request.app[MODELS]
    response = web.StreamResponse(
        headers={"Content-Type": "text/event-stream", "Cache-Control": "no-cache"}
    )
    await response.prepare(request)
    wanted = request.query.get("model")
    try:
        stopping = request.app[STOPPING]
        for _ in range(3600):  # an hour; EventSource reconnects by itself
            if stopping.is_set():
                break
            for name in registry.names():
                if wanted and name != wanted:
                    continue
                model = registry.models.get(name)
                if model is None:
                    continue
                await model.refresh()
                data = quality_report(model)
                data["summary"] = model.summary()
                info = registry.last_snapshot.get(name)
                data["snapshot"] = None if info is None else _snapshot_json(info)
                await response.write(f"event: quality\ndata: {json.dumps(data)}\n\n".encode())
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(stopping.wait(), 1.0)
    except (ConnectionResetError, asyncio.CancelledError):
        pass
    return response


async def metrics(request: web.Request) -> web.Response:
    registry = request.app[MODELS]
    for name in registry.names():
        model = registry.models.get(name)
        if model is not None:
            await model.refresh(digest=False)  # the collector reads the cached slot count
    body = generate_latest(request.app[PROM])
    return web.Response(body=body, headers={"Content-Type": CONTENT_TYPE_LATEST})


async def healthz(request: web.Request) -> web.Response:
    return answer(request, {"status": "alive", "version": __version__})


async def readyz(request: web.Request) -> web.Response:
    if not request.app[MODELS].ready:
        raise Unavailable("recovering: loading snapshots and replaying label logs", retry_after=1.0)
    return answer(request, {"status": "ready", "models": len(request.app[MODELS].models)})


async def openapi(request: web.Request) -> web.Response:
    return answer(request, openapi_document(__version__))


async def page(request: web.Request) -> web.StreamResponse:
    name = request.match_info.get("file", "index.html")
    path = (PAGE_DIR / name).resolve()
    if PAGE_DIR.resolve() not in path.parents or not path.is_file():
        raise NotFound(f"no page file {name!r}")
    return web.FileResponse(path, headers={"Cache-Control": "no-cache"})


# Every route, each behind the edge (`guard`). aiohttp tries the routes under one path prefix
# in the order they were added, so the hot ones come first: scoring, then labels.
ROUTES: list[tuple[str, str, Handler]] = [
    ("POST", "/api/models/{model}/score", score),
    ("POST", "/api/models/{model}/labels", post_labels),
    ("POST", "/api/models", create_model),
    ("GET", "/api/models", list_models),
    ("GET", "/api/models/{model}", get_model),
    ("DELETE", "/api/models/{model}", delete_model),
    ("GET", "/api/models/{model}/quality", quality),
    ("GET", "/api/models/{model}/snapshots", list_snapshots),
    ("POST", "/api/models/{model}/snapshots", take_snapshot),
    ("POST", "/api/models/{model}/snapshots/{generation}/restore", restore_snapshot),
    ("POST", "/api/models/{model}/rebuild", rebuild),
    ("GET", "/api/events", events_stream),
    ("GET", "/api/openapi.json", openapi),
    ("GET", "/metrics", metrics),
    ("GET", "/healthz", healthz),
    ("GET", "/readyz", readyz),
    ("GET", "/", page),
    ("GET", "/page/{file}", page),
]


def create_app(
    settings: Settings, *, registry: ModelRegistry | None = None, freeze_gc: bool = False
) -> web.Application:
    """Build the application; nothing starts until it is run.

    ``freeze_gc`` (for a process that serves only this app, as ``thresher serve``): after
    recovery, move every object alive to the collector's permanent generation (`gc.freeze`).
    """
    if not settings.is_loopback() and settings.tokens_file is None and not settings.insecure:
        raise Forbidden(
            f"refusing to listen on {settings.host} without --tokens-file; create tokens with "
            "`thresher token new`, or pass --insecure to accept anyone who can reach the port"
        )
    app = web.Application(client_max_size=settings.max_body_bytes)
    app[SETTINGS] = settings
    models = registry or ModelRegistry(settings)
    app[MODELS] = models
    app[TOKENS] = TokenStore.load(settings.tokens_file) if settings.tokens_file else None  # type: ignore[assignment]
    app[LIMITER] = RateLimiter()
    app[PROM], app[HTTP_METRICS] = build_registry(models)
    app[EDGE] = Edge(
        models=models,
        tokens=app[TOKENS],
        metrics=app[HTTP_METRICS],
        max_inflight=settings.max_inflight,
    )
    app[BACKGROUND] = []
    for method, path, handler in ROUTES:
        guarded = guard(app[EDGE], path, handler)
        if method == "GET":
            app.router.add_route("HEAD", path, guarded)  # as aiohttp's add_get does
        app.router.add_route(method, path, guarded)
    # Last, so it only takes what no route above has: aiohttp's own 404 and 405.
    app.router.add_route("*", "/{tail:.*}", guard(app[EDGE], "unmatched", unmatched))
    app[STOPPING] = asyncio.Event()
    app.on_shutdown.append(stop_streams)
    app.cleanup_ctx.append(
        lifecycle_ctx(models, snapshot_interval=settings.snapshot_interval, freeze_gc=freeze_gc)
    )
    return app
