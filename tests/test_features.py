"""The feature spec and the hashing trick (thresher.features).

Outside references, named beside each check: the SMHasher verification procedure and check
values for MurmurHash3_x86_32 (Appleby; values from memory), the mmh3 library's own hash,
scikit-learn's FeatureHasher and CountVectorizer, and numpy's log1p, clip and digitize. Token
spellings without an outside counterpart are checked against the token contract in
DEVELOPERS.md ("contract" below).
"""

from __future__ import annotations

import collections
import itertools
import json
import math
import random
import struct
from typing import Any

import mmh3
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.feature_extraction import FeatureHasher
from sklearn.feature_extraction.text import CountVectorizer

from thresher.errors import InvalidConfig, InvalidEvent
from thresher.features import (
    CROSS_CAP,
    Batch,
    FeatureSpec,
    Featurizer,
    Hasher,
    SparseRow,
)

# Deadlines off: the machine is shared, and timing is not what these properties test.
PROPERTY = settings(max_examples=60, deadline=None)
EXOTIC = ["é", "naïve", "straße", "日本語", "🙂", "👍🏽", "Ωmega", "a b", "", "=", "^bias"]
TOKEN = st.one_of(st.sampled_from(EXOTIC), st.text(max_size=12))


def pairs(indices: np.ndarray, values: np.ndarray) -> list[tuple[int, float]]:
    return [(int(i), float(v)) for i, v in zip(indices, values, strict=True)]


def sklearn_pairs(hasher: FeatureHasher, samples: list[Any]) -> list[list[tuple[int, float]]]:
    matrix = hasher.transform(samples).tocsr()
    matrix.sum_duplicates()
    matrix.eliminate_zeros()
    matrix.sort_indices()
    return [pairs(row.indices, row.data) for row in matrix]


# -- MurmurHash3 ---------------------------------------------------------------------------


def test_murmur3_x86_32_smhasher_verification_value() -> None:
    # SMHasher's VerificationTest (Appleby): key {0..n-1} hashed with seed 256 - n for
    # n = 0..255, the 256 hashes concatenated little-endian, that buffer hashed with seed 0.
    hashes = b"".join(
        struct.pack("<I", mmh3.hash(bytes(range(n)), 256 - n, signed=False)) for n in range(256)
    )
    assert len(hashes) == 1024
    assert mmh3.hash(hashes, 0, signed=False) == 0xB0F57EE3  # SMHasher value, from memory


def test_murmur3_hello_world_check_value() -> None:
    assert mmh3.hash(b"Hello, world!", 1234, signed=False) == 0xFAF6CDB3  # from memory
    # Our Hasher hashes the token's UTF-8 bytes with the same function.
    index, sign = Hasher(bits=28, seed=1234).index_sign("Hello, world!")
    signed = struct.unpack("<i", struct.pack("<I", 0xFAF6CDB3))[0]
    assert (index, sign) == (abs(signed) % 2**28, 1 if signed >= 0 else -1)


@given(tokens=st.lists(TOKEN, max_size=20), seed=st.integers(0, 2**32 - 1))
@PROPERTY
def test_index_and_sign_follow_mmh3_for_any_seed(tokens: list[str], seed: int) -> None:
    hasher = Hasher(bits=16, seed=seed)
    unsigned = Hasher(bits=16, seed=seed, signed=False)
    for token in tokens:
        h = mmh3.hash(token.encode("utf-8"), seed, signed=True)  # the mmh3 library
        assert hasher.index_sign(token) == (abs(h) % 2**16, 1 if h >= 0 else -1)
        assert unsigned.index_sign(token) == (abs(h) % 2**16, 1)


# -- agreement with scikit-learn's FeatureHasher ---------------------------------------------


@given(
    samples=st.lists(st.lists(TOKEN, max_size=30), min_size=1, max_size=5),
    bits=st.sampled_from([10, 12, 20]),
    signed=st.booleans(),
)
@PROPERTY
def test_hash_tokens_equals_sklearn_feature_hasher(
    samples: list[list[str]], bits: int, signed: bool
) -> None:
    # scikit-learn FeatureHasher: murmurhash3_32 seed 0, index |h| mod n, sign of h.
    reference = FeatureHasher(n_features=2**bits, input_type="string", alternate_sign=signed)
    ours = Hasher(bits=bits, seed=0, signed=signed)
    for tokens, expected in zip(samples, sklearn_pairs(reference, samples), strict=True):
        indices, values = ours.hash_tokens(tokens)
        assert indices.dtype == np.int64 and values.dtype == np.float32
        assert pairs(indices, values) == expected


def test_hash_tokens_equals_sklearn_on_seeded_random_lists() -> None:
    rng = random.Random(20240601)
    pool = [*EXOTIC, *(f"word{i}" for i in range(50))]
    samples = [[rng.choice(pool) for _ in range(rng.randrange(0, 60))] for _ in range(200)]
    reference = FeatureHasher(n_features=2**10, input_type="string", alternate_sign=True)
    ours = Hasher(bits=10)
    for tokens, expected in zip(samples, sklearn_pairs(reference, samples), strict=True):
        assert pairs(*ours.hash_tokens(tokens)) == expected  # scikit-learn FeatureHasher


def test_tokens_that_cancel_are_dropped() -> None:
    # Find, with the mmh3 library, two tokens with one index and opposite signs at 10 bits.
    first: dict[int, tuple[str, int]] = {}
    for i in itertools.count():
        h = mmh3.hash(f"t{i}".encode(), 0, signed=True)
        index, sign = abs(h) % 1024, 1 if h >= 0 else -1
        if index in first and first[index][1] == -sign:
            a, b = first[index][0], f"t{i}"
            break
        first.setdefault(index, (f"t{i}", sign))
    indices, values = Hasher(bits=10).hash_tokens([a, b, "other"])
    assert index not in indices.tolist() and len(indices) == 1
    reference = FeatureHasher(n_features=1024, input_type="string")
    assert pairs(indices, values) == sklearn_pairs(reference, [[a, b, "other"]])[0]


def test_batch_values_equal_sklearn_pairs() -> None:
    spec = FeatureSpec.from_json(
        {"fields": {"title": {"kind": "text", "ngrams": 2}, "price": {"kind": "numeric"}}}
    )
    featurizer = Featurizer(spec, bits=12, seed=0)
    events = [
        {"title": "Red bike, red frame", "price": 12.5, "colour": "red"},
        {"title": "Blue pram", "price": 0, "tags": ["new", "boxed"]},
        {"price": -3.25, "urgent": True},
    ]
    batch = featurizer.transform_batch(events)
    assert isinstance(batch, Batch) and batch.indptr.tolist()[0] == 0
    # scikit-learn FeatureHasher with (token, value) pairs, seed 0.
    reference = FeatureHasher(n_features=2**12, input_type="pair")
    expected = sklearn_pairs(reference, [featurizer.tokens(e) for e in events])
    for i, want in enumerate(expected):
        got = pairs(*batch.row(i))
        assert [g[0] for g in got] == [w[0] for w in want]
        np.testing.assert_allclose([g[1] for g in got], [w[1] for w in want], rtol=1e-6)


# -- properties ------------------------------------------------------------------------------

SPEC = FeatureSpec.from_json(
    {
        "fields": {
            "title": {"kind": "text", "ngrams": 2, "char_ngrams": 3},
            "price": {"kind": "numeric", "log1p": True, "buckets": [1.0, 3.0, 5.0]},
            "count": {"kind": "numeric", "clip": [-10, 10]},
            "category": {"kind": "categorical"},
            "tags": {"kind": "set"},
        },
        "crosses": [["category", "tags"], ["category", "price", "count"]],
    }
)
VALUE = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-1000, 1000),
    st.floats(-1e6, 1e6, allow_nan=False),
    st.sampled_from(EXOTIC),
    st.lists(st.sampled_from(EXOTIC), max_size=6),
)
EVENT = st.fixed_dictionaries(
    {},
    optional={
        "title": st.text(max_size=40),
        "price": st.floats(0, 1e6),
        "count": st.floats(-100, 100),
        "category": st.sampled_from(EXOTIC),
        "tags": st.lists(st.sampled_from(EXOTIC), max_size=6),
        "extra": VALUE,
        "other": VALUE,
        "ünïcode": VALUE,
    },
)


def same(a: SparseRow, b: SparseRow) -> bool:
    return np.array_equal(a.indices, b.indices) and np.array_equal(a.values, b.values)


@given(event=EVENT, shuffle=st.randoms(use_true_random=False))
@PROPERTY
def test_field_and_member_order_do_not_change_the_vector(
    event: dict[str, Any], shuffle: random.Random
) -> None:
    featurizer = Featurizer(SPEC, bits=12, seed=3)
    items = list(event.items())
    shuffle.shuffle(items)
    permuted = {k: shuffle.sample(v, len(v)) if isinstance(v, list) else v for k, v in items}
    assert same(featurizer.transform(event), featurizer.transform(permuted))


@given(events=st.lists(EVENT, max_size=8))
@PROPERTY
def test_batch_equals_row_by_row(events: list[dict[str, Any]]) -> None:
    featurizer = Featurizer(SPEC, bits=10, seed=11, signed=True)
    batch = featurizer.transform_batch(events)
    assert len(batch.indptr) == len(events) + 1
    for i, event in enumerate(events):
        row = featurizer.transform(event)
        assert same(batch.row(i), row)
        assert np.all(np.diff(row.indices) > 0) and np.all(row.values != 0)


@given(event=EVENT)
@PROPERTY
def test_explained_tokens_add_up_to_the_vector(event: dict[str, Any]) -> None:
    featurizer = Featurizer(SPEC, bits=10, seed=5)
    row, explained = featurizer.transform_with_tokens(event)
    assert [t for t, _, _ in explained] == [t for t, _ in featurizer.tokens(event)]
    sums: dict[int, float] = collections.defaultdict(float)
    for token, index, value in explained:
        assert featurizer.hasher.index_sign(token)[0] == index
        sums[index] += value
    kept = {i: v for i, v in sums.items() if np.float32(v) != 0}
    assert pairs(*row) == [(i, float(np.float32(kept[i]))) for i in sorted(kept)]


def test_a_tiny_cache_changes_nothing_and_stays_bounded() -> None:
    tokens = [f"tok{i % 37}" for i in range(500)] + ["x" * 1000]
    small, large = Hasher(bits=14, cache_size=3), Hasher(bits=14)
    assert pairs(*small.hash_tokens(tokens)) == pairs(*large.hash_tokens(tokens))
    assert len(small._cache) <= 3
    assert "x" * 1000 not in large._cache  # long tokens are hashed but not kept


# -- tokens of each kind ---------------------------------------------------------------------


def tokens_of(spec: dict[str, Any] | None, fields: dict[str, Any]) -> list[tuple[str, float]]:
    return Featurizer(FeatureSpec.from_json(spec)).tokens(fields)


def test_text_words_and_ngrams_match_sklearn_count_vectorizer() -> None:
    spec = {"fields": {"t": {"kind": "text", "ngrams": 3}}}
    text = "Hello, World hello Straße ÉTÉ 42 snake_case"
    ours = collections.Counter(t.removeprefix("t:") for t, _ in tokens_of(spec, {"t": text})[1:])
    # scikit-learn CountVectorizer: lower-case, then (?u)\w+ words and word n-grams 1..3.
    analyzer = CountVectorizer(token_pattern=r"(?u)\w+", ngram_range=(1, 3)).build_analyzer()
    assert ours == collections.Counter(analyzer(text))
    assert tokens_of(spec, {"t": "Hello, World hello"})[1:6] == [  # contract
        ("t:hello", 1.0),
        ("t:world", 1.0),
        ("t:hello", 1.0),
        ("t:hello world", 1.0),
        ("t:world hello", 1.0),
    ]


@pytest.mark.parametrize("k", [2, 3, 5])
def test_char_ngrams_match_sklearn_char_wb_with_angle_padding(k: int) -> None:
    spec = {"fields": {"t": {"kind": "text", "char_ngrams": k}}}
    text = "Cat a naïve 🙂x"
    tokens = [t for t, _ in tokens_of(spec, {"t": text})]
    ours = [t.removeprefix("t#") for t in tokens if t.startswith("t#")]
    words = " ".join(t.removeprefix("t:") for t in tokens if t.startswith("t:"))
    assert words == "cat a naïve 🙂x".replace("🙂", "")  # \w skips the emoji
    # scikit-learn's char_wb pads each word with spaces; we pad with "<" and ">".
    analyzer = CountVectorizer(analyzer="char_wb", ngram_range=(k, k)).build_analyzer()
    theirs = []
    for gram in analyzer(words):
        gram = "<" + gram[1:] if gram.startswith(" ") else gram
        theirs.append(gram[:-1] + ">" if gram.endswith(" ") else gram)
    assert collections.Counter(ours) == collections.Counter(theirs)
    if k == 3:
        assert ours[:4] == ["<ca", "cat", "at>", "<a>"]  # contract: a short word is one gram


def test_numeric_transforms_match_numpy() -> None:
    spec = {
        "fields": {
            "plain": {"kind": "numeric"},
            "logged": {"kind": "numeric", "log1p": True},
            "clipped": {"kind": "numeric", "log1p": True, "clip": [0, 3]},
            "bucketed": {"kind": "numeric", "log1p": True, "buckets": [1, 2.5, 4.5]},
        }
    }
    fields = {"plain": -2.5, "logged": 99, "clipped": 99, "bucketed": 99}
    got = dict(tokens_of(spec, fields))
    assert got["plain"] == -2.5
    assert got["logged"] == pytest.approx(np.log1p(99.0), rel=1e-15)  # numpy log1p
    assert got["clipped"] == np.clip(np.log1p(99.0), 0, 3)  # numpy clip
    # numpy digitize: i with edges[i-1] <= x < edges[i]
    edges = [1, 2.5, 4.5]
    for raw in [0, 1.5, math.expm1(2.5), 10, 1e9]:
        bucket = int(np.digitize(np.log1p(raw), edges))
        assert tokens_of(spec, {"bucketed": raw}) == [("^bias", 1.0), (f"bucketed@{bucket}", 1.0)]
    spec_raw = {"fields": {"b": {"kind": "numeric", "buckets": edges}}}
    for raw in [-1, 1, 2.5, 4.5, 7]:
        assert tokens_of(spec_raw, {"b": raw})[1][0] == f"b@{int(np.digitize(raw, edges))}"


def test_a_zero_numeric_value_leaves_no_entry() -> None:
    featurizer = Featurizer(FeatureSpec.from_json(None), bits=16)
    assert len(featurizer.transform({"x": 0}).indices) == 1  # only the bias
    assert len(featurizer.transform({"x": 0.5}).indices) == 2


def test_categorical_set_and_bias_tokens() -> None:
    spec = {"fields": {"c": {"kind": "categorical"}, "s": {"kind": "set"}}}
    assert tokens_of(spec, {}) == [("^bias", 1.0)]  # contract: the bias on every event
    assert tokens_of(spec, {"c": "Red", "s": ["b", "a", "b"]}) == [
        ("^bias", 1.0),
        ("c=Red", 1.0),  # contract: categorical keeps its case
        ("s=a", 1.0),  # contract: a set's members count once, sorted
        ("s=b", 1.0),
    ]
    for value, token in [
        (3, "c=3"),
        (3.0, "c=3"),
        (-7, "c=-7"),
        (True, "c=true"),
        (False, "c=false"),
    ]:
        assert tokens_of(spec, {"c": value})[1] == (token, 1.0)
    assert tokens_of(spec, {"c": None, "s": None}) == [("^bias", 1.0)]  # null: absent


def test_crosses() -> None:
    spec = {
        "fields": {
            "a": {"kind": "categorical"},
            "p": {"kind": "numeric", "buckets": [1, 10]},
            "n": {"kind": "numeric"},
            "s": {"kind": "set"},
            "t": {"kind": "set"},
        },
        "crosses": [["a", "p"], ["a", "n"], ["a", "s"], ["a", "p", "s"], ["s", "t"]],
    }
    got = [t for t, _ in tokens_of(spec, {"a": "x", "p": 3, "n": 2.0, "s": ["k", "j", "k"]})]
    assert got[-6:] == [  # contract: declared order; bucket token; raw number; set product
        "a=x&p@1",
        "a=x&n=2",
        "a=x&s=j",
        "a=x&s=k",
        "a=x&p@1&s=j",
        "a=x&p@1&s=k",
    ]
    assert not any(t.startswith("s=") and "&t=" in t for t in got)  # t missing: no s x t
    assert not any("&" in t for t, _ in tokens_of(spec, {"a": "x"}))  # missing fields skip
    assert not any("&" in t for t, _ in tokens_of(spec, {"a": "x", "s": []}))
    big = {"s": [f"m{i}" for i in range(100)], "t": [f"n{i}" for i in range(100)]}
    crossed = [t for t, _ in tokens_of(spec, big) if "&" in t]
    assert len(crossed) == CROSS_CAP and crossed[0] == "s=m0&t=n0"  # capped, sorted members


def test_inferred_kinds_without_a_spec() -> None:
    fields = {"s": "v", "n": 2, "f": 1.5, "b": True, "l": ["y", "x"], "z": None}
    assert tokens_of(None, fields) == [  # contract: inferred kinds, fields by name
        ("^bias", 1.0),
        ("b=true", 1.0),
        ("f", 1.5),
        ("l=x", 1.0),
        ("l=y", 1.0),
        ("n", 2.0),
        ("s=v", 1.0),
    ]


def test_strict_refuses_and_lenient_infers_undeclared_fields() -> None:
    declared = {"fields": {"c": {"kind": "categorical"}}}
    lenient = tokens_of(declared, {"c": "a", "z": 4, "y": "q"})
    assert lenient == [("^bias", 1.0), ("c=a", 1.0), ("y=q", 1.0), ("z", 4.0)]
    with pytest.raises(InvalidEvent) as caught:
        tokens_of({**declared, "strict": True}, {"c": "a", "zz": 4})
    assert caught.value.path == "fields.zz" and "strict" in caught.value.detail


# -- bad events ------------------------------------------------------------------------------

STRICT = {
    "fields": {
        "title": {"kind": "text"},
        "price": {"kind": "numeric", "log1p": True},
        "n": {"kind": "numeric"},
        "category": {"kind": "categorical"},
        "tags": {"kind": "set"},
    },
    "strict": True,
    "max_string_bytes": 16,
}


@pytest.mark.parametrize(
    ("spec", "fields", "path"),
    [
        (STRICT, {"price": float("nan")}, "fields.price"),
        (STRICT, {"n": float("inf")}, "fields.n"),
        (STRICT, {"n": -float("inf")}, "fields.n"),
        (STRICT, {"n": 10**400}, "fields.n"),
        (STRICT, {"n": 1e31}, "fields.n"),
        (STRICT, {"price": -1}, "fields.price"),
        (STRICT, {"price": "12"}, "fields.price"),
        (STRICT, {"price": True}, "fields.price"),
        (STRICT, {"title": 12}, "fields.title"),
        (STRICT, {"title": ["a"]}, "fields.title"),
        (STRICT, {"title": "x" * 17}, "fields.title"),
        (STRICT, {"title": "🙂" * 5}, "fields.title"),  # 5 characters, 20 UTF-8 bytes
        (STRICT, {"category": "é" * 9}, "fields.category"),
        (STRICT, {"category": {"a": 1}}, "fields.category"),
        (STRICT, {"category": 2.5}, "fields.category"),
        (STRICT, {"category": [1]}, "fields.category"),
        (STRICT, {"category": "a\ud800"}, "fields.category"),
        (STRICT, {"tags": ["a", 3]}, "fields.tags[1]"),
        (STRICT, {"tags": "a"}, "fields.tags"),
        (STRICT, {"tags": ["ok", "x" * 17]}, "fields.tags[1]"),
        (STRICT, {"tags": ["\udfff"]}, "fields.tags"),
        (STRICT, {"unknown": 1}, "fields.unknown"),
        (STRICT, [1, 2], "fields"),
        (None, "text", "fields"),
        (None, {"nested": {"a": 1}}, "fields.nested"),
        (None, {"xs": [1]}, "fields.xs[0]"),
        (None, {"f": float("nan")}, "fields.f"),
        (None, {1: "x"}, "fields"),
        (None, {"x" * 70000: 1}, "fields." + "x" * 70000),
        ({"max_tokens": 5}, {"a": [f"m{i}" for i in range(5)]}, "fields.a"),
        ({"max_tokens": 3}, {"a": 1, "b": 2, "c": 3}, "fields"),
    ],
)
def test_bad_events_name_the_offending_value(spec: Any, fields: Any, path: str) -> None:
    featurizer = Featurizer(FeatureSpec.from_json(spec), bits=12)
    for call in (featurizer.tokens, featurizer.transform, featurizer.transform_with_tokens):
        with pytest.raises(InvalidEvent) as caught:
            call(fields)
        assert caught.value.path == path
        assert len(caught.value.detail) > 20  # says what was wrong and how to fix it


def test_batch_errors_carry_the_event_index() -> None:
    featurizer = Featurizer(FeatureSpec.from_json(STRICT))
    with pytest.raises(InvalidEvent) as caught:
        featurizer.transform_batch([{"n": 1}, {"n": 2}, {"n": float("nan")}])
    assert caught.value.path == "events[2].fields.n"
    with pytest.raises(InvalidEvent) as caught:
        featurizer.transform_batch([{"n": 1}, None], path="labels")
    assert caught.value.path == "labels[1].fields"
    with pytest.raises(InvalidEvent) as caught:
        featurizer.transform({"category": "\ud800"}, path="events[3].fields")
    assert caught.value.path == "events[3].fields.category"


def test_text_with_a_lone_surrogate_is_read_without_it() -> None:
    # \w never matches a surrogate, so the words around it are all a text field yields.
    assert tokens_of(STRICT, {"title": "ab\ud800cd"})[1:] == [("title:ab", 1.0), ("title:cd", 1.0)]


# -- bad specs -------------------------------------------------------------------------------

TEXT = {"kind": "text"}
CAT = {"kind": "categorical"}


def num(options: dict[str, Any]) -> dict[str, Any]:
    return {"fields": {"p": {"kind": "numeric", **options}}}


def fields(**options: Any) -> dict[str, Any]:
    return {"fields": {"title": {**TEXT, **options}, "a": CAT, "b": CAT, "c": CAT}}


@pytest.mark.parametrize(
    ("spec", "path"),
    [
        ([], "features"),
        ("fields", "features"),
        ({"bogus": 1}, "features.bogus"),
        ({"fields": []}, "features.fields"),
        ({"fields": {"a": "text"}}, "features.fields.a"),
        ({"fields": {"": CAT}}, "features.fields"),
        ({"fields": {"a": {"kind": "wavelet"}}}, "features.fields.a.kind"),
        ({"fields": {"a": {}}}, "features.fields.a.kind"),
        ({"fields": {"a": {**TEXT, "bogus": 1}}}, "features.fields.a.bogus"),
        ({"fields": {"a": {**CAT, "ngrams": 2}}}, "features.fields.a.ngrams"),
        ({"fields": {"a": {"kind": "set", "log1p": True}}}, "features.fields.a.log1p"),
        ({"fields": {"a": {"kind": "numeric", "ngrams": 2}}}, "features.fields.a.ngrams"),
        (fields(ngrams=0), "features.fields.title.ngrams"),
        (fields(ngrams=6), "features.fields.title.ngrams"),
        (fields(ngrams=True), "features.fields.title.ngrams"),
        (fields(ngrams=2.0), "features.fields.title.ngrams"),
        (fields(char_ngrams=1), "features.fields.title.char_ngrams"),
        (fields(char_ngrams=7), "features.fields.title.char_ngrams"),
        (fields(char_ngrams=-1), "features.fields.title.char_ngrams"),
        (num({"log1p": "yes"}), "features.fields.p.log1p"),
        (num({"clip": [1]}), "features.fields.p.clip"),
        (num({"clip": [2, 1]}), "features.fields.p.clip"),
        (num({"clip": [1, 1]}), "features.fields.p.clip"),
        (num({"clip": [0, "x"]}), "features.fields.p.clip[1]"),
        (num({"clip": [math.nan, 1]}), "features.fields.p.clip[0]"),
        (num({"buckets": []}), "features.fields.p.buckets"),
        (num({"buckets": "1,2"}), "features.fields.p.buckets"),
        (num({"buckets": [1, 1]}), "features.fields.p.buckets[1]"),
        (num({"buckets": [2, 1]}), "features.fields.p.buckets[1]"),
        (num({"buckets": [0, math.inf]}), "features.fields.p.buckets[1]"),
        (num({"buckets": [0, True]}), "features.fields.p.buckets[1]"),
        ({**fields(), "crosses": "a"}, "features.crosses"),
        ({**fields(), "crosses": [["a"]]}, "features.crosses[0]"),
        ({**fields(), "crosses": [["a", "b", "c", "a"]]}, "features.crosses[0]"),
        ({**fields(), "crosses": [["a", "a"]]}, "features.crosses[0]"),
        ({**fields(), "crosses": [["a", "nope"]]}, "features.crosses[0][1]"),
        ({**fields(), "crosses": [["a", 3]]}, "features.crosses[0][1]"),
        ({**fields(), "crosses": [["a", "title"]]}, "features.crosses[0][1]"),
        ({**fields(), "crosses": [["a", "b"], ["b", "a"]]}, "features.crosses[1]"),
        ({"strict": "no"}, "features.strict"),
        ({"max_tokens": 0}, "features.max_tokens"),
        ({"max_tokens": 1.5}, "features.max_tokens"),
        ({"max_string_bytes": True}, "features.max_string_bytes"),
        ({"max_string_bytes": -5}, "features.max_string_bytes"),
    ],
)  # fmt: skip
def test_bad_specs_name_the_offending_option(spec: Any, path: str) -> None:
    with pytest.raises(InvalidConfig) as caught:
        FeatureSpec.from_json(spec)
    assert caught.value.path == path
    assert len(caught.value.detail) > 15


@pytest.mark.parametrize(
    ("kwargs", "path"),
    [
        ({"bits": 9}, "bits"),
        ({"bits": 29}, "bits"),
        ({"bits": True}, "bits"),
        ({"seed": -1}, "seed"),
        ({"seed": 2**32}, "seed"),
        ({"signed": 1}, "signed"),
        ({"cache_size": 0}, "cache_size"),
    ],
)
def test_bad_hasher_settings(kwargs: dict[str, Any], path: str) -> None:
    with pytest.raises(InvalidConfig) as caught:
        Hasher(**kwargs)
    assert caught.value.path == path
    with pytest.raises(InvalidConfig):
        Featurizer(FeatureSpec(), **kwargs)


def test_bits_bounds_are_accepted() -> None:
    for bits in (10, 28):
        indices, _ = Hasher(bits=bits).hash_tokens([f"w{i}" for i in range(200)])
        assert indices.max() < 2**bits


def test_spec_json_round_trips() -> None:
    raw = {
        "fields": {
            "title": {"kind": "text", "ngrams": 2, "char_ngrams": 4},
            "price": {"kind": "numeric", "log1p": True, "clip": [0, 12], "buckets": [1, 2.5]},
            "category": {"kind": "categorical"},
            "tags": {"kind": "set"},
        },
        "crosses": [["category", "tags", "price"]],
        "strict": True,
        "max_string_bytes": 1000,
        "max_tokens": 500,
    }
    spec = FeatureSpec.from_json(raw)
    again = FeatureSpec.from_json(json.loads(json.dumps(spec.to_json())))
    assert again == spec and again.to_json() == spec.to_json()
    assert spec.to_json()["fields"]["price"] == {
        "kind": "numeric",
        "log1p": True,
        "clip": [0.0, 12.0],
        "buckets": [1.0, 2.5],
    }
    inferred = FeatureSpec.from_json(None)
    assert inferred == FeatureSpec.from_json({}) == FeatureSpec.from_json(inferred.to_json())
    assert inferred.to_json() == {
        "fields": {},
        "crosses": [],
        "strict": False,
        "max_string_bytes": 65536,
        "max_tokens": 100000,
    }
