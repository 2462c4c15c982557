"""The asyncio client over aiohttp: one method per route of the HTTP API."""

from __future__ import annotations

import asyncio
import json
import random
from collections.abc import Iterable, Mapping, Sequence
from types import TracebackType
from typing import Any
from urllib.parse import quote

import aiohttp

from .errors import ThresherAPIError, ThresherConnectionError
from .retry import RETRY_STATUSES, RetryPolicy, parse_retry_after
from .types import Event, Label, LabelAck, ModelInfo, Quality, ScoreResult, SnapshotInfo

EventLike = Event | Mapping[str, Any]
LabelLike = Label | Mapping[str, Any]


def event_json(event: EventLike, index: int) -> dict[str, Any]:
    """An event as the score route wants it: ``{"id"?, "fields"}``."""
    if isinstance(event, Event):
        return event.to_json()
    if isinstance(event, Mapping):
        return dict(event)
    raise TypeError(f"events[{index}] must be an Event or a dict with 'fields', not "
                    f"{type(event).__name__}")  # fmt: skip


def label_json(label: LabelLike, index: int) -> dict[str, Any]:
    """A label as the labels route wants it: ``{"id"?, "label", "fields"?}``."""
    if isinstance(label, Label):
        return label.to_json()
    if isinstance(label, Mapping):
        return dict(label)
    raise TypeError(f"labels[{index}] must be a Label or a dict with 'label', not "
                    f"{type(label).__name__}")  # fmt: skip


class AsyncClient:
    """Talks to one thresher server; use as ``async with AsyncClient(url) as client:``.

    ``token`` is sent as ``Authorization: Bearer <token>``. ``timeout`` bounds each attempt, in
    seconds. Failed attempts are retried as :mod:`thresher_client.retry` describes, ``retries``
    times at most, waiting ``backoff * 2**k`` seconds (with jitter, capped at ``max_backoff``)
    or the server's ``Retry-After``. A ``session`` passed in is used and left open; otherwise
    the client opens its own on first use and closes it in :meth:`close`.
    """

    def __init__(
        self,
        base_url: str,
        *,
        token: str | None = None,
        timeout: float = 10.0,
        retries: int = 5,
        backoff: float = 0.2,
        max_backoff: float = 5.0,
        session: aiohttp.ClientSession | None = None,
        rng: random.Random | None = None,
    ) -> None:
        if not base_url.startswith(("http://", "https://")):
            raise ValueError(f"base_url must start with http:// or https://, got {base_url!r}")
        if timeout <= 0:
            raise ValueError(f"timeout must be greater than 0 seconds, got {timeout!r}")
        self.base_url = base_url.rstrip("/")
        self.policy = RetryPolicy(retries, backoff, max_backoff, rng=rng)
        self._timeout = aiohttp.ClientTimeout(total=timeout)
        self._headers = {"Accept": "application/json"}
        if token is not None:
            self._headers["Authorization"] = f"Bearer {token}"
        self._session = session
        self._own_session = session is None

    async def __aenter__(self) -> AsyncClient:
        return self

    async def __aexit__(
        self, kind: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        await self.close()

    async def close(self) -> None:
        """Close the session this client opened (a session passed in stays open)."""
        if self._own_session and self._session is not None:
            await self._session.close()
            self._session = None

    # -- models --------------------------------------------------------------------------

    async def create_model(
        self,
        name: str,
        classes: Sequence[str],
        *,
        features: Mapping[str, Any] | None = None,
        bits: int = 20,
        rule: str = "classic",
        margin: float = 0.0,
        aggressiveness: float = 1.0,
        seed: int = 0,
        signed: bool = True,
    ) -> ModelInfo:
        """Create a model; ``features`` is a feature spec, or None to infer every field."""
        body = {"name": name, "classes": list(classes),
                "features": None if features is None else dict(features), "bits": bits,
                "rule": rule, "margin": margin, "aggressiveness": aggressiveness, "seed": seed,
                "signed": signed}  # fmt: skip
        # Not repeated after a mid-request failure: a repeat would answer 409 "exists".
        return ModelInfo.from_json(await self._call("POST", "/api/models", body, safe=False))

    async def models(self) -> list[ModelInfo]:
        """Every model this token may see."""
        data = await self._call("GET", "/api/models")
        return [ModelInfo.from_json(m) for m in data["models"]]

    async def model(self, name: str) -> ModelInfo:
        """One model's definition, counters and newest snapshot."""
        return ModelInfo.from_json(await self._call("GET", _model_path(name)))

    async def delete_model(self, name: str) -> None:
        """Delete a model with its label log and snapshots."""
        await self._call("DELETE", _model_path(name), safe=False)

    # -- scoring and labelling -----------------------------------------------------------

    async def score(self, model: str, events: Iterable[EventLike], *,
                    explain: int = 0) -> list[ScoreResult]:  # fmt: skip
        """Score events (``Event`` or ``{"id"?, "fields"}``); ``explain`` top tokens each."""
        items = [event_json(e, i) for i, e in enumerate(events)]
        body = {"events": items, "explain": explain}
        data = await self._call("POST", _model_path(model, "score"), body)
        return [ScoreResult.from_json(r) for r in data["results"]]

    async def label(
        self, model: str, labels: Iterable[LabelLike], *, source: str, wait: bool = False
    ) -> LabelAck:
        """Send corrections from ``source`` (e.g. ``"review-queue"``).

        Labels with ids are applied once, so this call retries them freely; see
        :mod:`thresher_client.retry` for labels without ids.
        """
        items = [label_json(item, i) for i, item in enumerate(labels)]
        all_ids = all(item.get("id") is not None for item in items)
        body = {"labels": items, "source": source, "wait": wait}
        data = await self._call("POST", _model_path(model, "labels"), body, safe=all_ids,
                                retry_status=all_ids or not wait)  # fmt: skip
        return LabelAck.from_json(data)

    async def quality(self, model: str) -> Quality:
        """The progressive-validation report, drift state and recent mistakes."""
        return Quality.from_json(await self._call("GET", _model_path(model, "quality")))

    # -- snapshots and recovery ----------------------------------------------------------

    async def snapshots(self, model: str) -> list[SnapshotInfo]:
        """Snapshot generations kept for a model, oldest first as the server lists them."""
        data = await self._call("GET", _model_path(model, "snapshots"))
        return [SnapshotInfo.from_json(s) for s in data["snapshots"]]

    async def take_snapshot(self, model: str) -> SnapshotInfo:
        """Write a snapshot now."""
        # A repeat after a lost answer only writes one more generation, which is harmless.
        return SnapshotInfo.from_json(await self._call("POST", _model_path(model, "snapshots")))

    async def restore_snapshot(self, model: str, generation: int) -> ModelInfo:
        """Roll the model back to a snapshot generation."""
        path = _model_path(model, "snapshots", str(int(generation)), "restore")
        return ModelInfo.from_json(await self._call("POST", path))

    async def rebuild(
        self, model: str, *, exclude_sources: Sequence[str], from_snapshot: bool = False
    ) -> ModelInfo:
        """Relearn from the label log, leaving out labels from ``exclude_sources``."""
        if isinstance(exclude_sources, str):
            raise TypeError("exclude_sources must be a list of source names, not one string")
        body = {"exclude_sources": list(exclude_sources), "from_snapshot": from_snapshot}
        return ModelInfo.from_json(await self._call("POST", _model_path(model, "rebuild"), body))

    async def ready(self) -> bool:
        """True when the server has finished recovery; False if not yet, or unreachable."""
        try:
            await self._call("GET", "/readyz", retry=False)
        except ThresherAPIError as exc:
            if exc.status == 503:
                return False
            raise
        except ThresherConnectionError:
            return False
        return True

    async def wait_ready(self, timeout: float = 30.0, interval: float = 0.05) -> None:
        """Poll :meth:`ready` until it is True; raise ThresherConnectionError on timeout."""
        loop = asyncio.get_running_loop()
        deadline = loop.time() + timeout
        while not await self.ready():
            if loop.time() >= deadline:
                raise ThresherConnectionError(
                    f"{self.base_url} was not ready within {timeout:g} s", attempts=0,
                    url=self.base_url,
                )  # fmt: skip
            await asyncio.sleep(interval)

    # -- transport -----------------------------------------------------------------------

    def _open(self) -> aiohttp.ClientSession:
        if self._session is None or self._session.closed:
            if not self._own_session:
                raise RuntimeError("the session passed to AsyncClient is closed")
            self._session = aiohttp.ClientSession(timeout=self._timeout)
        return self._session

    async def _call(
        self,
        method: str,
        path: str,
        body: Any = None,
        *,
        safe: bool = True,
        retry_status: bool = True,
        retry: bool = True,
    ) -> Any:
        """One API call with retries; ``safe`` means it may be repeated after being sent."""
        session = self._open()
        url = self.base_url + path
        try:
            data = None if body is None else json.dumps(body, allow_nan=False).encode()
        except (TypeError, ValueError) as exc:
            # Raised before anything is sent: NaN, infinity, sets or objects in the fields.
            raise ValueError(f"the request body cannot be sent as JSON: {exc}") from None
        headers = dict(self._headers)
        if data is not None:
            headers["Content-Type"] = "application/json"
        attempt = 0
        while True:
            retry_after: float | None = None
            try:
                async with session.request(method, url, data=data, headers=headers,
                                           timeout=self._timeout) as resp:  # fmt: skip
                    raw = await resp.read()
                    status, reason = resp.status, resp.reason or ""
                    retry_after = parse_retry_after(resp.headers.get("Retry-After"))
            except aiohttp.ClientConnectorError as exc:
                # Never reached the server, so nothing was sent: always safe to try again.
                failure: Exception = exc
            except (aiohttp.ClientError, TimeoutError) as exc:
                if not safe:
                    raise ThresherConnectionError(
                        f"{method} {url} failed after the request was sent ({_why(exc)}); not "
                        "retried because the server may have applied it - check before resending",
                        attempts=attempt + 1, url=url,
                    ) from exc  # fmt: skip
                failure = exc
            else:
                if status < 400:
                    return _decode(raw)
                error = ThresherAPIError.from_response(
                    status, reason, raw, retry_after=retry_after, method=method, url=url
                )
                if status not in RETRY_STATUSES or not retry_status:
                    raise error
                failure = error
            if not retry or attempt >= self.policy.retries:
                if isinstance(failure, ThresherAPIError):
                    raise failure
                raise ThresherConnectionError(
                    f"{method} {url} failed after {attempt + 1} attempt(s): {_why(failure)}",
                    attempts=attempt + 1, url=url,
                ) from failure  # fmt: skip
            await asyncio.sleep(self.policy.delay(attempt, retry_after))
            attempt += 1


def _model_path(name: str, *rest: str) -> str:
    if not isinstance(name, str) or not name:
        raise ValueError(f"a model name must be a non-empty string, got {name!r}")
    parts = [quote(name, safe=""), *rest]
    return "/api/models/" + "/".join(parts)


def _decode(raw: bytes) -> Any:
    return json.loads(raw) if raw else None


def _why(exc: BaseException) -> str:
    if isinstance(exc, TimeoutError):
        return "timed out"
    return f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
