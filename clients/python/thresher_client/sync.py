"""A blocking facade over :class:`AsyncClient` for scripts and threaded applications."""

from __future__ import annotations

import asyncio
import random
import threading
from collections.abc import Coroutine, Iterable, Mapping, Sequence
from types import TracebackType
from typing import Any, TypeVar

from .aio import AsyncClient, EventLike, LabelLike
from .types import LabelAck, ModelInfo, Quality, ScoreResult, SnapshotInfo

T = TypeVar("T")


class Client:
    """The same methods as :class:`AsyncClient`, blocking; safe to share between threads.

    It runs an event loop in a background daemon thread of its own, so it also works inside a
    program that already runs an event loop (but do not call it from that loop's thread
    while the server answers on the same loop: it would wait for itself). Close it, or use it
    as a context manager, to stop the thread.
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
        rng: random.Random | None = None,
    ) -> None:
        self._loop = asyncio.new_event_loop()
        self._thread = threading.Thread(
            target=self._loop.run_forever, name="thresher-client", daemon=True
        )
        self._thread.start()
        try:
            self._client = AsyncClient(
                base_url, token=token, timeout=timeout, retries=retries, backoff=backoff,
                max_backoff=max_backoff, rng=rng,
            )  # fmt: skip
        except BaseException:
            self._stop()
            raise
        self._closed = False

    def __enter__(self) -> Client:
        return self

    def __exit__(
        self, kind: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        self.close()

    def close(self) -> None:
        """Close the connection pool and stop the background loop."""
        if self._closed:
            return
        self._closed = True
        try:
            self._run(self._client.close())
        finally:
            self._stop()

    def _stop(self) -> None:
        self._loop.call_soon_threadsafe(self._loop.stop)
        self._thread.join()
        self._loop.close()

    def _run(self, call: Coroutine[Any, Any, T]) -> T:
        if self._loop.is_closed():
            call.close()
            raise RuntimeError("this Client is closed; make a new one")
        return asyncio.run_coroutine_threadsafe(call, self._loop).result()

    def create_model(
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
        """See :meth:`AsyncClient.create_model`."""
        return self._run(
            self._client.create_model(
                name, classes, features=features, bits=bits, rule=rule, margin=margin,
                aggressiveness=aggressiveness, seed=seed, signed=signed,
            )
        )  # fmt: skip

    def models(self) -> list[ModelInfo]:
        """See :meth:`AsyncClient.models`."""
        return self._run(self._client.models())

    def model(self, name: str) -> ModelInfo:
        """See :meth:`AsyncClient.model`."""
        return self._run(self._client.model(name))

    def delete_model(self, name: str) -> None:
        """See :meth:`AsyncClient.delete_model`."""
        self._run(self._client.delete_model(name))

    def score(self, model: str, events: Iterable[EventLike], *,
              explain: int = 0) -> list[ScoreResult]:  # fmt: skip
        """See :meth:`AsyncClient.score`."""
        return self._run(self._client.score(model, list(events), explain=explain))

    def label(self, model: str, labels: Iterable[LabelLike], *, source: str,
              wait: bool = False) -> LabelAck:  # fmt: skip
        """See :meth:`AsyncClient.label`."""
        return self._run(self._client.label(model, list(labels), source=source, wait=wait))

    def quality(self, model: str) -> Quality:
        """See :meth:`AsyncClient.quality`."""
        return self._run(self._client.quality(model))

    def snapshots(self, model: str) -> list[SnapshotInfo]:
        """See :meth:`AsyncClient.snapshots`."""
        return self._run(self._client.snapshots(model))

    def take_snapshot(self, model: str) -> SnapshotInfo:
        """See :meth:`AsyncClient.take_snapshot`."""
        return self._run(self._client.take_snapshot(model))

    def restore_snapshot(self, model: str, generation: int) -> ModelInfo:
        """See :meth:`AsyncClient.restore_snapshot`."""
        return self._run(self._client.restore_snapshot(model, generation))

    def rebuild(self, model: str, *, exclude_sources: Sequence[str],
                from_snapshot: bool = False) -> ModelInfo:  # fmt: skip
        """See :meth:`AsyncClient.rebuild`."""
        call = self._client.rebuild(
            model, exclude_sources=exclude_sources, from_snapshot=from_snapshot
        )
        return self._run(call)

    def ready(self) -> bool:
        """See :meth:`AsyncClient.ready`."""
        return self._run(self._client.ready())

    def wait_ready(self, timeout: float = 30.0) -> None:
        """See :meth:`AsyncClient.wait_ready`."""
        self._run(self._client.wait_ready(timeout))
