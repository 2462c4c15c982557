"""Bearer authentication (RFC 6750): checking a request's token, the challenge, label caps.

The tokens file, the roles and :class:`Principal` live in :mod:`thresher.tokens` and are
re-exported here.

An :class:`~thresher.errors.Unauthorized` raised here carries the ``WWW-Authenticate`` value in
``extra["www_authenticate"]`` (so it also appears as an extension member of the problem body);
:func:`www_authenticate` reads it back with the plain challenge as the fallback.
"""

from __future__ import annotations

import hashlib
import hmac
import math
import re
from collections.abc import Sequence
from typing import Any

from .errors import Unauthorized
from .tokens import (
    FORMAT_VERSION,
    NAME_RE,
    ROLES,
    SECRET_PREFIX,
    Principal,
    StrPath,
    TokenEntry,
    add_token,
    hash_secret,
    list_tokens,
    new_secret,
    parse_tokens,
    read_tokens,
    remove_token,
)

__all__ = [
    "CHALLENGE",
    "FORMAT_VERSION",
    "NAME_RE",
    "OPEN",
    "REALM",
    "ROLES",
    "SECRET_PREFIX",
    "Principal",
    "RateLimiter",
    "StrPath",
    "TokenStore",
    "add_token",
    "hash_secret",
    "list_tokens",
    "new_secret",
    "remove_token",
    "www_authenticate",
]

REALM = "thresher"
CHALLENGE = f'Bearer realm="{REALM}"'
# RFC 6750 section 2.1: credentials = "Bearer" 1*SP b64token.
_BEARER_RE = re.compile(r"(?i:Bearer) +([A-Za-z0-9\-._~+/]+=*) *")

# At most this many accepted Authorization values are remembered (TokenStore._accepted).
ACCEPTED_KEPT = 1024

# The principal of a server without a tokens file: every role, every model, no cap.
OPEN = Principal("open", frozenset(ROLES))


def www_authenticate(error: Unauthorized) -> str:
    """The ``WWW-Authenticate`` value for a 401 answer (RFC 6750 section 3)."""
    value = error.extra.get("www_authenticate")
    return value if isinstance(value, str) else CHALLENGE


def _unauthorized(detail: str, code: str | None) -> Unauthorized:
    # Without credentials the challenge carries no error code (RFC 6750 section 3.1).
    challenge = CHALLENGE if code is None else f'{CHALLENGE}, error="{code}"'
    return Unauthorized(detail, www_authenticate=challenge)


class TokenStore:
    """The tokens of one file, checked in constant time against a presented secret."""

    def __init__(self, entries: Sequence[TokenEntry], *, source: str = "tokens file") -> None:
        self._entries = tuple(entries)
        self.source = source
        # Authorization values already accepted, and their principals: a client sends the same
        # header on every request, and checking it anew hashes it and compares the hash with
        # every entry. Only accepted values are kept, so wrong guesses cannot grow it, and a
        # lookup hits only on the exact value: it says nothing about how close a guess came.
        self._accepted: dict[str, Principal] = {}

    @classmethod
    def load(cls, path: StrPath) -> TokenStore:
        """Read and validate a tokens file; InvalidConfig says what is wrong with it."""
        return cls(read_tokens(path, missing_ok=False), source=str(path))

    @classmethod
    def from_json(cls, doc: Any, *, source: str = "tokens file") -> TokenStore:
        """Validate an already parsed tokens document."""
        return cls(parse_tokens(doc, source), source=source)

    def __len__(self) -> int:
        return len(self._entries)

    def names(self) -> list[str]:
        """Token names, in file order."""
        return [e.principal.name for e in self._entries]

    def authenticate(self, authorization_header: str | None) -> Principal:
        """The principal of an ``Authorization`` header value; Unauthorized otherwise."""
        if authorization_header is not None:
            known = self._accepted.get(authorization_header)
            if known is not None:
                return known
        if authorization_header is None or not authorization_header.strip():
            raise _unauthorized(
                "missing bearer token; send the header 'Authorization: Bearer <secret>'", None
            )
        scheme = authorization_header.strip().split(" ", 1)[0]
        if scheme.lower() != "bearer":
            raise _unauthorized(
                f"authorization scheme {scheme[:32]!r} is not accepted; send "
                "'Authorization: Bearer <secret>'",
                None,
            )
        match = _BEARER_RE.fullmatch(authorization_header.strip())
        if match is None:
            raise _unauthorized(
                "malformed bearer token; send 'Authorization: Bearer <secret>' with the "
                "secret printed by `thresher token new`",
                "invalid_token",
            )
        presented = hashlib.sha256(match.group(1).encode("utf-8")).digest()
        found: Principal | None = None
        # Compare against every stored hash, without stopping at a match, so the time taken
        # does not tell which entry (or how many) an attacker's guess came close to.
        for entry in self._entries:
            if hmac.compare_digest(presented, entry.digest):
                found = entry.principal
        if found is None:
            raise _unauthorized(
                "unknown bearer token; it may have been removed from the tokens file",
                "invalid_token",
            )
        if len(self._accepted) >= ACCEPTED_KEPT:
            self._accepted.clear()  # rare (many spellings of the headers); start afresh
        self._accepted[authorization_header] = found
        return found


# -- label caps ----------------------------------------------------------------------------


class RateLimiter:
    """A token bucket per principal name; pure, the caller passes the time in.

    The bucket holds up to ``2 * rate`` labels (the burst) and refills at ``rate`` per second.
    A request is let through when the bucket holds ``min(n, burst)``; it then takes all ``n``,
    which may leave the bucket in debt, so a batch larger than the burst is served at once
    and later requests wait until the average rate is back under the cap.
    """

    BURST_SECONDS = 2.0

    def __init__(self) -> None:
        # name -> [level, last time, rate]
        self._buckets: dict[str, list[float]] = {}

    def allow(self, name: str, n: int, now: float, rate: float) -> float:
        """0.0 when ``n`` labels may pass now (and take them), else the seconds to wait."""
        if isinstance(rate, bool) or not math.isfinite(rate) or rate <= 0:
            raise ValueError(f"rate must be a positive number of labels per second, not {rate}")
        burst = rate * self.BURST_SECONDS
        bucket = self._buckets.get(name)
        if bucket is None:
            bucket = self._buckets[name] = [burst, now, rate]
        level, last, _ = bucket
        # A clock that steps back refills nothing rather than draining the bucket.
        level = min(burst, level + max(0.0, now - last) * rate)
        bucket[1], bucket[2] = now, rate
        need = min(float(n), burst)
        if level >= need:
            bucket[0] = level - n
            return 0.0
        bucket[0] = level
        return (need - level) / rate

    def forget(self, name: str) -> None:
        """Drop the bucket of a removed token."""
        self._buckets.pop(name, None)
