"""The edge every request passes: problem details, request metrics, the in-flight cap and
authentication.

It wraps each route's handler when the route is added (`guard`), not as an aiohttp
middleware: an app with any middleware pays for aiohttp's middleware chain on every request
(two extra coroutine frames and a cache lookup), and the route's template, its metric counts
and whether it needs a token are then worked out once per route instead of once per request.
A catch-all route (`unmatched`) turns what aiohttp would answer itself, 404 and 405, into
problem details.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Awaitable, Callable
from time import perf_counter

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
    """What the edge reads on every request; ``inflight`` counts requests in progress."""

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

    def authenticate(self, request: web.Request) -> Principal:
        """The principal of a request to an /api/ route: it needs a token (when there is a
        tokens file) and a server that has finished recovering."""
        tokens = self.tokens
        who = OPEN if tokens is None else tokens.authenticate(request.headers.get("Authorization"))
        if not self.models.ready:
            raise Unavailable(
                "recovering: loading snapshots and replaying label logs", retry_after=1.0
            )
        return who


EDGE = web.AppKey("edge", Edge)


def guard(edge: Edge, template: str, handler: Handler) -> Handler:
    """``handler`` behind the edge, for the route ``template`` (its metric label)."""
    capped = template.startswith("/api/")
    checked = capped and template != OPEN_API_DOCUMENT
    stats = edge.metrics.route(template)

    async def guarded(request: web.Request) -> web.StreamResponse:
        started = perf_counter()
        status = 500
        try:
            if capped and edge.inflight >= edge.max_inflight:
                raise Unavailable("too many requests in progress; retry shortly", retry_after=1.0)
            edge.inflight += 1
            try:
                request[PRINCIPAL] = edge.authenticate(request) if checked else OPEN
                response = await handler(request)
            finally:
                edge.inflight -= 1
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
            stats.observe(request.method, status, perf_counter() - started)

    return guarded


async def unmatched(request: web.Request) -> web.StreamResponse:
    """The catch-all route: 405 with ``Allow`` when another route has the path, else 404."""
    allowed: set[str] = set()
    mine = request.match_info.route.resource
    for resource in request.app.router.resources():
        if resource is not mine:
            allowed |= (await resource.resolve(request))[1]
    if allowed:
        raise web.HTTPMethodNotAllowed(request.method, allowed)
    raise web.HTTPNotFound()


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
