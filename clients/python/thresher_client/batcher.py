"""Collects single events or labels into batched requests, by size or by time."""

from __future__ import annotations

import asyncio
import contextlib
from types import TracebackType
from typing import Any, Literal

from .aio import AsyncClient, EventLike, LabelLike, event_json, label_json
from .types import LabelAck, ScoreResult

MAX_BATCH = 10_000  # the server's default cap on events or labels per request


class Batcher:
    """Send items one at a time; the batcher sends them ``max_size`` at a time.

    ``kind="score"``: :meth:`add` takes an event and returns a future of its
    :class:`ScoreResult`. ``kind="labels"``: :meth:`add` takes a label and returns a future of
    the :class:`LabelAck` of the request that carried it (needs ``source``). A batch is sent
    when it reaches ``max_size`` items (and :meth:`add` waits for that send, which slows a
    producer that outruns the server) or ``max_delay`` seconds after its first item. Batches
    go out one at a time, in order. A failed request sets its error on every future of the
    batch. ::

        async with Batcher(client, "listings", kind="labels", source="review-queue") as b:
            for event_id, label in corrections:
                await b.add({"id": event_id, "label": label})
    """

    def __init__(
        self,
        client: AsyncClient,
        model: str,
        *,
        kind: Literal["labels", "score"] = "labels",
        source: str | None = None,
        max_size: int = 500,
        max_delay: float = 0.5,
        explain: int = 0,
        wait: bool = False,
    ) -> None:
        if kind not in ("labels", "score"):
            raise ValueError(f"kind must be 'labels' or 'score', got {kind!r}")
        if kind == "labels" and not source:
            raise ValueError("a labels batcher needs source=, e.g. source='review-queue'")
        if isinstance(max_size, bool) or not isinstance(max_size, int):
            raise ValueError(f"max_size must be a whole number, got {max_size!r}")
        if not 1 <= max_size <= MAX_BATCH:
            raise ValueError(f"max_size must be from 1 to {MAX_BATCH}, got {max_size}")
        if max_delay < 0:
            raise ValueError(f"max_delay must not be negative, got {max_delay!r}")
        self.client = client
        self.model = model
        self.kind = kind
        self.source = source
        self.max_size = max_size
        self.max_delay = max_delay
        self.explain = explain
        self.wait = wait
        self.requests = 0  # batches sent, successful or not
        self.failures = 0  # batches whose request raised
        self.last_error: Exception | None = None
        self._items: list[dict[str, Any]] = []
        self._futures: list[asyncio.Future[Any]] = []
        self._timer: asyncio.TimerHandle | None = None
        self._sends: set[asyncio.Task[None]] = set()
        self._lock = asyncio.Lock()
        self._closed = False

    async def __aenter__(self) -> Batcher:
        return self

    async def __aexit__(
        self, kind: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        await self.close()

    def __len__(self) -> int:
        """Items waiting to be sent."""
        return len(self._items)

    async def add(self, item: EventLike | LabelLike) -> asyncio.Future[Any]:
        """Queue one item; the future resolves to its ScoreResult or its batch's LabelAck."""
        if self._closed:
            raise RuntimeError("this Batcher is closed")
        index = len(self._items)
        to_json: Any = event_json if self.kind == "score" else label_json
        body = to_json(item, index)
        future: asyncio.Future[Any] = asyncio.get_running_loop().create_future()
        self._items.append(body)
        self._futures.append(future)
        if len(self._items) >= self.max_size:
            await self.flush()
        elif self._timer is None:
            self._timer = asyncio.get_running_loop().call_later(self.max_delay, self._on_timer)
        return future

    async def flush(self) -> None:
        """Send what is queued now and wait until every batch so far has been answered."""
        self._cancel_timer()
        items, futures = self._take()
        if items:
            await self._send(items, futures)
        # Wait also for batches the timer started, so flush() means "all answered".
        while self._sends:
            await asyncio.gather(*self._sends, return_exceptions=True)

    async def close(self) -> None:
        """Flush and refuse further items."""
        self._closed = True
        await self.flush()

    def _on_timer(self) -> None:
        self._timer = None
        items, futures = self._take()
        if items:
            task = asyncio.ensure_future(self._send(items, futures))
            self._sends.add(task)
            task.add_done_callback(self._sends.discard)

    def _cancel_timer(self) -> None:
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None

    def _take(self) -> tuple[list[dict[str, Any]], list[asyncio.Future[Any]]]:
        items, futures = self._items, self._futures
        self._items, self._futures = [], []
        return items, futures

    async def _send(self, items: list[dict[str, Any]], futures: list[asyncio.Future[Any]]) -> None:
        # One batch at a time keeps labels in the order they were added.
        async with self._lock:
            self.requests += 1
            try:
                if self.kind == "score":
                    results: list[ScoreResult] = await self.client.score(
                        self.model, items, explain=self.explain
                    )
                    for future, result in zip(futures, results, strict=True):
                        _settle(future, result)
                else:
                    ack: LabelAck = await self.client.label(
                        self.model, items, source=str(self.source), wait=self.wait
                    )
                    for future in futures:
                        _settle(future, ack)
            except Exception as exc:
                self.failures += 1
                self.last_error = exc
                for future in futures:
                    if not future.done():
                        future.set_exception(exc)


def _settle(future: asyncio.Future[Any], value: Any) -> None:
    with contextlib.suppress(asyncio.InvalidStateError):  # the caller cancelled it
        future.set_result(value)
