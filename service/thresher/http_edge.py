"""The one middleware every request passes: problem details, request metrics, the in-flight cap
and authentication.

It runs on every request, so what it needs is gathered once per app in an `Edge` (one app-key
lookup instead of five), and the per-route metric children are cached in `HttpMetrics`.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import Awaitable, Callable

from aiohttp import web

from .auth import OPEN, Principal, TokenStore
from .errors import NotFound, PayloadTooLarge, ThresherError, Unavailable
from .http_io import problem
from .lifecycle import ModelRegistry
from .metrics import HttpMetrics

logger = logging.getLogger("thresher.http")

Handler = Callable[[web.Request], Awaitable[web.StreamResponse]]
PRINCIPAL = web.RequestKey("principal", Principal)
OPEN_API_DOCUMENT = "/api/openapi.json"


class Edge:
    """What the middleware reads on every request; ``inflight`` counts requests in progress."""

    __slots__ = ("inflight", "max_inflight", "metrics", "models", "tokens")

    def __init__(
        self,
        *,
        models: ModelRegistry,
        tokens: TokenStore | None,
        metrics: HttpMetrics,
        max_inflight: int,
    ) -> None:
        self.models = models
        self.tokens = tokens
        self.metrics = metrics
        self.max_inflight = max_inflight
        self.inflight = 0

    def authenticate(self, request: web.Request, template: str) -> Principal:
        """The request's principal; /api/ routes need a token (when there is a tokens file)
        and a server that has finished recovering."""
        if not template.startswith("/api/") or template == OPEN_API_DOCUMENT:
            return OPEN
        tokens = self.tokens
        who = OPEN if tokens is None else tokens.authenticate(request.headers.get("Authorization"))
        if not self.models.ready:
            raise Unavailable(
                "recovering: loading snapshots and replaying label logs", retry_after=1.0
            )
        return who


EDGE = web.AppKey("edge", Edge)


@web.middleware
async def edge(request: web.Request, handler: Handler) -> web.StreamResponse:
    """Problem details, request metrics, in-flight cap, authentication."""
    state = request.app[EDGE]
    resource = request.match_info.route.resource
    template = resource.canonical if resource is not None else "unmatched"
    started = time.perf_counter()
    status = 500
    try:
        if state.inflight >= state.max_inflight and template.startswith("/api/"):
            raise Unavailable("too many requests in progress; retry shortly", retry_after=1.0)
        state.inflight += 1
        try:
            request[PRINCIPAL] = state.authenticate(request, template)
            response = await handler(request)
        finally:
            state.inflight -= 1
        status = response.status
        return response
    except ThresherError as error:
        status = error.status
        return problem(error)
    except web.HTTPException as exc:
        status = exc.status
        return _http_problem(request, exc)
    except (asyncio.CancelledError, ConnectionResetError):
        status = 499
        raise
    except Exception:
        logger.exception("unhandled error in %s %s", request.method, request.path)
        status = 500
        error = ThresherError("internal error; the server log has the details")
        error.status, error.slug, error.title = 500, "internal", "Internal error"
        return problem(error)
    finally:
        state.metrics.observe(template, request.method, status, time.perf_counter() - started)


def _http_problem(request: web.Request, exc: web.HTTPException) -> web.Response:
    """aiohttp's own 404, 405 and 413 as problem details; anything else is raised again."""
    if exc.status == 404:
        return problem(NotFound(f"no route {request.method} {request.path}"))
    if exc.status == 405:
        error = ThresherError(f"{request.method} is not allowed on {request.path}")
        error.status, error.slug, error.title = 405, "method-not-allowed", "Method not allowed"
        response = problem(error)
        allowed = exc.headers.get("Allow")
        if allowed:
            response.headers["Allow"] = allowed
        return response
    if exc.status == 413:
        return problem(PayloadTooLarge("request body is over the size limit"))
    raise exc


def principal(request: web.Request, role: str, model: str | None = None) -> Principal:
    """The request's principal, after checking it holds ``role`` (for ``model``)."""
    who: Principal = request[PRINCIPAL]
    who.require(role, model)
    return who
