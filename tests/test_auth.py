"""Tokens file, bearer authentication, roles and the label-rate bucket.

Role expectations follow the role column of the HTTP contract in DEVELOPERS.md; header and
challenge handling follows RFC 6750 sections 2.1 and 3.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import os
import re
import stat
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from thresher import auth
from thresher.auth import (
    OPEN,
    RateLimiter,
    TokenStore,
    add_token,
    hash_secret,
    list_tokens,
    new_secret,
    remove_token,
    www_authenticate,
)
from thresher.errors import Forbidden, InvalidConfig, NotFound, Unauthorized


@pytest.fixture
def tokens_path(tmp_path: Path) -> Path:
    return tmp_path / "tokens.json"


def test_secret_shape() -> None:
    a, b = new_secret(), new_secret()
    assert a != b
    # 32 random bytes in unpadded URL-safe base64 are 43 characters (RFC 4648 arithmetic).
    assert re.fullmatch(r"thr_[A-Za-z0-9_-]{43}", a)


def test_hash_matches_published_vector() -> None:
    # SHA-256("abc"), the standard's first worked example (from memory).
    expected = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert hash_secret("abc") == expected


def test_round_trip(tokens_path: Path) -> None:
    s1 = add_token(tokens_path, name="ops", roles=["admin"])
    s2 = add_token(tokens_path, name="queue_1", roles=["label", "score"], models=["spam", "pay"],
                   labels_per_second=25)  # fmt: skip
    doc = json.loads(tokens_path.read_text())
    assert doc["version"] == 1
    assert [t["name"] for t in doc["tokens"]] == ["ops", "queue_1"]
    # The stored hash is the standard library's SHA-256 of the secret; the secret is nowhere.
    assert doc["tokens"][1]["sha256"] == hashlib.sha256(s2.encode()).hexdigest()
    assert s1 not in tokens_path.read_text() and s2 not in tokens_path.read_text()
    assert doc["tokens"][1]["roles"] == ["score", "label"]

    listed = list_tokens(tokens_path)
    assert all("sha256" not in t for t in listed)
    assert listed[1] == {"name": "queue_1", "roles": ["score", "label"], "models": ["pay", "spam"],
                         "labels_per_second": 25.0, "created": listed[1]["created"]}  # fmt: skip
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\+00:00", listed[1]["created"])

    store = TokenStore.load(tokens_path)
    assert len(store) == 2 and store.names() == ["ops", "queue_1"]
    who = store.authenticate(f"Bearer {s2}")
    assert who.name == "queue_1"
    assert who.roles == {"score", "label"}
    assert who.models == {"spam", "pay"}
    assert who.labels_per_second == 25.0
    assert store.authenticate(f"Bearer {s1}").name == "ops"


def test_write_is_atomic_and_private(tokens_path: Path) -> None:
    tokens_path.write_text('{"version": 1, "tokens": []}')
    os.chmod(tokens_path, 0o644)
    inode = tokens_path.stat().st_ino
    add_token(tokens_path, name="a", roles=["score"])
    # A new inode means the file was replaced by rename, never rewritten in place.
    assert tokens_path.stat().st_ino != inode
    assert stat.S_IMODE(tokens_path.stat().st_mode) == 0o600
    add_token(tokens_path, name="b", roles=["label"])
    remove_token(tokens_path, "a")
    assert stat.S_IMODE(tokens_path.stat().st_mode) == 0o600
    assert sorted(p.name for p in tokens_path.parent.iterdir()) == ["tokens.json"]
    assert [t["name"] for t in list_tokens(tokens_path)] == ["b"]


def test_rejected_add_leaves_file_alone(tokens_path: Path) -> None:
    add_token(tokens_path, name="a", roles=["score"])
    before = tokens_path.read_bytes()
    with pytest.raises(InvalidConfig) as err:
        add_token(tokens_path, name="a", roles=["label"])
    assert err.value.path == "name" and "already exists" in err.value.detail
    assert tokens_path.read_bytes() == before
    assert sorted(p.name for p in tokens_path.parent.iterdir()) == ["tokens.json"]


@pytest.mark.parametrize(
    ("kwargs", "path"),
    [
        ({"name": "has space", "roles": ["score"]}, "name"),
        ({"name": "", "roles": ["score"]}, "name"),
        ({"name": "x" * 65, "roles": ["score"]}, "name"),
        ({"name": "ok\n", "roles": ["score"]}, "name"),
        ({"name": "ok", "roles": []}, "roles"),
        ({"name": "ok", "roles": ["score", "root"]}, "roles[1]"),
        ({"name": "ok", "roles": ["score"], "models": []}, "models"),
        ({"name": "ok", "roles": ["score"], "models": ["a/b"]}, "models[0]"),
        ({"name": "ok", "roles": ["label"], "labels_per_second": 0}, "labels_per_second"),
        ({"name": "ok", "roles": ["label"], "labels_per_second": float("nan")},
         "labels_per_second"),
    ],
)  # fmt: skip
def test_add_token_validates(tokens_path: Path, kwargs: dict[str, Any], path: str) -> None:
    with pytest.raises(InvalidConfig) as err:
        add_token(tokens_path, **kwargs)
    assert err.value.path == path
    assert not tokens_path.exists()


def test_remove_token(tokens_path: Path) -> None:
    gone = add_token(tokens_path, name="gone", roles=["score"])
    kept = add_token(tokens_path, name="kept", roles=["score"])
    remove_token(tokens_path, "gone")
    store = TokenStore.load(tokens_path)
    assert store.authenticate(f"Bearer {kept}").name == "kept"
    with pytest.raises(Unauthorized):
        store.authenticate(f"Bearer {gone}")
    with pytest.raises(NotFound) as err:
        remove_token(tokens_path, "gone")
    assert err.value.path == "name"


GOOD = {"name": "a", "sha256": "0" * 64, "roles": ["score"]}


@pytest.mark.parametrize(
    ("text", "path", "words"),
    [
        ("{not json", "tokens_file", "not valid JSON: Expecting property name"),
        ("[]", "$", "must be a JSON object"),
        ('{"version": 2, "tokens": []}', "version", "format version 2"),
        ('{"tokens": []}', "version", "format version None"),
        ('{"version": true, "tokens": []}', "version", "format version True"),
        ('{"version": 1, "tokens": {}}', "tokens", "must be a list"),
        ('{"version": 1, "tokens": [], "extra": 1}', "extra", "unknown key"),
        (json.dumps({"version": 1, "tokens": [{**GOOD, "model": ["a"]}]}), "tokens[0].model",
         "unknown key 'model'"),
        (json.dumps({"version": 1, "tokens": [{**GOOD, "sha256": "xyz"}]}), "tokens[0].sha256",
         "64 hex digits"),
        (json.dumps({"version": 1, "tokens": [{**GOOD, "roles": ["score", "root"]}]}),
         "tokens[0].roles[1]", "unknown role 'root'"),
        (json.dumps({"version": 1, "tokens": [{**GOOD, "created": "yesterday"}]}),
         "tokens[0].created", "ISO 8601"),
        (json.dumps({"version": 1, "tokens": [{**GOOD, "labels_per_second": "9"}]}),
         "tokens[0].labels_per_second", "positive number"),
        (json.dumps({"version": 1, "tokens": [GOOD, {**GOOD, "sha256": "1" * 64}]}),
         "tokens[1].name", "appears twice"),
        (json.dumps({"version": 1, "tokens": [GOOD, {**GOOD, "name": "b"}]}),
         "tokens[1].sha256", "already used"),
    ],
)  # fmt: skip
def test_invalid_tokens_file(tokens_path: Path, text: str, path: str, words: str) -> None:
    tokens_path.write_text(text)
    with pytest.raises(InvalidConfig) as err:
        TokenStore.load(tokens_path)
    assert err.value.path == path
    assert words in err.value.detail
    assert str(tokens_path) in err.value.detail


def test_unreadable_tokens_file(tmp_path: Path) -> None:
    with pytest.raises(InvalidConfig) as err:
        TokenStore.load(tmp_path / "absent.json")
    assert "does not exist" in err.value.detail and "thresher token new" in err.value.detail
    with pytest.raises(InvalidConfig) as err:
        TokenStore.load(tmp_path)  # a directory
    assert "cannot be read" in err.value.detail
    (tmp_path / "latin.json").write_bytes(b'{"version": 1, "tokens": ["\xff"]}')
    with pytest.raises(InvalidConfig) as err:
        TokenStore.load(tmp_path / "latin.json")
    assert "cannot be read" in err.value.detail
    # Adding to a broken file must not overwrite it.
    (tmp_path / "broken.json").write_text("{")
    with pytest.raises(InvalidConfig):
        add_token(tmp_path / "broken.json", name="a", roles=["score"])
    assert (tmp_path / "broken.json").read_text() == "{"


@pytest.fixture
def store_and_secrets(tokens_path: Path) -> tuple[TokenStore, dict[str, str]]:
    found = {
        "scorer": add_token(tokens_path, name="scorer", roles=["score"]),
        "labeller": add_token(tokens_path, name="labeller", roles=["label"]),
        "admin": add_token(tokens_path, name="admin", roles=["admin"]),
        "spam-only": add_token(
            tokens_path, name="spam-only", roles=["score", "label"], models=["spam"]
        ),
    }
    return TokenStore.load(tokens_path), found


ALLOWED = {
    "scorer": {"score"},
    "labeller": {"label"},
    "admin": {"score", "label", "admin"},
    "spam-only": {"score", "label"},
}


@pytest.mark.parametrize("who", sorted(ALLOWED))
@pytest.mark.parametrize("role", ["score", "label", "admin"])
def test_role_matrix(
    store_and_secrets: tuple[TokenStore, dict[str, str]], who: str, role: str
) -> None:
    store, found = store_and_secrets
    principal = store.authenticate(f"Bearer {found[who]}")
    assert principal.name == who
    if role in ALLOWED[who]:
        principal.require(role)
        principal.require(role, "spam")
    else:
        with pytest.raises(Forbidden) as err:
            principal.require(role, "spam")
        assert f"lacks the {role!r} role" in err.value.detail
        assert err.value.status == 403


def test_model_limit(store_and_secrets: tuple[TokenStore, dict[str, str]]) -> None:
    store, found = store_and_secrets
    limited = store.authenticate(f"Bearer {found['spam-only']}")
    limited.require("label", "spam")
    with pytest.raises(Forbidden) as err:
        limited.require("score", "payments")
    assert "may not use model 'payments'" in err.value.detail and "spam" in err.value.detail
    admin = store.authenticate(f"Bearer {found['admin']}")
    admin.require("admin", "payments")


def test_open_principal_has_everything() -> None:
    for role in ("score", "label", "admin"):
        OPEN.require(role, "any-model")
    assert OPEN.models is None and OPEN.labels_per_second is None
    with pytest.raises(ValueError):
        OPEN.require("root")


def test_scheme_is_case_insensitive(store_and_secrets: tuple[TokenStore, dict[str, str]]) -> None:
    store, found = store_and_secrets
    # Authentication schemes are case-insensitive (RFC 9110 section 11.1).
    assert store.authenticate(f"bearer  {found['scorer']}").name == "scorer"
    assert store.authenticate(f"BEARER {found['scorer']} ").name == "scorer"


@pytest.mark.parametrize(
    ("header", "code"),
    [
        (None, None),
        ("", None),
        ("   ", None),
        ("Basic dXNlcjpwYXNz", None),
        ("Bearer", "invalid_token"),
        ("Bearer ", "invalid_token"),
        ("Bearer two parts", "invalid_token"),
        ('Bearer bad"quote', "invalid_token"),
        ("Bearer \u017f\u212a", "invalid_token"),  # letters that fold to ASCII under IGNORECASE
        ("Bearer thr_unknown", "invalid_token"),
        ("Bearer " + "0" * 64, "invalid_token"),
    ],
)
def test_unauthorized(
    store_and_secrets: tuple[TokenStore, dict[str, str]], header: str | None, code: str | None
) -> None:
    store, _ = store_and_secrets
    with pytest.raises(Unauthorized) as err:
        store.authenticate(header)
    expected = 'Bearer realm="thresher"' + (f', error="{code}"' if code else "")
    assert www_authenticate(err.value) == expected
    assert err.value.status == 401
    assert err.value.to_problem()["type"] == "/problems/unauthorized"


def test_www_authenticate_fallback() -> None:
    assert www_authenticate(Unauthorized("no")) == 'Bearer realm="thresher"'


def _count_comparisons(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """A list that gains an item at each constant-time comparison the store makes."""
    calls: list[int] = []
    real = hmac.compare_digest

    def counting(a: bytes, b: bytes) -> bool:
        calls.append(1)
        return real(a, b)

    monkeypatch.setattr(auth.hmac, "compare_digest", counting)
    return calls


def test_every_hash_is_compared(
    store_and_secrets: tuple[TokenStore, dict[str, str]], monkeypatch: pytest.MonkeyPatch
) -> None:
    store, found = store_and_secrets
    calls = _count_comparisons(monkeypatch)
    # A match on the first entry, the last entry and no entry all cost one comparison each.
    for header in (f"Bearer {found['scorer']}", f"Bearer {found['spam-only']}"):
        calls.clear()
        store.authenticate(header)
        assert len(calls) == 4
    calls.clear()
    with pytest.raises(Unauthorized):
        store.authenticate("Bearer thr_nobody")
    assert len(calls) == 4


def test_an_accepted_header_is_remembered_and_only_it(
    store_and_secrets: tuple[TokenStore, dict[str, str]], monkeypatch: pytest.MonkeyPatch
) -> None:
    store, found = store_and_secrets
    header = f"Bearer {found['labeller']}"
    first = store.authenticate(header)
    calls = _count_comparisons(monkeypatch)
    # The same value again is known: no hashing, no comparisons, the same principal.
    assert store.authenticate(header) is first and calls == []
    # A value that differs in any way, even one accepted another way, is checked in full.
    assert store.authenticate(header + " ").name == "labeller" and len(calls) == 4
    for _ in range(3):
        with pytest.raises(Unauthorized):
            store.authenticate(header[:-1])
    assert len(calls) == 4 + 3 * 4
    assert header[:-1] not in store._accepted  # refused values are never remembered


def test_remembered_headers_are_bounded(
    store_and_secrets: tuple[TokenStore, dict[str, str]],
) -> None:
    store, found = store_and_secrets
    secret = found["scorer"]
    # RFC 6750 allows any number of spaces after the scheme: each spelling is its own value.
    for spaces in range(1, auth.ACCEPTED_KEPT + 50):
        assert store.authenticate("Bearer" + " " * spaces + secret).name == "scorer"
    assert len(store._accepted) <= auth.ACCEPTED_KEPT


def test_from_json_empty_store_refuses_everyone() -> None:
    store = TokenStore.from_json({"version": 1, "tokens": []})
    with pytest.raises(Unauthorized):
        store.authenticate("Bearer " + new_secret())


# -- rate limiter: a token bucket of 2 x rate (common practice for token buckets) ------------


def test_bucket_burst_and_refill() -> None:
    limiter = RateLimiter()
    assert limiter.allow("a", 20, 0.0, 10.0) == 0.0  # the full burst of 2 s x 10/s
    assert limiter.allow("a", 1, 0.0, 10.0) == pytest.approx(0.1)
    assert limiter.allow("b", 20, 0.0, 10.0) == 0.0  # buckets are per name
    assert limiter.allow("a", 1, 0.1, 10.0) == 0.0
    assert limiter.allow("a", 5, 0.1, 10.0) == pytest.approx(0.5)
    # Refill stops at the burst: a long idle time does not bank more than 2 s of labels.
    assert limiter.allow("a", 20, 100.0, 10.0) == 0.0
    assert limiter.allow("a", 1, 100.0, 10.0) > 0


def test_bucket_large_batch_goes_into_debt() -> None:
    limiter = RateLimiter()
    assert limiter.allow("a", 100, 0.0, 10.0) == 0.0  # larger than the burst, bucket full
    wait = limiter.allow("a", 1, 0.0, 10.0)
    assert wait == pytest.approx((100 - 20 + 1) / 10.0)
    assert limiter.allow("a", 1, wait - 0.01, 10.0) > 0
    assert limiter.allow("a", 1, wait, 10.0) == 0.0


def test_bucket_clock_step_back_and_bad_rate() -> None:
    limiter = RateLimiter()
    limiter.allow("a", 20, 10.0, 10.0)
    assert limiter.allow("a", 1, 5.0, 10.0) > 0  # an earlier time refills nothing
    for bad in (0.0, -1.0, float("inf"), float("nan")):
        with pytest.raises(ValueError):
            limiter.allow("a", 1, 0.0, bad)
    limiter.forget("a")
    assert limiter.allow("a", 20, 10.0, 10.0) == 0.0


@settings(max_examples=200, deadline=None)
@given(
    rate=st.floats(0.5, 100.0),
    steps=st.lists(st.tuples(st.floats(0.0, 2.0), st.integers(0, 300)), min_size=1, max_size=40),
)
def test_bucket_never_exceeds_the_cap(rate: float, steps: list[tuple[float, int]]) -> None:
    limiter = RateLimiter()
    now, admitted, biggest = 0.0, 0, 0
    for gap, n in steps:
        now += gap
        wait = limiter.allow("a", n, now, rate)
        if wait == 0.0:
            admitted += n
            biggest = max(biggest, n)
        else:
            # Waiting the time given and asking again always succeeds.
            assert limiter.allow("a", n, now + wait + 1e-9, rate) == 0.0
            now += wait + 1e-9
            admitted += n
            biggest = max(biggest, n)
    burst = 2 * rate
    # Over [0, now] no more than the burst, the refill, and one batch's overshoot got through.
    assert admitted <= burst + rate * now + max(0.0, biggest - burst) + 1e-6
