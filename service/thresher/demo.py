"""``thresher demo``: an embedded service, the demo model and invented marketplace traffic.

One process, one event loop: the service (``create_app`` on an ``AppRunner`` and a
``TCPSite``), the traffic generator talking to it over its own socket with the client, and a
status line once a second. Listings are scored in batches by id, then labelled by id alone
after a simulated moderator review, so both the served and the progressive mistake rates
move; the fraud campaign changes at ``--shift-at`` listings (see ``demo_traffic``).
"""

from __future__ import annotations

import argparse
import asyncio
import errno
import json
import logging
import signal
import sys
import time
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .cli_ops import EXIT_OK, EXIT_USAGE, CommandFailed, client_failure, count, number, pct

if TYPE_CHECKING:  # numpy comes with the traffic; `thresher --help` need not load it
    from .demo_traffic import ListingTraffic

HOST = "127.0.0.1"
SOURCE = "moderators"
TICK = 0.1  # seconds between batches
MAX_BATCH = 2_000
MODEL = "listings"  # the demo model's name, whatever the definition calls it
# With fraud in a quarter of the listings the campaign shift is large enough for the drift
# test to fire within a few hundred labels; at 12% it stays under the alarm threshold.
FRAUD_RATE = 0.25


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The options of ``thresher demo``."""
    add = p.add_argument
    add("--duration", type=number(float, 0, above=True), metavar="SECONDS",
        help="stop after this many seconds (default: run until Ctrl-C)")  # fmt: skip
    add("--port", type=number(int, 1, high=65535), default=8750,
        help="port on 127.0.0.1 (default 8750)")  # fmt: skip
    add("--data-dir", metavar="DIR", help="data directory (default: a new "
        "./thresher-demo-<timestamp>); an existing demo directory is continued")  # fmt: skip
    add("--seed", type=number(int, 0), default=0, help="traffic seed (default 0)")
    add("--rate", type=number(float, 0, above=True), default=300.0, metavar="EVENTS_PER_SECOND",
        help="listings per second (default 300)")  # fmt: skip
    add("--shift-at", type=number(int, 0), default=2_000, metavar="N",
        help="listing number at which the fraud campaign changes (default 2000)")  # fmt: skip
    share = number(float, 0, above=True, high=1)
    add("--fraud-rate", type=share, default=FRAUD_RATE, metavar="SHARE",
        help=f"share of listings that are fraud (default {FRAUD_RATE})")  # fmt: skip
    add("--review-delay", type=number(float, 0), default=0.5, metavar="SECONDS",
        help="simulated review time before a listing is labelled (default 0.5)")  # fmt: skip


@dataclass(slots=True)
class Counts:
    """What the traffic generator has sent so far."""

    scored: int = 0


def new_data_dir() -> Path:
    """``./thresher-demo-<timestamp>``, with a suffix if that exists already."""
    base = Path.cwd() / f"thresher-demo-{time.strftime('%Y%m%d-%H%M%S')}"
    path, n = base, 1
    while path.exists():
        n += 1
        path = base.with_name(f"{base.name}-{n}")
    return path


def run(args: argparse.Namespace) -> int:
    """The ``demo`` command: serve, feed traffic, stop, print the closing summary."""
    data_dir = Path(args.data_dir) if args.data_dir else new_data_dir()
    logging.basicConfig(level=logging.WARNING, format="thresher: %(levelname)s %(message)s")
    logging.getLogger("aiohttp.access").setLevel(logging.WARNING)
    logging.getLogger("thresher.drift").addFilter(_drift_in_words)
    return asyncio.run(serve_demo(args, data_dir))


def _drift_in_words(record: logging.LogRecord) -> bool:
    """Say the service's structured drift-alarm line in words on the demo's console.

    ``serve`` keeps the JSON for log pipelines; a person watching the demo wants a sentence.
    """
    try:
        (payload,) = record.args or ()
        event = json.loads(payload)
        rates = event["mistake_rate"]
        record.msg = (
            f"drift alarm on model {event['model']!r} at label {count(event['labelled'])}: "
            f"mistakes last_1000 {pct(rates['last_1000'])}, all {pct(rates['all'])}"
        )
        record.args = ()
    except (TypeError, ValueError, KeyError):
        pass  # not the shape this filter knows: the line goes out as the service wrote it
    return True


async def serve_demo(args: argparse.Namespace, data_dir: Path) -> int:
    """Run the embedded service and the traffic until a signal or ``--duration``."""
    from aiohttp import web

    from thresher_client import ThresherClientError

    from .http import create_app
    from .settings import Settings

    loop = asyncio.get_running_loop()
    stop = asyncio.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)
    url = f"http://{HOST}:{args.port}"
    settings = Settings.from_mapping({"data_dir": str(data_dir), "host": HOST, "port": args.port,
                                      "snapshot_interval": 15.0, "shutdown_timeout": 3.0,
                                      "log_level": "warning"})  # fmt: skip
    # A short shutdown timeout: an open dashboard holds an event stream that never ends.
    runner = web.AppRunner(create_app(settings), access_log=None, shutdown_timeout=2.0)
    started = time.monotonic()
    try:
        await runner.setup()  # takes the data directory: Conflict if a server holds it
        try:
            try:
                await web.TCPSite(runner, HOST, args.port).start()
            except OSError as error:
                why = (
                    "address already in use" if error.errno == errno.EADDRINUSE else error.strerror
                )
                raise CommandFailed(f"cannot listen on {HOST}:{args.port}: {why}; pick another "
                                    "--port") from None  # fmt: skip
            counts = Counts()
            final = await _drive(args, url, data_dir, stop, counts)
        finally:
            await runner.cleanup()  # a graceful stop: the final snapshot is written here
    except ThresherClientError as error:
        raise client_failure(error, url) from None
    finally:
        for sig in (signal.SIGINT, signal.SIGTERM):
            loop.remove_signal_handler(sig)
    print(closing_summary(final, counts, time.monotonic() - started, data_dir), flush=True)
    return EXIT_OK


async def _drive(args: argparse.Namespace, url: str, data_dir: Path, stop: asyncio.Event,
                 counts: Counts) -> dict[str, Any]:  # fmt: skip
    """Create the model, run traffic and status until told to stop; the last quality report."""
    from thresher_client import AsyncClient

    from .demo_traffic import ListingTraffic

    name = MODEL
    async with AsyncClient(url, timeout=30.0) as client:
        await client.wait_ready(60.0)
        first = await _ensure_model(client)
        try:
            traffic = ListingTraffic(seed=args.seed, shift_at=args.shift_at,
                                     fraud_rate=args.fraud_rate)  # fmt: skip
        except ValueError as error:
            raise CommandFailed(str(error), EXIT_USAGE) from None
        traffic.index = first  # a continued directory goes on with fresh listing ids
        print(f"thresher demo: dashboard on {url}/ (data in {data_dir}); "
              + ("Ctrl-C to stop" if args.duration is None else f"running {args.duration:g} s"),
              flush=True)  # fmt: skip
        tasks = [
            asyncio.create_task(_feed(client, traffic, args, counts)),
            asyncio.create_task(_status(client, traffic, args.shift_at)),
            asyncio.create_task(stop.wait()),
        ]
        try:
            done, _ = await asyncio.wait(
                tasks, timeout=args.duration, return_when=asyncio.FIRST_COMPLETED
            )
            for task in done:
                task.result()  # the feeder or status line only ends by failing
        finally:
            for task in tasks:
                task.cancel()
            await asyncio.gather(*tasks, return_exceptions=True)
            if sys.stdout.isatty():
                print(flush=True)  # end the status line
        return dict((await client.quality(name)).raw)


async def _ensure_model(client: Any) -> int:
    """Create the demo model, or reuse the one in a continued directory; its log head."""
    from thresher_client import ThresherAPIError

    from .demo_traffic import DEMO_MODEL

    body = dict(DEMO_MODEL)
    del body["name"]
    name, classes = MODEL, body.pop("classes")
    try:
        info = await client.create_model(name, classes, **body)
    except ThresherAPIError as error:
        if error.status != 409:
            raise
        info = await client.model(name)
        if list(info.classes) != list(classes):
            raise CommandFailed(f"the data directory holds another model named {name!r}; "
                                "pick another --data-dir") from None  # fmt: skip
    return int(info.head)


async def _feed(client: Any, traffic: ListingTraffic, args: argparse.Namespace,
                counts: Counts) -> None:  # fmt: skip
    """Score listings at ``--rate``; label each batch ``--review-delay`` seconds later."""
    from thresher_client import Event, Label

    name = MODEL
    loop = asyncio.get_running_loop()
    start, made = loop.time(), 0
    reviews: deque[tuple[float, list[Label]]] = deque()
    while True:
        now = loop.time()
        wanted = int((now - start) * args.rate) - made
        if wanted > args.rate:  # more than a second behind (a slow machine): drop the backlog
            start, wanted = now - made / args.rate, int(args.rate * TICK)
        batch = traffic.batch(min(wanted, MAX_BATCH)) if wanted > 0 else []
        if batch:
            made += len(batch)
            await client.score(name, [Event(fields, id=i) for i, fields, _ in batch])
            counts.scored += len(batch)
            labels = [Label(label, id=i) for i, _, label in batch]
            reviews.append((loop.time() + args.review_delay, labels))
        due: list[Label] = []
        while reviews and reviews[0][0] <= loop.time():
            due += reviews.popleft()[1]
        if due:
            await client.label(name, due, source=SOURCE)
        await asyncio.sleep(TICK)


def status_line(report: dict[str, Any], phase: str) -> str:
    rates, drift = report["mistake_rate"], report["drift"]
    return (
        f"labelled {count(report['labelled'])} | mistakes last_1000 "
        f"{pct(rates.get('last_1000'))} | served {pct(report['served']['mistake_rate'])} | "
        f"drift alarms {drift['alarms']} | phase: {phase}"
    )


async def _status(client: Any, traffic: ListingTraffic, shift_at: int) -> None:
    """A live summary: redrawn each second on a terminal, a line every 5 s otherwise."""
    name = MODEL
    tty = sys.stdout.isatty()
    ticks = 0
    while True:
        await asyncio.sleep(1.0)
        ticks += 1
        if not tty and ticks % 5:
            continue
        report = dict((await client.quality(name)).raw)
        before = traffic.phase(traffic.index) == "before"
        phase = f"before the shift at {shift_at:,}" if before else "after the shift"
        line = status_line(report, phase)
        if tty:
            sys.stdout.write("\r\x1b[K" + line)
            sys.stdout.flush()
        else:
            print(line, flush=True)


def closing_summary(report: dict[str, Any], counts: Counts, elapsed: float,
                    data_dir: Path) -> str:  # fmt: skip
    """What the run did and where its data is."""
    from .snapshots import SnapshotStore

    rates, drift = report["mistake_rate"], report["drift"]
    store = SnapshotStore(data_dir / "models" / MODEL / "snapshots")
    newest = store.list()[:1]
    snap = (
        f"snapshot generation {newest[0].generation} at offset {newest[0].offset:,}"
        if newest
        else "no snapshot"
    )
    at = ", ".join(map(count, drift["alarm_at"][-5:]))
    return "\n".join([
        f"thresher demo stopped after {elapsed:.1f} s: {count(counts.scored)} listings scored, "
        f"{count(report['labelled'])} labelled by {SOURCE}",
        f"  mistake rate: all {pct(rates.get('all'))}, last_1000 {pct(rates.get('last_1000'))}; "
        f"served {pct(report['served']['mistake_rate'])}; drift alarms {drift['alarms']}"
        + (f" (at label {at})" if at else ""),
        f"  data left in {data_dir} ({snap})",
        f"  look at it again with: thresher serve --data-dir {data_dir}",
    ])  # fmt: skip
