"""Python client for a thresher server: score events, send labels, watch quality.

Asynchronous use::

    from thresher_client import AsyncClient, Event, Label

    async with AsyncClient("http://127.0.0.1:8750", token="...") as client:
        await client.create_model("listings", ["fine", "fraud"], rule="averaged")
        [result] = await client.score("listings", [Event({"title": "oak table"}, id="l-1")])
        ack = await client.label("listings", [Label("fine", id="l-1")], source="review-queue")
        print(result.label, result.margin, ack.applied, (await client.quality("listings")).raw)

Blocking use, with the same methods::

    from thresher_client import Client

    with Client("http://127.0.0.1:8750") as client:
        client.score("listings", [{"id": "l-2", "fields": {"title": "bike"}}])

Many small calls become few requests with :class:`Batcher`. Errors are
:class:`ThresherAPIError` (the server said no; see ``status``, ``type``, ``path``) and
:class:`ThresherConnectionError` (no answer). 503 and 429 answers and connection failures are
retried with backoff; :mod:`thresher_client.retry` says exactly when.
"""

from __future__ import annotations

from .aio import AsyncClient
from .batcher import Batcher
from .errors import ThresherAPIError, ThresherClientError, ThresherConnectionError
from .retry import RetryPolicy
from .sync import Client
from .types import (
    Event,
    ExplainItem,
    Label,
    LabelAck,
    Mistake,
    ModelInfo,
    Quality,
    ScoreResult,
    SnapshotInfo,
)

__all__ = [
    "AsyncClient",
    "Batcher",
    "Client",
    "Event",
    "ExplainItem",
    "Label",
    "LabelAck",
    "Mistake",
    "ModelInfo",
    "Quality",
    "RetryPolicy",
    "ScoreResult",
    "SnapshotInfo",
    "ThresherAPIError",
    "ThresherClientError",
    "ThresherConnectionError",
]
