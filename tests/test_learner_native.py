"""The compiled scoring kernel (thresher._learner) against the numpy path it must equal.

The numpy kernels are checked against scikit-learn and a naive reference in test_learner.py;
here ``Learner.score_batch`` with the kernel is held to the same call with ``native = False``:
bit-identical labels and margins on every rule and class count, and the same InvalidInput for
every malformed batch.
"""

from __future__ import annotations

import os
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from thresher import learner as learner_module
from thresher.errors import InvalidInput
from thresher.learner import Learner

if learner_module._learner is None:
    if os.environ.get("CI"):
        pytest.fail("thresher._learner is not built; pip install the package", pytrace=False)
    pytest.skip("thresher._learner is not built", allow_module_level=True)

BITS = 12


def random_batch(
    rng: np.random.Generator, rows: int, f64: bool = False, spread: float = 2.0
) -> tuple[Any, ...]:
    """A CSR batch of ``rows`` random rows (0-29 nonzeros), values scaled by 10**±spread."""
    lengths = rng.integers(0, 30, rows)
    indptr = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    indices = np.concatenate(
        [np.sort(rng.choice(1 << BITS, k, replace=False)) for k in lengths] or [[]]
    ).astype(np.int64)
    values = (rng.normal(size=indices.size) * 10 ** rng.uniform(-spread, spread)).astype(
        np.float64 if f64 else np.float32
    )
    return indptr, indices, values


def trained(rule: str, n_classes: int, seed: int) -> Learner:
    """A learner taught a few hundred random rows, so weights (and u) are far from zero."""
    rng = np.random.default_rng(seed)
    margin = 0.5 if rule == "margin" else 0.0
    model = Learner(n_classes, BITS, rule=rule, margin=margin)
    model.update_batch(*random_batch(rng, 300, spread=0.0), rng.integers(0, n_classes, 300))
    return model


def both(model: Learner, *batch: Any) -> tuple[Any, Any]:
    def run(native: bool) -> Any:
        model.native = native
        try:
            labels, margins = model.score_batch(*batch)
        except InvalidInput as error:
            return ("error", str(error), error.path)
        return (labels.dtype.str, labels.tolist(), margins.dtype.str, margins.shape,
                margins.tobytes())  # fmt: skip

    try:
        return run(True), run(False)
    finally:
        model.native = True


@pytest.mark.parametrize("rule", ["classic", "margin", "averaged", "passive_aggressive"])
@pytest.mark.parametrize("n_classes", [2, 5])
@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**16), rows=st.integers(0, 40), f64=st.booleans())
def test_margins_are_bit_identical(
    rule: str, n_classes: int, seed: int, rows: int, f64: bool
) -> None:
    model = trained(rule, n_classes, seed % 7)
    rng = np.random.default_rng(seed)
    native, reference = both(model, *random_batch(rng, rows, f64, spread=3.0))
    assert native == reference


@pytest.mark.parametrize(
    "batch",
    [
        ([0, 2], [5, 3], [1.0, 1.0]),  # not sorted within a row
        ([0, 2], [5, 5], [1.0, 1.0]),  # repeated index
        ([0, 1], [1 << BITS], [1.0]),  # out of range
        ([0, 1], [-1], [1.0]),
        ([0, 1], [3], [np.inf]),
        ([0, 1], [3], [np.nan]),
        ([0, 2, 1], [3, 4], [1.0, 1.0]),  # indptr falls
        ([1, 2], [3, 4], [1.0, 1.0]),  # indptr does not start at 0
        ([0, 3], [3, 4], [1.0, 1.0]),  # indptr passes the nonzeros
        ([0, 1], [3], [1.0, 2.0]),  # values longer than indices
    ],
)
def test_bad_batches_get_the_numpy_error(batch: tuple[list[Any], ...]) -> None:
    model = trained("averaged", 2, 1)
    arrays = (
        np.array(batch[0], np.int64),
        np.array(batch[1], np.int64),
        np.array(batch[2], np.float32),
    )
    native, reference = both(model, *arrays)
    assert reference[0] == "error"
    assert native == reference


def test_other_dtypes_take_the_numpy_path() -> None:
    model = trained("classic", 3, 2)
    batch = ([0, 2], [3, 9], [1, 2])  # plain lists of Python ints
    native, reference = both(model, *batch)
    assert native == reference and native[0] != "error"
    int32 = (np.array([0, 2], np.int32), np.array([3, 9], np.int32), np.ones(2, np.float32))
    native, reference = both(model, *int32)
    assert native == reference and native[0] != "error"


def test_a_nan_margin_ranks_as_numpy_does() -> None:
    # Weights can overflow to inf under extreme values; inf - inf margins are NaN, which numpy's
    # argmax ranks first and the binary threshold calls negative.
    for n_classes in (2, 4):
        model = Learner(n_classes, BITS)
        model.weights_[:, 7] = np.inf
        model.weights_[-1, 8] = -np.inf
        model.weights_[0, 8] = -np.inf
        native, reference = both(model, [0, 2], np.array([7, 8], np.int64), np.ones(2, np.float32))
        assert native == reference


def learned(model: Learner) -> tuple[Any, ...]:
    accum = None if model.accum_ is None else model.accum_.tobytes()
    return model.weights_.tobytes(), accum, model.seen, model.updates, model.digest()


@pytest.mark.parametrize("rule", ["classic", "margin", "averaged", "passive_aggressive"])
@pytest.mark.parametrize("n_classes", [2, 4])
@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**16), rows=st.integers(0, 60), f64=st.booleans())
def test_update_batch_is_bit_identical(
    rule: str, n_classes: int, seed: int, rows: int, f64: bool
) -> None:
    native, reference = trained(rule, n_classes, seed % 5), trained(rule, n_classes, seed % 5)
    reference.native = False
    rng = np.random.default_rng(seed)
    for _ in range(3):  # several batches, so later ones start from learned weights
        batch = random_batch(rng, rows, f64)
        ys = rng.integers(0, n_classes, rows)
        a = native.update_batch(*batch, ys)
        b = reference.update_batch(*batch, ys)
        for x, y in zip(a, b, strict=True):
            assert x.dtype == y.dtype and x.tobytes() == y.tobytes()
        assert learned(native) == learned(reference)


@pytest.mark.parametrize("rule", ["classic", "margin", "averaged", "passive_aggressive"])
@pytest.mark.parametrize("n_classes", [2, 3])
def test_update_one_row_is_bit_identical(rule: str, n_classes: int) -> None:
    native, reference = trained(rule, n_classes, 3), trained(rule, n_classes, 3)
    reference.native = False
    rng = np.random.default_rng(11)
    for _ in range(200):
        _, indices, values = random_batch(rng, 1)
        y = int(rng.integers(0, n_classes))
        a, b = native.update(indices, values, y), reference.update(indices, values, y)
        assert (a.predicted, a.mistake, a.updated) == (b.predicted, b.mistake, b.updated)
        assert a.margins.tobytes() == b.margins.tobytes()
    assert learned(native) == learned(reference)


@pytest.mark.parametrize(
    "ys", [[0, 2], [0, -1], [True, False], [0.0, 1.0], [0]], ids=["range", "neg", "bool", "f", "n"]
)
def test_bad_labels_get_the_numpy_error_and_change_nothing(ys: list[Any]) -> None:
    model = trained("averaged", 2, 4)
    before = learned(model)
    batch = (np.array([0, 1, 2], np.int64), np.array([3, 4], np.int64), np.ones(2, np.float32))
    errors = []
    for native in (True, False):
        model.native = native
        with pytest.raises(InvalidInput) as caught:
            model.update_batch(*batch, np.asarray(ys))
        errors.append((str(caught.value), caught.value.path))
        assert learned(model) == before
    assert errors[0] == errors[1]


def test_a_malformed_batch_changes_nothing() -> None:
    model = trained("classic", 3, 4)
    before = learned(model)
    # The second row is unsorted: the kernel must refuse before learning from the first.
    batch = (np.array([0, 1, 3], np.int64), np.array([3, 9, 4], np.int64), np.ones(3, np.float32))
    with pytest.raises(InvalidInput):
        model.update_batch(*batch, np.array([0, 1]))
    assert learned(model) == before


@pytest.mark.parametrize("rule", ["classic", "margin", "averaged", "passive_aggressive"])
@pytest.mark.parametrize("n_classes", [2, 3])
def test_weights_behind_each_prediction_are_bit_identical(rule: str, n_classes: int) -> None:
    native, reference = trained(rule, n_classes, 6), trained(rule, n_classes, 6)
    reference.native = False
    rng = np.random.default_rng(8)
    for rows in (0, 1, 50, 200):
        batch = random_batch(rng, rows)
        ys = rng.integers(0, n_classes, rows)
        a, before_a = native.update_batch_explained(*batch, ys)
        b, before_b = reference.update_batch_explained(*batch, ys)
        for x, y in zip(a, b, strict=True):
            assert x.dtype == y.dtype and x.tobytes() == y.tobytes()
        assert before_a.shape == before_b.shape == (model_rows(n_classes), batch[1].size)
        assert before_a.tobytes() == before_b.tobytes()
        assert learned(native) == learned(reference)
    # and the explained call learns exactly what update_batch learns
    plain = trained(rule, n_classes, 6)
    rng = np.random.default_rng(8)
    for rows in (0, 1, 50, 200):
        batch = random_batch(rng, rows)
        plain.update_batch(*batch, rng.integers(0, n_classes, rows))
    assert learned(plain) == learned(native)


def model_rows(n_classes: int) -> int:
    return 1 if n_classes == 2 else n_classes
