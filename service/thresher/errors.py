"""The one exception hierarchy of thresher.

Every error a user can cause is a :class:`ThresherError`. Each subclass fixes the HTTP status
and a short ``slug`` that names the problem type; the instance carries a human ``detail`` that
says what was wrong and how to fix it, and, where it applies, the JSON ``path`` of the
offending value (``events[3].fields.price``). The HTTP layer maps these to RFC 9457 problem
details; the command line prints ``detail`` on one line. Nothing else is raised on bad input.

    ThresherError
    ├── BadRequest          400 malformed body or query
    ├── Unauthorized        401 missing or unknown bearer token
    ├── Forbidden           403 token lacks the role or the model
    ├── NotFound            404 no such model, snapshot or route
    ├── Conflict            409 model exists; label differs from the one applied
    ├── PayloadTooLarge     413 body, batch or event over a limit
    ├── UnsupportedMedia    415 content type we do not read
    ├── InvalidInput        422 well-formed but invalid values
    │   ├── InvalidEvent    an event's fields do not fit the model's feature spec
    │   └── InvalidConfig   a model definition or setting is invalid
    ├── RateLimited         429 label rate cap for a token exceeded
    └── Unavailable         503 overloaded, not ready, or the label log cannot write
        └── LogUnavailable  the durable append failed; nothing was acknowledged
"""

from __future__ import annotations

from typing import Any


class ThresherError(Exception):
    """Base of every user-facing error; carries what the problem-details answer needs."""

    status: int = 400
    slug: str = "bad-request"
    title: str = "Bad request"

    def __init__(self, detail: str, *, path: str | None = None, **extra: Any) -> None:
        super().__init__(detail)
        self.detail = detail
        self.path = path
        self.extra = extra

    def __str__(self) -> str:
        return f"{self.path}: {self.detail}" if self.path else self.detail

    def to_problem(self) -> dict[str, Any]:
        """The RFC 9457 body: type, title, status, detail, plus ``path`` and any extras."""
        body: dict[str, Any] = {
            "type": f"/problems/{self.slug}",
            "title": self.title,
            "status": self.status,
            "detail": self.detail,
        }
        if self.path is not None:
            body["path"] = self.path
        body.update(self.extra)
        return body


class BadRequest(ThresherError):
    status, slug, title = 400, "malformed", "Malformed request"


class Unauthorized(ThresherError):
    status, slug, title = 401, "unauthorized", "Missing or unknown bearer token"


class Forbidden(ThresherError):
    status, slug, title = 403, "forbidden", "Token not allowed to do this"


class NotFound(ThresherError):
    status, slug, title = 404, "not-found", "Not found"


class Conflict(ThresherError):
    status, slug, title = 409, "conflict", "Conflicts with the current state"


class PayloadTooLarge(ThresherError):
    status, slug, title = 413, "too-large", "Request over a size limit"


class UnsupportedMedia(ThresherError):
    status, slug, title = 415, "unsupported-media-type", "Unsupported content type"


class InvalidInput(ThresherError):
    status, slug, title = 422, "invalid-input", "Invalid value"


class InvalidEvent(InvalidInput):
    slug, title = "invalid-event", "Event does not fit the model's features"


class InvalidConfig(InvalidInput):
    slug, title = "invalid-config", "Invalid model definition or setting"


class RateLimited(ThresherError):
    status, slug, title = 429, "rate-limited", "Too many labels"

    def __init__(self, detail: str, *, retry_after: float = 1.0, **extra: Any) -> None:
        super().__init__(detail, **extra)
        self.retry_after = retry_after


class Unavailable(ThresherError):
    status, slug, title = 503, "unavailable", "Service unavailable"

    def __init__(self, detail: str, *, retry_after: float = 1.0, **extra: Any) -> None:
        super().__init__(detail, **extra)
        self.retry_after = retry_after


class LogUnavailable(Unavailable):
    slug, title = "log-unavailable", "Label log cannot accept writes"
