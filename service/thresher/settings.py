"""The one settings object, read once at the edge.

Precedence, highest first: command-line flags, ``THRESHER_*`` environment variables, the TOML
file named by ``--config`` / ``THRESHER_CONFIG``, then the defaults below. Everything is read
from mappings handed in, so tests pass a plain dict and nothing reads the environment at import.
"""

from __future__ import annotations

import dataclasses
import ipaddress
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from .errors import InvalidConfig

MiB = 1024 * 1024


def _opt(default: Any, help: str, *, choices: tuple[str, ...] | None = None) -> Any:
    return field(default=default, metadata={"help": help, "choices": choices})


@dataclass(frozen=True, slots=True)
class Settings:
    """Every option of ``thresher serve``; the field name is the flag (``--data-dir``) and,
    upper-cased, the environment variable (``THRESHER_DATA_DIR``)."""

    data_dir: str = _opt("thresher-data", "directory for label logs, snapshots and model files")
    host: str = _opt("127.0.0.1", "address to listen on")
    port: int = _opt(8750, "TCP port to listen on")
    tokens_file: str | None = _opt(
        None, "JSON tokens file (see `thresher token new`); without it every request is allowed"
    )
    insecure: bool = _opt(False, "allow a non-loopback --host without a tokens file")
    log: str = _opt("file", "label log backend: 'file' (segment files) or redis://HOST:PORT/DB")
    flush: str = _opt(
        "always",
        "label log flush policy: 'always' fsyncs before acknowledging; 'interval' fsyncs every "
        "--flush-interval-ms and can lose that window on power loss",
        choices=("always", "interval"),
    )
    flush_interval_ms: int = _opt(50, "fsync period for --flush interval, in milliseconds")
    segment_bytes: int = _opt(64 * MiB, "label log segment size before rotation, in bytes")
    snapshot_interval: float = _opt(300.0, "seconds between automatic snapshots (0 = off)")
    snapshot_every: int = _opt(
        100_000, "labels between automatic snapshots, at least 1/8 of the applied ids (0 = off)"
    )
    snapshot_keep: int = _opt(5, "snapshot generations kept per model")
    log_retain: int = _opt(
        0, "labels kept in the log below the oldest retained snapshot (for rebuilds)"
    )
    applied_window: int = _opt(
        0,
        "labels whose ids are remembered for exactly-once training: a retry is recognised at "
        "least this many and at most twice this many applied labels back, an older one is "
        "trained again (0 = every id, forever). Set the same on every replica",
    )
    shutdown_timeout: float = _opt(20.0, "seconds allowed for a graceful shutdown")
    max_body_bytes: int = _opt(8 * MiB, "largest request body accepted, in bytes")
    max_events: int = _opt(10_000, "most events in one score request")
    max_labels: int = _opt(10_000, "most labels in one labels request")
    max_fields: int = _opt(1_000, "most fields in one event")
    max_inflight: int = _opt(256, "requests in progress before new ones get 503")
    labels_per_second: float = _opt(
        0.0, "default per-token cap on labels per second (0 = no cap; tokens may set their own)"
    )
    cache_entries: int = _opt(100_000, "scored events kept per model for labelling by id")
    cache_bytes: int = _opt(64 * MiB, "memory bound of the scored-event cache per model")
    cache_ttl: float = _opt(86_400.0, "seconds a scored event stays labellable by id alone")
    redis_wait_replicas: int = _opt(
        0, "Redis mode: acknowledge a label only after this many Redis replicas confirm it"
    )
    log_level: str = _opt("info", "logging level", choices=("debug", "info", "warning", "error"))
    loop: str = _opt(
        "auto",
        "event loop: 'uvloop' (libuv, faster sockets), 'asyncio' (the standard library's), or "
        "'auto' (uvloop when installed)",
        choices=("auto", "uvloop", "asyncio"),
    )

    @classmethod
    def from_mapping(cls, values: Mapping[str, Any]) -> Settings:
        """Build settings from a plain mapping of field names; strings are converted."""
        known = {f.name: f for f in fields(cls)}
        kwargs: dict[str, Any] = {}
        for key, raw in values.items():
            name = key.replace("-", "_")
            if name not in known:
                raise InvalidConfig(f"unknown setting {key!r}", path=key)
            if raw is None:
                continue
            kwargs[name] = _convert(known[name], raw)
        settings = cls(**kwargs)
        settings.validate()
        return settings

    @classmethod
    def load(
        cls,
        flags: Mapping[str, Any],
        environ: Mapping[str, str],
        config_file: str | None = None,
    ) -> Settings:
        """Merge a TOML file, ``THRESHER_*`` variables and flags, in rising precedence."""
        merged: dict[str, Any] = {}
        path = config_file or environ.get("THRESHER_CONFIG")
        if path:
            merged.update(_read_toml(path))
        names = {f.name for f in fields(cls)}
        for name in names:
            env_key = "THRESHER_" + name.upper()
            if env_key in environ:
                merged[name] = environ[env_key]
        merged.update({k: v for k, v in flags.items() if v is not None})
        return cls.from_mapping(merged)

    def replace(self, **changes: Any) -> Settings:
        """A copy with some fields changed, validated again."""
        settings = dataclasses.replace(self, **changes)
        settings.validate()
        return settings

    def validate(self) -> None:
        """Raise InvalidConfig naming the first setting that is out of range."""
        positive = (
            "flush_interval_ms",
            "segment_bytes",
            "snapshot_keep",
            "shutdown_timeout",
            "max_body_bytes",
            "max_events",
            "max_labels",
            "max_fields",
            "max_inflight",
            "cache_entries",
            "cache_bytes",
            "cache_ttl",
        )
        for name in positive:
            if getattr(self, name) <= 0:
                raise InvalidConfig(f"{name} must be greater than 0", path=name)
        for name in (
            "snapshot_interval",
            "snapshot_every",
            "log_retain",
            "applied_window",
            "labels_per_second",
            "redis_wait_replicas",
        ):
            if getattr(self, name) < 0:
                raise InvalidConfig(f"{name} must not be negative", path=name)
        if not 0 < self.port < 65536:
            raise InvalidConfig("port must be between 1 and 65535", path="port")
        if self.log != "file" and not self.log.startswith(("redis://", "rediss://", "unix://")):
            raise InvalidConfig(
                "log must be 'file' or a redis:// URL such as redis://127.0.0.1:6379/0", path="log"
            )

    def is_loopback(self) -> bool:
        """True when ``host`` only accepts connections from this machine."""
        if self.host == "localhost":
            return True
        try:
            return ipaddress.ip_address(self.host).is_loopback
        except ValueError:
            return False

    @property
    def data_path(self) -> Path:
        return Path(self.data_dir)


def option_help() -> list[tuple[str, Any, str, tuple[str, ...] | None, type]]:
    """(name, default, help, choices, type) for every setting, for the command line."""
    out = []
    for f in fields(Settings):
        out.append((f.name, f.default, f.metadata["help"], f.metadata["choices"], _kind(f)))
    return out


def _kind(f: dataclasses.Field[Any]) -> type:
    text = str(f.type)
    if text.startswith("bool"):
        return bool
    if text.startswith("int"):
        return int
    if text.startswith("float"):
        return float
    return str


def _convert(f: dataclasses.Field[Any], raw: Any) -> Any:
    kind = _kind(f)
    choices = f.metadata["choices"]
    try:
        if kind is bool:
            if isinstance(raw, bool):
                value: Any = raw
            elif str(raw).lower() in {"1", "true", "yes", "on"}:
                value = True
            elif str(raw).lower() in {"0", "false", "no", "off", ""}:
                value = False
            else:
                raise ValueError(raw)
        elif kind is int:
            if isinstance(raw, bool) or (isinstance(raw, float) and not raw.is_integer()):
                raise ValueError(raw)
            value = int(raw)
        elif kind is float:
            if isinstance(raw, bool):
                raise ValueError(raw)
            value = float(raw)
        else:
            value = str(raw)
    except (TypeError, ValueError):
        raise InvalidConfig(f"{f.name} must be {kind.__name__}, got {raw!r}", path=f.name) from None
    if choices and value not in choices:
        raise InvalidConfig(f"{f.name} must be one of {', '.join(choices)}", path=f.name)
    return value


def _read_toml(path: str) -> dict[str, Any]:
    try:
        with open(path, "rb") as handle:
            data = tomllib.load(handle)
    except OSError as exc:
        raise InvalidConfig(f"cannot read config file {path}: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise InvalidConfig(f"config file {path} is not valid TOML: {exc}") from None
    section = data.get("thresher", data)
    if not isinstance(section, dict):
        raise InvalidConfig(f"config file {path}: [thresher] must be a table")
    return {str(k).replace("-", "_"): v for k, v in section.items()}
