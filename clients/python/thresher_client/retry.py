"""When to retry a request and how long to wait first.

Retried: 503 and 429 answers, and connection failures. Never retried: any other error status
(a 4xx says the request itself is wrong; sending it again cannot help).

A connection failure before the request was sent (refused, unreachable) is always safe to
retry. A failure after it was sent (reset mid-request, timed out) is retried only for requests
that are safe to repeat: reads, scoring, labels that all carry ids (the server applies an id
once and counts a repeat as a duplicate), restores and rebuilds. Labels without ids are not
deduplicated, so the server may already have applied them; those, and creating or deleting a
model, raise :class:`ThresherConnectionError` at once instead. A 503 or 429 answer means
nothing was acknowledged, so it is retried for every request - except labels without ids sent
with ``wait=True``: with the Redis log the server can answer 503 after the durable append
("accepted but not yet applied"), and a retry would apply those labels twice.
"""

from __future__ import annotations

import email.utils
import random
import time

RETRY_STATUSES = frozenset({429, 503})
# A server asking for a longer pause than this is treated as asking for this long.
MAX_RETRY_AFTER = 60.0


class RetryPolicy:
    """Exponential backoff with jitter, honouring ``Retry-After``.

    The wait before retry ``k`` (0-based) is ``min(max_backoff, backoff * 2**k)`` scaled by a
    random factor in [0.5, 1.0) ("equal jitter", common practice), so clients that failed
    together do not all come back together; it is never shorter than the server's
    ``Retry-After``. Pass a seeded ``random.Random`` to make the waits reproducible.
    """

    def __init__(
        self,
        retries: int = 5,
        backoff: float = 0.2,
        max_backoff: float = 5.0,
        *,
        rng: random.Random | None = None,
    ) -> None:
        if isinstance(retries, bool) or not isinstance(retries, int) or retries < 0:
            raise ValueError(f"retries must be a whole number >= 0, got {retries!r}")
        if backoff < 0 or max_backoff < 0:
            raise ValueError("backoff and max_backoff must not be negative")
        self.retries = retries
        self.backoff = float(backoff)
        self.max_backoff = float(max_backoff)
        self.rng = rng if rng is not None else random.Random()

    def delay(self, attempt: int, retry_after: float | None = None) -> float:
        """Seconds to wait before retry number ``attempt`` (0 for the first retry)."""
        base = min(self.max_backoff, self.backoff * (2.0**attempt))
        wait = base * (0.5 + 0.5 * self.rng.random())
        if retry_after is not None:
            wait = max(wait, min(retry_after, MAX_RETRY_AFTER))
        return wait


def parse_retry_after(value: str | None, *, now: float | None = None) -> float | None:
    """``Retry-After`` in seconds: delay-seconds or an HTTP-date (RFC 9110 section 10.2.3)."""
    if value is None:
        return None
    value = value.strip()
    if value.isdigit():
        return float(value)
    try:
        when = email.utils.parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    if when.tzinfo is None:  # RFC 9110 dates are GMT
        return None
    current = time.time() if now is None else now
    return max(0.0, when.timestamp() - current)
