"""The compiled featurizer (thresher._featurize) against the Python path it must equal.

The Python path in features.py / field_tokens.py is checked against outside references in
test_features.py (SMHasher's verification value, scikit-learn's FeatureHasher); here the
compiled kernel is held to it: on generated specs and events, including every kind of bad
input, both give bit-identical rows or the same error with the same path.
"""

from __future__ import annotations

import math
import os
from typing import Any

import mmh3
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from thresher import features
from thresher.demo_traffic import DEMO_SPEC, ListingTraffic
from thresher.errors import InvalidEvent
from thresher.features import FeatureSpec, Featurizer

if features._featurize is None:  # a source tree that was never built
    if os.environ.get("CI"):
        pytest.fail("thresher._featurize is not built; pip install the package", pytrace=False)
    pytest.skip("thresher._featurize is not built", allow_module_level=True)

from thresher._featurize import murmur3_32


def test_murmur3_smhasher_verification_value() -> None:
    # SMHasher's VerificationTest for MurmurHash3_x86_32 (Appleby): hash keys [0], [0,1], ...
    # [0..254] with seed 256 - i, hash the 256 concatenated little-endian results with seed 0;
    # the expected 0xB0F57EE3 is from memory (also checked on mmh3 in test_features.py).
    key = bytearray()
    hashes = bytearray()
    for i in range(256):
        hashes += murmur3_32(bytes(key), 256 - i).to_bytes(4, "little")
        key.append(i)
    assert murmur3_32(bytes(hashes), 0) == 0xB0F57EE3


def test_murmur3_hello_world_seed_1234() -> None:
    # "Hello, world!" with seed 1234 -> 0xFAF6CDB3 (from memory; a common MurmurHash3 check).
    assert murmur3_32(b"Hello, world!", 1234) == 0xFAF6CDB3


@given(st.binary(max_size=64), st.integers(0, 2**32 - 1))
def test_murmur3_equals_mmh3(data: bytes, seed: int) -> None:
    # mmh3 (the registry's MurmurHash3 binding) is the reference the Python path hashes with.
    assert murmur3_32(data, seed) == mmh3.hash(data, seed, signed=False)


def pair(spec: FeatureSpec, bits: int = 16, seed: int = 0, signed: bool = True) -> Any:
    native = Featurizer(spec, bits, seed, signed)
    python = Featurizer(spec, bits, seed, signed, native=False)
    assert native._native is not None and python._native is None
    return native, python


def outcome(call: Any) -> Any:
    try:
        made = call()
    except InvalidEvent as error:
        return ("error", str(error), error.path)
    return ("ok", [(np.asarray(a).dtype.str, np.asarray(a).tolist()) for a in made])


def same(native: Featurizer, python: Featurizer, events: list[Any]) -> None:
    for i, fields in enumerate(events):
        a = outcome(lambda f=fields, i=i: native.transform(f, path=f"e{i}"))
        b = outcome(lambda f=fields, i=i: python.transform(f, path=f"e{i}"))
        assert a == b, fields
    a = outcome(lambda: native.transform_batch(events))
    b = outcome(lambda: python.transform_batch(events))
    assert a == b


# -- generated specs and events -------------------------------------------------------------

# Letters whose lower case grows, digits of other scripts, combining marks, an emoji, a lone
# surrogate, separators: the corners of str.lower() and re's \w.
ODD = "AzÉßİΣσςẞǅⅫ٣²_-' \t.,!é\u0301\u00a0😀\ud800中文Ωω"
texts = st.text(alphabet=st.sampled_from(ODD + "abcXYZ019 "), max_size=40)
names = st.sampled_from(["a", "b", "c", "text", "Émile", "n", "s", "x y", "z_9"])
numbers = st.one_of(
    st.integers(-(2**70), 2**70),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0.0, -0.0, 1.0, 2.5, 1e30, 1e31, -1e300, 2.0**53, 2.0**53 + 2, 3.0]),
)
scalars = st.one_of(st.none(), st.booleans(), numbers, texts)
values = st.one_of(scalars, st.lists(st.one_of(texts, numbers), max_size=6), st.just({"k": 1}))
events = st.dictionaries(names, values, max_size=6)


@st.composite
def specs(draw: Any) -> FeatureSpec:
    chosen = draw(st.lists(names, unique=True, max_size=5))
    fields: dict[str, Any] = {}
    for name in chosen:
        kind = draw(st.sampled_from(["categorical", "text", "numeric", "set"]))
        opts: dict[str, Any] = {"kind": kind}
        if kind == "text":
            opts["ngrams"] = draw(st.integers(1, 3))
            opts["char_ngrams"] = draw(st.sampled_from([0, 2, 3, 5]))
        elif kind == "numeric":
            opts["log1p"] = draw(st.booleans())
            if draw(st.booleans()):
                opts["clip"] = [-5.0, 50.0]
            if draw(st.booleans()):
                opts["buckets"] = [-1.0, 0.5, 2.0, 10.0]
        fields[name] = opts
    crossable = [n for n in chosen if fields[n]["kind"] != "text"]
    crosses = []
    if len(crossable) >= 2 and draw(st.booleans()):
        crosses.append(crossable[:2])
    if len(crossable) >= 3 and draw(st.booleans()):
        crosses.append(crossable[:3])
    return FeatureSpec.from_json(
        {
            "fields": fields,
            "crosses": crosses,
            "strict": draw(st.booleans()),
            "max_string_bytes": draw(st.sampled_from([8, 65536])),
            "max_tokens": draw(st.sampled_from([12, 100000])),
        }
    )


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(specs(), st.lists(events, max_size=5), st.integers(10, 20), st.booleans())
def test_generated_events_match_the_python_path(
    spec: FeatureSpec, batch: list[dict[str, Any]], bits: int, signed: bool
) -> None:
    native, python = pair(spec, bits, seed=bits * 7919, signed=signed)
    same(native, python, batch)


@settings(max_examples=150, deadline=None)
@given(st.lists(events, max_size=5))
def test_inferred_kinds_match_the_python_path(batch: list[dict[str, Any]]) -> None:
    native, python = pair(FeatureSpec(), 18, seed=3)
    same(native, python, batch)


# -- named corners ------------------------------------------------------------------------

TEXT_SPEC = FeatureSpec.from_json(
    {"fields": {"t": {"kind": "text", "ngrams": 3, "char_ngrams": 3}}, "max_tokens": 100000}
)


@pytest.mark.parametrize(
    "text",
    [
        "",
        "   ",
        "a",
        "ab",
        "Hello, WORLD hello",
        "İstanbul ẞtraße ǅemal",  # lower() changes length and case-folds digraphs
        "naïve café — cafe\u0301",  # a combining mark is \w (category Mn is not; see re)
        "x²³ ٣٤ Ⅻ",  # superscripts, Arabic-Indic digits, a Roman numeral
        "emoji😀word under_score",
        "bad\ud800surrogate",  # a lone surrogate is not \w, so it only separates words
        "tab\tnew\nline",
    ],
)
def test_text_corners(text: str) -> None:
    native, python = pair(TEXT_SPEC)
    assert native._native.row({"t": text}) is not None  # handled by the kernel, not handed back
    same(native, python, [{"t": text}])


def test_errors_keep_the_python_path_and_batch_index() -> None:
    spec = FeatureSpec.from_json(
        {"fields": {"p": {"kind": "numeric", "log1p": True}, "c": {"kind": "categorical"}}}
    )
    native, python = pair(spec)
    bad = [
        {"p": 1.0, "c": "ok"},
        {"p": -1.0},  # log1p of a negative
        {"p": math.nan},
        {"c": 1.5},  # a non-integral categorical
        {"c": {"nested": 1}},
        {"extra": {"nested": 1}},
        {"c": "bad\ud800"},  # a lone surrogate inside a token
    ]
    for fields in bad:
        same(native, python, [{"p": 2.0}, fields])
    with pytest.raises(InvalidEvent) as caught:
        native.transform_batch([{"p": 2.0}, {"p": -1.0}], path="events")
    assert caught.value.path == "events[1].fields.p"


def test_non_dict_mappings_and_subclasses_take_the_python_path() -> None:
    class Text(str):
        pass

    native, python = pair(FeatureSpec.from_json(DEMO_SPEC), 20, seed=7)
    from types import MappingProxyType

    events: list[Any] = [
        MappingProxyType({"title": "red bike", "price": 10}),
        {"title": Text("Red Bike"), "category": Text("bikes")},
        {"tags": ("a", "b", "a")},
        {"price": True},
        {"price": 10**400},
    ]
    same(native, python, events)


def test_demo_traffic_rows_are_bit_identical() -> None:
    traffic = ListingTraffic(seed=5, shift_at=500)
    batch = [traffic.next_event()[1] for _ in range(3000)]
    native, python = pair(FeatureSpec.from_json(DEMO_SPEC), 20, seed=7)
    assert all(native._native.row(fields) is not None for fields in batch)
    a, b = native.transform_batch(batch), python.transform_batch(batch)
    for x, y in zip(a, b, strict=True):
        assert x.dtype == y.dtype
        assert np.array_equal(x, y)


def test_batch_outputs_are_writable_arrays() -> None:
    native, _ = pair(TEXT_SPEC)
    batch = native.transform_batch([{"t": "a b"}, {"t": ""}])
    assert batch.indptr.tolist()[0] == 0 and batch.indptr.size == 3
    assert all(arr.flags.writeable for arr in batch)
    empty = native.transform_batch([])
    assert empty.indptr.tolist() == [0] and empty.indices.size == 0
