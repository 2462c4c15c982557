"""``thresher replay``: stream labelled events from a JSON Lines or CSV file into a model.

Through a running server (client ``label`` calls in batches) or offline straight into a data
directory whose server is stopped. Both paths validate and apply labels with the same model
code in file order, so they end at the same digest. An event with an id is applied once; a
re-run counts it as a duplicate, which makes a run resumable by simply starting it again.
The file is read line by line in `replay_input`.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import re
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

from .cli_ops import (
    EXIT_FAILED,
    EXIT_OK,
    EXIT_USAGE,
    CommandFailed,
    count,
    make_client,
    one_line,
    pct,
    server_url,
    table,
)
from .cli_ops import number as number_type
from .errors import ThresherError
from .replay_input import BadLine, Item, check_label, detect_format, read_items

LABEL_PATH = re.compile(r"^labels\[(\d+)\]\.?(.*)$")
MAX_BATCH = 10_000  # the server's default cap on labels per request
SHOWN_SKIPS = 10


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The options of ``thresher replay``; the server options come from the parent parser."""
    add = p.add_argument
    add("file", metavar="FILE", help="JSON Lines or CSV file; '-' reads stdin")
    add("--model", required=True, metavar="NAME", help="the model to label")
    add("--data-dir", metavar="DIR", help="replay offline into this data directory instead of "
        "through --url (its server must be stopped)")  # fmt: skip
    add("--applied-window", type=number_type(int, 0), default=0, metavar="N",
        help="with --data-dir: the server's --applied-window, so the ids replayed are remembered "
        "as that server remembers them (default 0, every id)")  # fmt: skip
    add("--source", default="replay", metavar="NAME",
        help="label source recorded with every label (default replay)")  # fmt: skip
    add("--batch", type=number_type(int, 1, high=MAX_BATCH), default=500, metavar="N",
        help="labels per request (default 500)")  # fmt: skip
    add("--format", choices=("jsonl", "csv"),
        help="file format (default: by extension, .jsonl, .ndjson, .json or .csv)")  # fmt: skip
    add("--label-field", default="label", metavar="NAME",
        help="field or column holding the label (default label)")  # fmt: skip
    add("--id-field", default="id", metavar="NAME", help="field or column holding the event id "
        "(default id); events without one are applied again on every run")  # fmt: skip
    add("--skip-invalid", action="store_true",
        help="count and skip lines that fail validation instead of stopping")  # fmt: skip
    add("--create", metavar="FILE", help="JSON model definition (the POST /api/models body; "
        "--model gives the name) to create the model with if it does not exist")  # fmt: skip


@dataclass(slots=True)
class Tally:
    """What a replay did so far."""

    read: int = 0
    applied: int = 0
    duplicates: int = 0
    invalid: int = 0
    mistakes: int = 0
    without_id: int = 0
    line: int = 0
    started: float = 0.0

    def add(self, applied: int, duplicates: int, mistakes: int | None) -> None:
        self.applied += applied
        self.duplicates += duplicates
        self.mistakes += mistakes or 0  # known here: labels are sent with wait=True


class Rejected(Exception):
    """The model refused the label at ``index`` of a batch; none of the batch was applied."""

    def __init__(self, index: int, message: str) -> None:
        super().__init__(message)
        self.index = index
        self.message = message


class Target:
    """Where the labels go: a running server (the client) or a data directory (the registry
    and the service's own model code, so both paths learn identically)."""

    def __init__(self, args: argparse.Namespace) -> None:
        self.args = args
        self.classes: tuple[str, ...] = ()
        self.client: Any = None
        self.registry: Any = None

    async def open(self, create: dict[str, Any] | None) -> None:
        args = self.args
        if args.data_dir is None:
            from thresher_client import RetryPolicy, ThresherAPIError

            self.client = make_client(args)  # few retries: a wrong --url fails at once
            try:
                info = await self.client.model(args.model)
            except ThresherAPIError as error:
                if error.status != 404 or create is None:
                    raise
                info = await self.client.create_model(**create)
            self.classes = tuple(info.classes)
            # Once the server answered, ride out restarts and overload (503) for a while.
            self.client.policy = RetryPolicy(8, 0.2, 5.0)
            return
        from .errors import Conflict, NotFound
        from .lifecycle import ModelRegistry
        from .settings import Settings

        if create is None and not (Path(args.data_dir) / "models" / args.model).is_dir():
            raise NotFound(f"{args.data_dir} has no model {args.model!r}; pass --create FILE "
                           "with its definition to create it")  # fmt: skip
        registry = ModelRegistry(Settings.from_mapping(
            {"data_dir": args.data_dir, "applied_window": args.applied_window}))  # fmt: skip
        try:
            await registry.open()
        except Conflict:
            raise CommandFailed(f"{args.data_dir} is in use by a running thresher server; stop "
                                "it first, or replay through it with --url") from None  # fmt: skip
        self.registry = registry
        if args.model not in registry.models and create is not None:
            await registry.create(create)
        self.classes = tuple(registry.get(args.model).config.classes)

    async def send(self, items: list[Item]) -> tuple[int, int, int | None]:
        from thresher_client import ThresherAPIError

        name, source = self.args.model, self.args.source
        try:
            if self.client is not None:
                ack = await self.client.label(name, items, source=source, wait=True)
            else:
                ack = await self.registry.get(name).label(items, source=source, now=time.time())
        except (ThresherAPIError, ThresherError) as error:
            match = LABEL_PATH.match(error.path or "") if error.status in (409, 422) else None
            if match is None:
                raise
            where = f"{match.group(2)}: " if match.group(2) else ""
            raise Rejected(int(match.group(1)), one_line(where + error.detail)) from None
        if self.registry is not None and self.registry.note_applied(name, ack.applied):
            await self.registry.snapshot(name)
        return ack.applied, ack.duplicates, ack.mistakes

    async def summary(self) -> dict[str, Any]:
        if self.client is not None:
            return dict((await self.client.model(self.args.model)).raw)
        return dict(self.registry.get(self.args.model).summary())

    async def close(self) -> None:
        if self.client is not None:
            await self.client.close()
        if self.registry is not None:
            await self.registry.close()  # writes the final snapshot
        self.client = self.registry = None


def progress(tally: Tally, position: int, size: int | None, last: list[float]) -> None:
    """Redraw the one-line progress bar on stderr (a terminal only), at most 5 times a second."""
    now = time.monotonic()
    if not sys.stderr.isatty() or now - last[0] < 0.2:
        return
    last[0] = now
    rate = tally.read / max(1e-9, now - tally.started)
    share = f"{100.0 * position / size:5.1f}%  " if size else ""
    sys.stderr.write(
        f"\r\x1b[K{share}{count(tally.read)} events  {count(tally.applied)} "
        f"applied  {count(tally.mistakes)} mistakes  {rate:,.0f} events/s"
    )
    sys.stderr.flush()


async def _flush(
    sink: Target, batch: list[tuple[int, Item]], tally: Tally, skip_invalid: bool
) -> BadLine | None:
    """Send one batch; a rejected label stops the run, or is dropped with --skip-invalid."""
    while batch:
        try:
            tally.add(*await sink.send([item for _, item in batch]))
            return None
        except Rejected as rejected:
            number = batch[rejected.index][0]
            bad = BadLine(number, rejected.message)
            if not skip_invalid:
                if rejected.index:  # everything before the bad line goes in, nothing after
                    tally.add(*await sink.send([item for _, item in batch[: rejected.index]]))
                return bad
            _skipped(bad, tally)
            del batch[rejected.index]
    return None


def _skipped(bad: BadLine, tally: Tally) -> None:
    tally.invalid += 1
    if tally.invalid <= SHOWN_SKIPS:
        print(f"thresher: skipped line {bad.number}: {bad.message}", file=sys.stderr)
    elif tally.invalid == SHOWN_SKIPS + 1:
        print("thresher: skipping more invalid lines without showing them", file=sys.stderr)


async def replay(
    args: argparse.Namespace,
    handle: IO[bytes],
    fmt: str,
    tally: Tally,
    create: dict[str, Any] | None,
) -> tuple[BadLine | None, dict[str, Any]]:
    """Read, check and send every event; the first bad line (unless skipped) and a summary."""
    target = Target(args)
    size = os.fstat(handle.fileno()).st_size if handle.seekable() else None
    last = [0.0]
    batch: list[tuple[int, Item]] = []
    bad: BadLine | None = None
    try:
        await target.open(create)
        tally.started = time.monotonic()
        for number, item in read_items(handle, fmt, args.label_field, args.id_field):
            tally.line, tally.read = number, tally.read + 1
            problem = None if isinstance(item, BadLine) else check_label(item, target.classes)
            if problem:
                item = BadLine(number, problem)
            if isinstance(item, BadLine):
                if not args.skip_invalid:
                    bad = item
                    break
                _skipped(item, tally)
                continue
            tally.without_id += item.get("id") is None
            batch.append((number, item))
            if len(batch) >= args.batch:
                bad, batch = await _flush(target, batch, tally, args.skip_invalid), []
                if bad is not None:
                    break
                progress(tally, handle.tell() if size else 0, size, last)
        # The batch holds only lines before a bad one; a rejection among them comes first.
        bad = await _flush(target, batch, tally, args.skip_invalid) or bad
        summary = await target.summary()
    finally:
        if sys.stderr.isatty() and last[0]:
            sys.stderr.write("\r\x1b[K")
        await target.close()
    return bad, summary


DEFINITION_KEYS = ("name", "classes", "features", "bits", "rule", "margin", "aggressiveness",
                   "seed", "signed")  # fmt: skip


def _read_definition(path: str, model: str) -> dict[str, Any]:
    try:
        with open(path, encoding="utf-8") as handle:
            body = json.load(handle)
    except OSError as error:
        raise CommandFailed(f"cannot read {path}: {error.strerror or error}") from None
    except ValueError as error:
        raise CommandFailed(f"{path} is not valid JSON: {one_line(str(error))}", 2) from None
    if not isinstance(body, dict):
        raise CommandFailed(f"{path} must hold a JSON object: a model definition", EXIT_USAGE)
    body["name"] = model  # --model names it, so one definition file serves several models
    unknown = sorted(set(body) - set(DEFINITION_KEYS))
    if unknown:
        raise CommandFailed(f"{path}: unknown key {unknown[0]!r}; a model definition has "
                            f"{', '.join(DEFINITION_KEYS)}", EXIT_USAGE)  # fmt: skip
    return body


# (key in the JSON summary, row name in the table, how the table shows it)
SUMMARY_ROWS: list[tuple[str, str, Callable[[Any], str]]] = [
    ("read", "events read", count),
    ("applied", "applied", count),
    ("duplicates", "duplicates", count),
    ("invalid", "invalid (skipped)", count),
    ("without_id", "without id", count),
    ("mistakes", "mistakes", count),
    ("mistake_rate", "mistake rate", pct),
    ("elapsed_seconds", "elapsed", lambda v: f"{v:.2f} s"),
    ("events_per_second", "events/s", lambda v: count(round(v or 0))),
]


def summary(args: argparse.Namespace, tally: Tally, model: dict[str, Any],
            bad: BadLine | None) -> dict[str, Any]:  # fmt: skip
    """The JSON summary: counts, speed, and the model's digests after the run."""
    elapsed = time.monotonic() - tally.started if tally.started else 0.0
    return {
        "file": args.file, "model": args.model, "source": args.source,
        "mode": "offline" if args.data_dir else "server",
        "target": args.data_dir or server_url(args),
        "read": tally.read, "applied": tally.applied, "duplicates": tally.duplicates,
        "invalid": tally.invalid, "without_id": tally.without_id, "mistakes": tally.mistakes,
        "mistake_rate": tally.mistakes / tally.applied if tally.applied else None,
        "elapsed_seconds": round(elapsed, 3),
        "events_per_second": round(tally.read / elapsed, 1) if elapsed > 0 else None,
        **{k: model.get(k) for k in ("labelled", "offset", "digest", "weights_digest")},
        "error": None if bad is None else {"line": bad.number, "message": bad.message},
    }  # fmt: skip


def run(args: argparse.Namespace) -> int:
    """The ``replay`` command: its summary, and exit 1 on a bad line or a failed call."""
    if args.data_dir and args.url:
        raise CommandFailed("give --url or --data-dir, not both", EXIT_USAGE)
    if args.applied_window and not args.data_dir:
        raise CommandFailed("--applied-window goes with --data-dir; a server (--url) applies "
                            "its own", EXIT_USAGE)  # fmt: skip
    fmt = detect_format(args.file, args.format)
    create = _read_definition(args.create, args.model) if args.create else None
    tally = Tally()
    handle = sys.stdin.buffer if args.file == "-" else open(args.file, "rb")  # noqa: SIM115
    try:
        bad, model = asyncio.run(replay(args, handle, fmt, tally, create))
    except KeyboardInterrupt:
        print(f"thresher: interrupted at line {tally.line:,} ({tally.applied:,} labels confirmed); "
              "run the same command again to resume", file=sys.stderr)  # fmt: skip
        return 130
    finally:
        if handle is not sys.stdin.buffer:
            handle.close()
    result = summary(args, tally, model, bad)
    if args.json:
        print(json.dumps(result, indent=2, sort_keys=True))
    else:
        rows = [[name, show(result[key])] for key, name, show in SUMMARY_ROWS]
        print(f"replay of {args.file} into model {args.model} ({result['mode']}: "
              f"{result['target']})\n{table(None, rows)}")  # fmt: skip
    if bad is not None:
        print(f"thresher: line {bad.number}: {bad.message}", file=sys.stderr)
        return EXIT_FAILED
    return EXIT_OK
