"""A blocking facade over :class:`AsyncClient` for scripts and threaded applications."""

from __future__ import annotations

import asyncio
import functools
import random
import threading
from collections.abc import Callable, Coroutine, Iterable
from types import TracebackType
from typing import Any, Concatenate, ParamSpec, TypeVar

from .aio import AsyncClient, EventLike, LabelLike
from .types import LabelAck, ScoreResult

T = TypeVar("T")
P = ParamSpec("P")


def _blocking(
    method: Callable[Concatenate[AsyncClient, P], Coroutine[Any, Any, T]],
) -> Callable[Concatenate[Client, P], T]:
    """``AsyncClient.method`` as a :class:`Client` method: run on its loop, waited for."""
    name = method.__name__

    @functools.wraps(method)
    def call(self: Client, /, *args: P.args, **kwargs: P.kwargs) -> T:
        return self._run(getattr(self._client, name)(*args, **kwargs))

    call.__qualname__ = f"Client.{name}"
    return call


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

    # Each of these only runs the AsyncClient method of the same name on the client's loop.
    create_model = _blocking(AsyncClient.create_model)
    models = _blocking(AsyncClient.models)
    model = _blocking(AsyncClient.model)
    delete_model = _blocking(AsyncClient.delete_model)
    quality = _blocking(AsyncClient.quality)
    snapshots = _blocking(AsyncClient.snapshots)
    take_snapshot = _blocking(AsyncClient.take_snapshot)
    restore_snapshot = _blocking(AsyncClient.restore_snapshot)
    rebuild = _blocking(AsyncClient.rebuild)
    ready = _blocking(AsyncClient.ready)

    # These read their iterable here, on the caller's thread, not on the client's loop.
    def score(self, model: str, events: Iterable[EventLike], *,
              explain: int = 0) -> list[ScoreResult]:  # fmt: skip
        """See :meth:`AsyncClient.score`."""
        return self._run(self._client.score(model, list(events), explain=explain))

    def label(self, model: str, labels: Iterable[LabelLike], *, source: str,
              wait: bool = False) -> LabelAck:  # fmt: skip
        """See :meth:`AsyncClient.label`."""
        return self._run(self._client.label(model, list(labels), source=source, wait=wait))

    # Without AsyncClient.wait_ready's polling interval.
    def wait_ready(self, timeout: float = 30.0) -> None:
        """See :meth:`AsyncClient.wait_ready`."""
        self._run(self._client.wait_ready(timeout))
