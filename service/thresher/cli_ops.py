"""Operator subcommands of ``thresher``: models, quality, snapshots, rebuild, replay, demo.

Commands that talk to a running server go through ``thresher_client``. Each prints a table
(or, with ``--json``, the server's JSON) and exits 0; a failure is one line on stderr and exit
1 (the server said no, or could not be reached); bad usage exits 2.
"""

from __future__ import annotations

import argparse
import asyncio
import errno
import json
import os
import re
import sys
import time
from collections.abc import Awaitable, Callable, Sequence
from typing import Any

from .errors import ThresherError

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2
DEFAULT_URL = "http://127.0.0.1:8750"
NUMERIC = re.compile(r"^[-+]?[\d,.]+(%| s)?$")


class CommandFailed(Exception):
    """A command cannot go on; ``message`` is printed on one line, ``code`` is the exit code."""

    def __init__(self, message: str, code: int = EXIT_FAILED) -> None:
        super().__init__(message)
        self.message = message
        self.code = code


# -- output --------------------------------------------------------------------------------


def table(headers: Sequence[str] | None, rows: Sequence[Sequence[Any]]) -> str:
    """A plain-text table (no header line when ``headers`` is None); columns whose cells all
    look like numbers are right-aligned."""
    body = [[str(c) for c in row] for row in rows]
    cells = body if headers is None else [[str(h) for h in headers], *body]
    columns = range(len(cells[0])) if cells else range(0)
    widths = [max(len(row[i]) for row in cells) for i in columns]
    right = [bool(body) and all(NUMERIC.match(r[i]) or r[i] == "-" for r in body) for i in columns]
    lines = [
        "  ".join(c.rjust(w) if r else c.ljust(w) for c, w, r in zip(row, widths, right)).rstrip()  # noqa: B905
        for row in cells
    ]
    return "\n".join(lines)


def pct(rate: float | None) -> str:
    return "-" if rate is None else f"{100.0 * rate:.2f}%"


def count(n: int | None) -> str:
    return "-" if n is None else f"{n:,}"


def when(stamp: float | None) -> str:
    if not stamp:
        return "-"
    return time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(stamp))


def emit(args: argparse.Namespace, data: Any, text: Callable[[], str]) -> None:
    """Print JSON for ``--json``, otherwise the readable text."""
    if getattr(args, "json", False):
        print(json.dumps(data, indent=2, sort_keys=True))
    else:
        print(text())


def one_line(text: str) -> str:
    return " ".join(str(text).split())


# -- talking to a server -------------------------------------------------------------------


def server_url(args: argparse.Namespace) -> str:
    url = getattr(args, "url", None) or os.environ.get("THRESHER_URL") or DEFAULT_URL
    if not url.startswith(("http://", "https://")):
        raise CommandFailed(f"--url must start with http:// or https://, got {url!r}", EXIT_USAGE)
    return url.rstrip("/")


def make_client(args: argparse.Namespace, *, retries: int = 2) -> Any:
    from thresher_client import AsyncClient

    token = args.token if args.token is not None else os.environ.get("THRESHER_TOKEN")
    return AsyncClient(
        server_url(args), token=token or None, timeout=args.timeout, retries=retries, backoff=0.1
    )


def client_failure(error: BaseException, url: str) -> CommandFailed:
    """The one-line reason for a client error, as a CommandFailed with exit code 1."""
    from thresher_client import ThresherAPIError, ThresherConnectionError

    if isinstance(error, ThresherAPIError):
        what = f"{error.path}: {error.detail}" if error.path else error.detail
        status = f"{error.status} {error.title}".strip()
        return CommandFailed(one_line(f"{what or error.title} ({status})"))
    if isinstance(error, ThresherConnectionError):
        return CommandFailed(f"cannot reach {url}: {connection_reason(error)}")
    return CommandFailed(one_line(str(error)))


def connection_reason(error: BaseException) -> str:
    """Why a connection failed, in a few words, from the chain of causes."""
    import socket

    import aiohttp

    chain: list[BaseException] = []
    seen: BaseException | None = error
    while seen is not None and len(chain) < 20 and seen not in chain:
        chain.append(seen)
        inner = getattr(seen, "os_error", None)
        if isinstance(seen, aiohttp.ClientConnectorError) and isinstance(inner, OSError):
            chain.append(inner)
        seen = seen.__cause__ or seen.__context__
    for cause in chain:
        if isinstance(cause, OSError) and cause.errno == errno.ECONNREFUSED:
            return "connection refused"
        if isinstance(cause, socket.gaierror):
            return "unknown host"
        if isinstance(cause, TimeoutError):
            return "timed out"
        if isinstance(cause, aiohttp.ServerDisconnectedError):
            return "the server closed the connection"
    for cause in chain:
        if isinstance(cause, OSError) and cause.strerror:
            return cause.strerror.lower()
    return one_line(str(error)) or type(error).__name__


def call_server(args: argparse.Namespace, call: Callable[[Any], Awaitable[Any]]) -> Any:
    """Run ``call(client)`` against the server named by ``--url``."""

    async def go() -> Any:
        async with make_client(args) as client:
            return await call(client)

    return asyncio.run(go())


def guarded(command: Callable[[argparse.Namespace], int]) -> Callable[[argparse.Namespace], int]:
    """Turn CommandFailed and client errors into one line on stderr and an exit code."""

    def run(args: argparse.Namespace) -> int:
        from thresher_client import ThresherClientError

        try:
            return command(args)
        except ThresherClientError as error:
            failure = client_failure(error, server_url(args))
        except CommandFailed as failed:
            failure = failed
        except (ThresherError, OSError, KeyboardInterrupt):
            raise  # the main entry point words these
        except Exception as error:  # a bug: still one line, the traceback only on request
            if os.environ.get("THRESHER_DEBUG"):
                raise
            failure = CommandFailed(f"unexpected {type(error).__name__}: {one_line(str(error))} "
                                    "(set THRESHER_DEBUG=1 to see the traceback)")  # fmt: skip
        print(f"thresher: {failure.message}", file=sys.stderr)
        return failure.code

    return run


# -- commands ------------------------------------------------------------------------------


def cmd_models(args: argparse.Namespace) -> int:
    async def fetch(client: Any) -> list[dict[str, Any]]:
        out = []
        for info in await client.models():
            rates = dict((await client.quality(info.name)).mistake_rate)
            out.append({**info.raw, "mistake_rate": rates})
        return out

    models = call_server(args, fetch)
    heads = ["name", "classes", "rule", "bits", "labelled", "mistakes last_1000", "offset"]
    rows = [[m["name"], ",".join(m["classes"]), m["rule"], m["bits"], count(m["labelled"]),
             pct(m["mistake_rate"]["last_1000"]), count(m["offset"])] for m in models]  # fmt: skip
    emit(args, {"models": models}, lambda: table(heads, rows) if rows else "no models yet")
    return EXIT_OK


def quality_text(q: dict[str, Any]) -> str:
    """The quality report as a few small tables."""
    rates, served, drift = q["mistake_rate"], q["served"], q["drift"]
    out = [
        f"model {q['model']}: {count(q['labelled'])} labelled, {count(q['mistakes'])} "
        f"mistakes, offset {count(q['offset'])}",
        table(["window", *rates], [["mistake rate", *map(pct, rates.values())]]),
        f"served: {count(served['labelled'])} labelled, {count(served['mistakes'])} mistakes, "
        f"mistake rate {pct(served['mistake_rate'])}",
    ]
    if "f1" in q:  # two classes: precision, recall and F1 of the positive class
        windows = list(q["f1"])
        rows = [[k, *(pct(q[k][w]) for w in windows)] for k in ("precision", "recall", "f1")]
        out.append(table(["", *windows], rows))
    classes = q["confusion"]["classes"]
    matrix = q["confusion"]["truth_by_predicted"]
    rows = [[f"truth {c}", *map(count, row)] for c, row in zip(classes, matrix, strict=True)]
    out.append(table(["confusion", *(f"predicted {c}" for c in classes)], rows))
    at = ", ".join(map(count, drift["alarm_at"][-5:]))
    out.append(
        f"drift: statistic {drift['statistic'] or 0:.2f} of threshold {drift['threshold']}, "
        f"{drift['alarms']} alarm(s)" + (f", at label {at}" if at else "")
    )
    missed = q.get("by_source_mistakes", {})
    rows = [
        [s, count(n), count(missed.get(s)), pct(missed.get(s, 0) / n if n else None)]
        for s, n in q["by_source"].items()
    ]
    if rows:
        out.append(table(["source", "labels", "mistakes", "mistake rate"], rows))
    return "\n\n".join(out)


def cmd_quality(args: argparse.Namespace) -> int:
    report = dict(call_server(args, lambda client: client.quality(args.model)).raw)
    emit(args, report, lambda: quality_text(report))
    return EXIT_OK


def _snapshots(args: argparse.Namespace, infos: Sequence[Any], data: Any) -> int:
    rows = [[s.generation, count(s.offset), when(s.time), count(s.bytes)] for s in infos]
    text = table(["generation", "offset", "time", "bytes"], rows) if rows else "no snapshots yet"
    emit(args, data, lambda: text)
    return EXIT_OK


def _snapshot_json(s: Any) -> dict[str, Any]:
    return {"generation": s.generation, "offset": s.offset, "time": s.time, "bytes": s.bytes}


def cmd_snapshot_list(args: argparse.Namespace) -> int:
    infos = call_server(args, lambda client: client.snapshots(args.model))
    return _snapshots(args, infos, {"snapshots": [_snapshot_json(s) for s in infos]})


def cmd_snapshot_take(args: argparse.Namespace) -> int:
    info = call_server(args, lambda client: client.take_snapshot(args.model))
    return _snapshots(args, [info], _snapshot_json(info))


def _model_done(args: argparse.Namespace, verb: str, info: Any) -> int:
    text = (
        f"model {info.name} {verb}: offset {count(info.offset)} of head {count(info.head)}, "
        f"{count(info.labelled)} labelled, {count(info.mistakes)} mistakes, "
        f"weights digest {str(info.raw.get('weights_digest', ''))[:16]}"
    )
    emit(args, dict(info.raw), lambda: text)
    return EXIT_OK


def cmd_snapshot_restore(args: argparse.Namespace) -> int:
    info = call_server(args, lambda client: client.restore_snapshot(args.model, args.generation))
    return _model_done(args, f"restored to generation {args.generation}", info)


def cmd_rebuild(args: argparse.Namespace) -> int:
    sources = list(dict.fromkeys(args.exclude_source or []))

    async def call(client: Any) -> Any:
        return await client.rebuild(
            args.model, exclude_sources=sources, from_snapshot=args.from_snapshot
        )

    info = call_server(args, call)
    verb = "rebuilt " + (f"without {', '.join(sources)}" if sources else "with every source")
    return _model_done(args, verb, info)


# -- the parser ----------------------------------------------------------------------------


def number(kind: type, low: float, *, above: bool = False,
           high: float | None = None) -> Callable[[str], Any]:  # fmt: skip
    """An argparse type: a finite ``kind`` number from ``low`` (or above it) to ``high``."""

    def parse(text: str) -> Any:
        try:
            value = kind(text)
        except ValueError:
            what = "a whole number" if kind is int else "a number"
            raise argparse.ArgumentTypeError(f"{text!r} is not {what}") from None
        if value != value or value in (float("inf"), float("-inf")):
            raise argparse.ArgumentTypeError(f"{text!r} is not a finite number")
        if value < low or (above and value == low) or (high is not None and value > high):
            upper = "" if high is None else f" and at most {high}"
            lower = f"above {low}" if above else f"at least {low}"
            raise argparse.ArgumentTypeError(f"must be {lower}{upper}, got {text}")
        return value

    return parse


def _client_options() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    add = common.add_argument_group("server").add_argument
    add("--url", help=f"server address (env THRESHER_URL; default {DEFAULT_URL})")
    add("--token", help="bearer token secret (env THRESHER_TOKEN; default none)")
    add("--timeout", type=number(float, 0, above=True), default=60.0, metavar="SECONDS",
        help="time allowed for each request (default 60)")  # fmt: skip
    common.add_argument("--json", action="store_true", help="print JSON instead of a table")
    return common


HELP = {
    "models": ("list models", "List the server's models: classes, update rule, hash bits, labels "
               "applied, the mistake rate over the last 1,000 labels, log offset."),
    "quality": ("a model's mistake rates and drift", "Mistake rates per window, the served "
                "mistake rate, precision and recall, confusion, drift alarms, labels by source."),
    "list": ("list a model's snapshot generations", None),
    "take": ("write a snapshot now", None),
    "restore": ("roll a model back to a generation", "Roll a model back to a snapshot "
                "generation. Labels applied after it are dropped from the weights; they stay in "
                "the log for a rebuild."),
    "rebuild": ("relearn a model leaving label sources out", "Relearn a model from its label "
                "log, leaving out the labels of the named sources (a poisoned or broken label "
                "feed). With no --exclude-source every source is used again."),
    "replay": ("stream labelled events from a file into a model", "Stream labelled events from a "
               "JSON Lines or CSV file into a model, through a running server (--url) or offline "
               "into a stopped server's data directory (--data-dir). Events with an id are "
               "applied once: re-running a file applies nothing twice, so an interrupted run "
               "resumes by running it again (a server with --applied-window N recognises only "
               "the last N to 2N ids; offline, give replay the server's --applied-window). "
               "Events WITHOUT an id are applied again on every run."),
    "demo": ("run the demo: a model, invented traffic and the dashboard", "Start a service on "
             "127.0.0.1 in this process, create the demo model and feed it invented marketplace "
             "listings: each batch is scored, then labelled after a simulated review. The fraud "
             "pattern shifts part-way; the drift alarm fires and the model recovers. Stops on "
             "Ctrl-C or after --duration, leaving its data directory."),
}  # fmt: skip


def register(sub: Any) -> None:
    """Add the operator subcommands to the ``thresher`` parser."""
    common = [_client_options()]

    def add(
        where: Any,
        name: str,
        func: Callable[[argparse.Namespace], int],
        *,
        model: bool = True,
        parents: list[Any] = common,
    ) -> argparse.ArgumentParser:
        short, long = HELP[name]
        p: argparse.ArgumentParser = where.add_parser(
            name, parents=parents, help=short, description=long or short
        )
        if model:
            p.add_argument("model", metavar="MODEL")
        p.set_defaults(func=guarded(func))
        return p

    add(sub, "models", cmd_models, model=False)
    add(sub, "quality", cmd_quality)
    snap = sub.add_parser("snapshot", help="list, take or restore snapshots")
    snap_sub = snap.add_subparsers(
        dest="snapshot_command", metavar="ACTION", parser_class=type(snap)
    )
    snap_sub.required = True
    add(snap_sub, "list", cmd_snapshot_list)
    add(snap_sub, "take", cmd_snapshot_take)
    p = add(snap_sub, "restore", cmd_snapshot_restore)
    p.add_argument("generation", metavar="GENERATION", type=number(int, 0))
    p = add(sub, "rebuild", cmd_rebuild)
    p.add_argument("--exclude-source", action="append", metavar="SOURCE",
                   help="a label source to leave out; repeat for several")  # fmt: skip
    p.add_argument("--from-snapshot", action="store_true", help="start from the oldest kept "
                   "snapshot, not empty weights (needed when the log was trimmed)")  # fmt: skip

    from . import demo, replay  # light modules: they import the heavy parts when they run

    replay.add_arguments(add(sub, "replay", replay.run, model=False))
    demo.add_arguments(add(sub, "demo", demo.run, model=False, parents=[]))


__all__ = ["CommandFailed", "register"]
