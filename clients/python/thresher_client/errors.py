"""Errors the client raises.

ThresherClientError
├── ThresherAPIError         the server answered with an error status (RFC 9457 body)
└── ThresherConnectionError  no answer: refused, reset, timed out; retries exhausted or
                             not safe
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any


class ThresherClientError(Exception):
    """Base of everything this client raises on purpose."""


class ThresherAPIError(ThresherClientError):
    """An error answer, with the problem-details fields the server sent.

    ``type`` is the problem slug path (``/problems/invalid-event``), ``path`` names the
    offending value (``events[3].fields.price``) when the server gave one, ``retry_after`` is
    in seconds (503 and 429 only) and ``body`` is the decoded JSON object, or the raw text when
    the answer was not JSON.
    """

    def __init__(
        self,
        status: int,
        *,
        type: str = "about:blank",
        title: str = "",
        detail: str = "",
        path: str | None = None,
        retry_after: float | None = None,
        body: Mapping[str, Any] | str | None = None,
        method: str = "",
        url: str = "",
    ) -> None:
        self.status = status
        self.type = type
        self.title = title
        self.detail = detail
        self.path = path
        self.retry_after = retry_after
        self.body = body
        self.method = method
        self.url = url
        super().__init__(self._message())

    def _message(self) -> str:
        where = f" ({self.method} {self.url})" if self.method else ""
        what = f"{self.path}: {self.detail}" if self.path else self.detail
        head = f"{self.status} {self.title}".rstrip()
        return f"{head}: {what}{where}" if what else f"{head}{where}"

    @property
    def slug(self) -> str:
        """The last part of ``type``: ``conflict``, ``invalid-event``, ``unavailable``..."""
        return self.type.rsplit("/", 1)[-1]

    @classmethod
    def from_response(
        cls,
        status: int,
        reason: str,
        raw: bytes,
        *,
        retry_after: float | None,
        method: str = "",
        url: str = "",
    ) -> ThresherAPIError:
        """Build the error from an answer's status and body, JSON or not."""
        text = raw.decode("utf-8", errors="replace")
        try:
            data = json.loads(text) if text else None
        except ValueError:
            data = None
        if not isinstance(data, dict):
            # A proxy or a crash can answer with HTML or plain text; keep a readable piece.
            detail = " ".join(text.split())[:300] or "(empty body)"
            return cls(status, title=reason, detail=detail, retry_after=retry_after,
                       body=text, method=method, url=url)  # fmt: skip
        path = data.get("path")
        return cls(
            status,
            type=str(data.get("type", "about:blank")),
            title=str(data.get("title", reason)),
            detail=str(data.get("detail", "")),
            path=None if path is None else str(path),
            retry_after=retry_after,
            body=data,
            method=method,
            url=url,
        )


class ThresherConnectionError(ThresherClientError):
    """The server could not be reached or did not answer, after ``attempts`` tries."""

    def __init__(self, message: str, *, attempts: int, url: str = "") -> None:
        super().__init__(message)
        self.attempts = attempts
        self.url = url
