"""The ``thresher`` command line.

Every subcommand prints a one-line reason and exits non-zero on bad usage or a failed call:
0 success, 1 the operation failed (server said no, file unreadable), 2 bad usage.
"""

from __future__ import annotations

import argparse
import asyncio
import gc
import logging
import os
import sys
from collections.abc import Callable, Sequence
from typing import Any

from . import __version__
from .errors import InvalidConfig, ThresherError
from .settings import Settings, option_help

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2
GC_YOUNG_THRESHOLD = 10_000
Command = Callable[[argparse.Namespace], int]


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error and exit code 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_USAGE, f"{self.prog}: {message} (see {self.prog} --help)\n")


def _add_settings_options(parser: argparse.ArgumentParser, skip: Sequence[str] = ()) -> None:
    parser.add_argument(
        "--config",
        metavar="FILE",
        help="TOML file with settings (a [thresher] table); env THRESHER_CONFIG",
    )
    for name, default, text, choices, kind in option_help():
        if name in skip:
            continue
        flag = "--" + name.replace("_", "-")
        env = "THRESHER_" + name.upper()
        shown = "none" if default is None else default
        if kind is bool:
            parser.add_argument(
                flag,
                action="store_const",
                const=True,
                default=None,
                help=f"{text} (env {env}; default off)",
            )
            continue
        parser.add_argument(
            flag,
            type=kind,
            choices=choices,
            default=None,
            metavar=name.upper(),
            help=f"{text} (env {env}; default {shown})",
        )


def _settings(args: argparse.Namespace, **overrides: Any) -> Settings:
    flags = {name: getattr(args, name, None) for name, *_ in option_help()}
    flags.update(overrides)
    return Settings.load(flags, os.environ, getattr(args, "config", None))


def _logging(level: str) -> None:
    logging.basicConfig(
        level=getattr(logging, level.upper()),
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
    )
    logging.getLogger("aiohttp.access").setLevel(logging.WARNING)
    logging.getLogger("aiohttp.server").addFilter(_one_line_bad_requests)


def _one_line_bad_requests(record: logging.LogRecord) -> bool:
    """Malformed HTTP from a client is the client's problem: one line, no traceback."""
    from aiohttp.http_exceptions import HttpProcessingError

    if record.exc_info and isinstance(record.exc_info[1], HttpProcessingError):
        error = record.exc_info[1]
        record.msg = "rejected malformed HTTP request: %s"
        record.args = (str(error.message).splitlines()[0] if error.message else error.code,)
        record.exc_info = None
        record.exc_text = None
        record.levelno, record.levelname = logging.WARNING, "WARNING"
    return True


def new_event_loop(kind: str) -> asyncio.AbstractEventLoop:
    """A fresh event loop of the ``--loop`` setting: uvloop, asyncio, or auto (uvloop if any)."""
    if kind != "asyncio":
        try:
            import uvloop
        except ImportError:
            if kind == "uvloop":
                raise InvalidConfig(
                    "--loop uvloop needs the uvloop package (pip install uvloop); or pass "
                    "--loop asyncio",
                    path="loop",
                ) from None
        else:
            return uvloop.new_event_loop()
    return asyncio.new_event_loop()


def cmd_serve(args: argparse.Namespace) -> int:
    from aiohttp import web

    from .http import create_app

    settings = _settings(args)
    _logging(settings.log_level)
    loop = new_event_loop(settings.loop)
    app = create_app(settings, freeze_gc=True)
    # A request allocates a few hundred short-lived objects; with the default threshold (700)
    # the young generation is collected every few requests, and objects of requests still in
    # flight get promoted and collected again later. Fewer, larger young collections do less
    # work in all.
    gc.set_threshold(GC_YOUNG_THRESHOLD, *gc.get_threshold()[1:])
    banner = (
        f"thresher {__version__} serving on http://{settings.host}:{settings.port}/ "
        f"(data in {settings.data_dir})"
    )
    web.run_app(
        app,
        host=settings.host,
        port=settings.port,
        shutdown_timeout=settings.shutdown_timeout,
        print=lambda _text: print(banner, flush=True),
        access_log=None,
        loop=loop,
    )
    return EXIT_OK


def cmd_token_new(args: argparse.Namespace) -> int:
    from .auth import add_token

    roles = [r.strip() for r in args.roles.split(",") if r.strip()]
    models = [m.strip() for m in args.models.split(",")] if args.models else None
    secret = add_token(
        args.tokens_file,
        name=args.name,
        roles=roles,
        models=models,
        labels_per_second=args.labels_per_second,
    )
    print(secret)
    print(
        f"token {args.name!r} added to {args.tokens_file}; the secret above is shown once",
        file=sys.stderr,
    )
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="thresher",
        description="Score application events with an online-learning perceptron; train it "
        "with labels; watch its mistake rate.",
    )
    parser.add_argument("--version", action="version", version=f"thresher {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    serve = sub.add_parser(
        "serve",
        help="run the HTTP service",
        description="Run the HTTP service. Every option can also be set "
        "as a THRESHER_* environment variable or in a TOML file.",
    )
    _add_settings_options(serve)
    serve.set_defaults(func=cmd_serve)

    token = sub.add_parser("token", help="manage bearer tokens")
    token_sub = token.add_subparsers(dest="token_command", metavar="ACTION", parser_class=_Parser)
    token_sub.required = True
    new = token_sub.add_parser("new", help="add a token and print its secret once")
    new.add_argument("--name", required=True, help="a name for the token (letters, digits, -_)")
    new.add_argument("--roles", required=True, help="comma-separated roles: score, label, admin")
    new.add_argument(
        "--tokens-file",
        required=True,
        metavar="PATH",
        help="tokens file to add to (created if missing)",
    )
    new.add_argument(
        "--models", default=None, help="comma-separated model names the token is limited to"
    )
    new.add_argument(
        "--labels-per-second",
        type=float,
        default=None,
        help="cap on labels per second for this token",
    )
    new.set_defaults(func=cmd_token_new)

    from . import cli_ops

    cli_ops.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        code: int = args.func(args)
        return code
    except ThresherError as error:
        print(f"thresher: {error}", file=sys.stderr)
        return EXIT_USAGE if error.status in (400, 422) else EXIT_FAILED
    except KeyboardInterrupt:
        return 130
    except OSError as error:
        print(
            f"thresher: {error.strerror or error}: {error.filename or ''}".rstrip(": "),
            file=sys.stderr,
        )
        return EXIT_FAILED


if __name__ == "__main__":
    sys.exit(main())
