"""The tokens file: what each bearer token grants, and adding, removing and listing tokens.

The file is JSON with a format version; only the SHA-256 of each secret is stored::

    {"version": 1, "tokens": [{"name": "review-queue", "sha256": "<64 hex>",
      "roles": ["label"], "models": null, "labels_per_second": 50.0,
      "created": "2024-05-01T12:00:00+00:00"}]}

Roles: ``score`` (score events; read models, quality and snapshot lists), ``label`` (post
labels, nothing else) and ``admin`` (everything; implies ``score`` and ``label``). ``models``
null means every model; a list limits the token to the models named. A model limit is checked
whenever a request names a model. A bad file is an ``InvalidConfig`` naming the file and the
JSON path of the bad value; writes are atomic. :mod:`thresher.auth` checks requests against
these tokens and re-exports this API.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import secrets
import tempfile
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from .errors import Forbidden, InvalidConfig, NotFound

FORMAT_VERSION = 1
ROLES = ("score", "label", "admin")
SECRET_PREFIX = "thr_"
NAME_RE = re.compile(r"[A-Za-z0-9_-]{1,64}")
_HEX_RE = re.compile(r"[0-9a-fA-F]{64}")
_FIELDS = {"name", "sha256", "roles", "models", "labels_per_second", "created"}

StrPath = str | os.PathLike[str]


@dataclass(frozen=True, slots=True)
class Principal:
    """Who a request acts as: a token's name, roles, model limit and label cap."""

    name: str
    roles: frozenset[str]
    models: frozenset[str] | None = None
    labels_per_second: float | None = None

    def has(self, role: str) -> bool:
        """True when the principal holds ``role`` directly or through ``admin``."""
        return role in self.roles or "admin" in self.roles

    def require(self, role: str, model: str | None = None) -> None:
        """Raise Forbidden unless the principal holds ``role`` (and may use ``model``)."""
        if role not in ROLES:
            raise ValueError(f"unknown role {role!r}; roles are {', '.join(ROLES)}")
        if not self.has(role):
            held = ", ".join(sorted(self.roles)) or "none"
            raise Forbidden(
                f"token {self.name!r} lacks the {role!r} role (it has: {held}); use a token "
                f"with the {role!r} or 'admin' role"
            )
        if model is not None and self.models is not None and model not in self.models:
            allowed = ", ".join(sorted(self.models)) or "none"
            raise Forbidden(
                f"token {self.name!r} may not use model {model!r}; it is limited to: {allowed}"
            )


def new_secret() -> str:
    """A fresh random secret (256 bits, URL-safe) with a recognisable prefix."""
    return SECRET_PREFIX + secrets.token_urlsafe(32)


def hash_secret(secret: str) -> str:
    """The lower-case hex SHA-256 of a secret, as stored in the tokens file."""
    return hashlib.sha256(secret.encode("utf-8")).hexdigest()


@dataclass(frozen=True, slots=True)
class TokenEntry:
    """One token of the file: who it acts as, the SHA-256 of its secret, when it was made."""

    principal: Principal
    digest: bytes
    created: str | None

    def to_json(self) -> dict[str, Any]:
        """The entry as the tokens file stores it."""
        p = self.principal
        return {
            "name": p.name,
            "sha256": self.digest.hex(),
            "roles": [r for r in ROLES if r in p.roles],
            "models": None if p.models is None else sorted(p.models),
            "labels_per_second": p.labels_per_second,
            "created": self.created,
        }


def _bad(source: str, detail: str, path: str) -> InvalidConfig:
    return InvalidConfig(f"{source}: {detail}" if source else detail, path=path)


def parse_tokens(doc: Any, source: str) -> list[TokenEntry]:
    if not isinstance(doc, dict):
        raise _bad(source, 'must be a JSON object {"version": 1, "tokens": [...]}', "$")
    unknown = sorted(set(doc) - {"version", "tokens"})
    if unknown:
        raise _bad(source, f"unknown key {unknown[0]!r}", unknown[0])
    version = doc.get("version")
    if version != FORMAT_VERSION or isinstance(version, bool):
        raise _bad(
            source,
            f"format version {version!r} is not supported; this build reads version "
            f"{FORMAT_VERSION}",
            "version",
        )
    tokens = doc.get("tokens")
    if not isinstance(tokens, list):
        raise _bad(source, "tokens must be a list", "tokens")
    entries: list[TokenEntry] = []
    names: set[str] = set()
    digests: set[bytes] = set()
    for i, item in enumerate(tokens):
        entry = _parse_entry(item, source, f"tokens[{i}]")
        if entry.principal.name in names:
            raise _bad(source, f"token name {entry.principal.name!r} appears twice",
                       f"tokens[{i}].name")  # fmt: skip
        if entry.digest in digests:
            raise _bad(source, "this sha256 is already used by another token",
                       f"tokens[{i}].sha256")  # fmt: skip
        names.add(entry.principal.name)
        digests.add(entry.digest)
        entries.append(entry)
    return entries


def _parse_entry(item: Any, source: str, at: str) -> TokenEntry:
    if not isinstance(item, dict):
        raise _bad(source, "each token must be an object", at)
    unknown = sorted(set(item) - _FIELDS)
    if unknown:
        raise _bad(
            source, f"unknown key {unknown[0]!r}; keys are {', '.join(sorted(_FIELDS))}",
            f"{at}.{unknown[0]}",
        )  # fmt: skip
    name = _check_name(item.get("name"), source, f"{at}.name")
    sha = item.get("sha256")
    if not isinstance(sha, str) or not _HEX_RE.fullmatch(sha):
        raise _bad(source, "sha256 must be 64 hex digits (the SHA-256 of the secret)",
                   f"{at}.sha256")  # fmt: skip
    roles = _check_roles(item.get("roles"), source, f"{at}.roles")
    models = _check_models(item.get("models"), source, f"{at}.models")
    rate = _check_rate(item.get("labels_per_second"), source, f"{at}.labels_per_second")
    created = item.get("created")
    if created is not None and not _is_iso_time(created):
        raise _bad(source, "created must be an ISO 8601 time such as 2024-05-01T12:00:00+00:00",
                   f"{at}.created")  # fmt: skip
    principal = Principal(name, roles, models, rate)
    return TokenEntry(principal, bytes.fromhex(sha), created)


def _is_iso_time(value: Any) -> bool:
    try:
        datetime.fromisoformat(value)
    except (TypeError, ValueError):
        return False
    return True


def _check_name(name: Any, source: str, at: str) -> str:
    if not isinstance(name, str) or not NAME_RE.fullmatch(name):
        raise _bad(source, f"name {name!r} must be 1-64 letters, digits, '-' or '_'", at)
    return name


def _check_roles(roles: Any, source: str, at: str) -> frozenset[str]:
    if not isinstance(roles, list | tuple) or not roles:
        raise _bad(source, f"roles must be a non-empty list drawn from {', '.join(ROLES)}", at)
    for j, role in enumerate(roles):
        if role not in ROLES:
            raise _bad(source, f"unknown role {role!r}; roles are {', '.join(ROLES)}",
                       f"{at}[{j}]")  # fmt: skip
    return frozenset(roles)


def _check_models(models: Any, source: str, at: str) -> frozenset[str] | None:
    if models is None:
        return None
    if not isinstance(models, list | tuple) or not models:
        raise _bad(source, "models must be null (every model) or a non-empty list of names", at)
    for j, model in enumerate(models):
        if not isinstance(model, str) or not NAME_RE.fullmatch(model):
            raise _bad(source, f"model name {model!r} must be 1-64 letters, digits, '-' or '_'",
                       f"{at}[{j}]")  # fmt: skip
    return frozenset(models)


def _check_rate(rate: Any, source: str, at: str) -> float | None:
    if rate is None:
        return None
    if isinstance(rate, bool) or not isinstance(rate, int | float) or not math.isfinite(rate):
        raise _bad(source, "labels_per_second must be null or a positive number", at)
    if rate <= 0:
        raise _bad(source, "labels_per_second must be greater than 0 (null means no cap)", at)
    return float(rate)


def read_tokens(path: StrPath, *, missing_ok: bool) -> list[TokenEntry]:
    source = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        if missing_ok:
            return []
        raise InvalidConfig(
            f"tokens file {source} does not exist; create it with `thresher token new`",
            path="tokens_file",
        ) from None
    except (OSError, UnicodeDecodeError) as exc:
        detail = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        raise InvalidConfig(f"tokens file {source} cannot be read: {detail}",
                            path="tokens_file") from None  # fmt: skip
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidConfig(
            f"tokens file {source} is not valid JSON: {exc.msg} at line {exc.lineno} "
            f"column {exc.colno}",
            path="tokens_file",
        ) from None
    return parse_tokens(doc, f"tokens file {source}")


def _write(path: StrPath, entries: Iterable[TokenEntry]) -> None:
    """Replace the file atomically: temp file, fsync, rename, fsync the directory."""
    target = Path(path)
    directory = target.parent
    doc = {"version": FORMAT_VERSION, "tokens": [e.to_json() for e in entries]}
    data = (json.dumps(doc, indent=2) + "\n").encode("utf-8")
    fd, tmp = tempfile.mkstemp(dir=directory, prefix=f".{target.name}.", suffix=".tmp")
    try:
        os.fchmod(fd, 0o600)  # hashes only, but still nobody else's business
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    dir_fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


def add_token(
    path: StrPath,
    *,
    name: str,
    roles: Sequence[str],
    models: Sequence[str] | None = None,
    labels_per_second: float | None = None,
) -> str:
    """Add a token to the file (created if missing) and return its secret, shown only once."""
    _check_name(name, "", "name")
    role_set = _check_roles(list(roles), "", "roles")
    model_set = _check_models(None if models is None else list(models), "", "models")
    rate = _check_rate(labels_per_second, "", "labels_per_second")
    entries = read_tokens(path, missing_ok=True)
    if any(e.principal.name == name for e in entries):
        raise InvalidConfig(
            f"a token named {name!r} already exists in {path}; remove it first or pick another "
            "name",
            path="name",
        )
    secret = new_secret()
    created = datetime.now(UTC).isoformat(timespec="seconds")
    principal = Principal(name, role_set, model_set, rate)
    entries.append(TokenEntry(principal, hashlib.sha256(secret.encode()).digest(), created))
    _write(path, entries)
    return secret


def remove_token(path: StrPath, name: str) -> None:
    """Remove the token called ``name``; NotFound when the file has no such token."""
    entries = read_tokens(path, missing_ok=False)
    kept = [e for e in entries if e.principal.name != name]
    if len(kept) == len(entries):
        raise NotFound(f"no token named {name!r} in {path}", path="name")
    _write(path, kept)


def list_tokens(path: StrPath) -> list[dict[str, Any]]:
    """The tokens of a file without their hashes: name, roles, models, cap, created."""
    out = []
    for entry in read_tokens(path, missing_ok=False):
        item = entry.to_json()
        del item["sha256"]
        out.append(item)
    return out
