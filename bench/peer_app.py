"""The HTTP peers: what a team would write instead of thresher, and the bare HTTP floor.

``python -m bench.peer_app --kind sklearn --port P`` serves the same two routes as thresher
(``POST /api/models/{m}/score`` and ``/labels``, same JSON bodies) with scikit-learn's
FeatureHasher and Perceptron in an aiohttp app: tokenise the fields, hash, ``decision_function``
to score, ``partial_fit`` to learn. It keeps nothing on disk. ``--kind floor`` parses the JSON
body of any POST and answers a fixed small JSON object: the cost of aiohttp and JSON alone.
``--loop`` picks the event loop as ``thresher serve --loop`` does, so every server in a
comparison runs on the same one.
"""

from __future__ import annotations

import argparse
import json
from typing import Any

from aiohttp import web

from thresher.cli import new_event_loop

from . import peer_tokens
from .common import BITS, CLASSES, demo_events

FIXED = json.dumps({"results": [{"id": None, "label": "fine", "margin": 0.0}]})
PRIME = 200  # labels learned at start, so decision_function has weights to use


async def healthz(request: web.Request) -> web.Response:
    return web.Response(text='{"status":"alive"}', content_type="application/json")


async def floor(request: web.Request) -> web.Response:
    await request.json()
    return web.Response(text=FIXED, content_type="application/json")


def sklearn_app() -> web.Application:
    """scikit-learn's hashing and perceptron behind thresher's two hot routes."""
    hasher = peer_tokens.hasher(BITS)
    model = peer_tokens.perceptron()
    index = {c: i for i, c in enumerate(CLASSES)}
    primer = demo_events(PRIME, seed=99)
    model.partial_fit(
        hasher.transform([peer_tokens.tokens(f) for _, f, _ in primer]),
        [index[label] for _, _, label in primer],
        classes=[0, 1],
    )

    async def score(request: web.Request) -> web.Response:
        body: dict[str, Any] = await request.json()
        events = body["events"]
        matrix = hasher.transform([peer_tokens.tokens(e["fields"]) for e in events])
        margins = model.decision_function(matrix)
        results = [
            {"id": e.get("id"), "label": CLASSES[int(m > 0)], "margin": float(m)}
            for e, m in zip(events, margins, strict=True)
        ]
        return web.json_response({"results": results})

    async def labels(request: web.Request) -> web.Response:
        body: dict[str, Any] = await request.json()
        items = body["labels"]
        matrix = hasher.transform([peer_tokens.tokens(i["fields"]) for i in items])
        model.partial_fit(matrix, [index[i["label"]] for i in items], classes=[0, 1])
        return web.json_response({"applied": len(items)})

    app = web.Application(client_max_size=8 * 1024 * 1024)
    app.router.add_post("/api/models/{model}/score", score)
    app.router.add_post("/api/models/{model}/labels", labels)
    app.router.add_get("/healthz", healthz)
    return app


def floor_app() -> web.Application:
    app = web.Application(client_max_size=8 * 1024 * 1024)
    app.router.add_get("/healthz", healthz)
    app.router.add_post("/{tail:.*}", floor)
    return app


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--kind", choices=("sklearn", "floor"), required=True)
    parser.add_argument("--port", type=int, required=True)
    parser.add_argument("--loop", choices=("auto", "uvloop", "asyncio"), default="auto")
    args = parser.parse_args(argv)
    loop = new_event_loop(args.loop)
    app = sklearn_app() if args.kind == "sklearn" else floor_app()
    web.run_app(app, host="127.0.0.1", port=args.port, access_log=None, print=None, loop=loop)


if __name__ == "__main__":
    main()
