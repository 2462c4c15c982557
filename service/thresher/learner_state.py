"""A learner's state: its config checks, the state map snapshots carry, and its digest.

Pure, like :mod:`thresher.learner`: the state map holds the live arrays (the snapshot code copies
them before writing from a thread), and rebuilding checks every field, so a snapshot that was
altered on disk is refused with the path of what is wrong rather than loaded half-right.
"""

from __future__ import annotations

import hashlib
import math
from typing import TYPE_CHECKING, Any, TypeVar

import numpy as np

from .errors import InvalidConfig

if TYPE_CHECKING:  # pragma: no cover - typing only; learner imports this module
    from .learner import Learner

STATE_FORMAT = 1

L = TypeVar("L", bound="Learner")


def number(value: Any, path: str) -> float:
    """``value`` as a finite float, or :class:`InvalidConfig` naming ``path``."""
    if isinstance(value, bool) or not isinstance(value, int | float | np.integer | np.floating):
        raise InvalidConfig(f"must be a number, got {type(value).__name__}", path=path)
    result = float(value)
    if not math.isfinite(result):
        raise InvalidConfig("must be a finite number", path=path)
    return result


def integer_in(value: Any, path: str, lo: int, hi: int) -> int:
    """``value`` as an int in ``[lo, hi]``, or :class:`InvalidConfig` naming ``path``."""
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise InvalidConfig(f"must be an integer, got {type(value).__name__}", path=path)
    if not lo <= int(value) <= hi:
        raise InvalidConfig(f"must be between {lo} and {hi}, got {int(value)}", path=path)
    return int(value)


def state_of(learner: Learner) -> dict[str, Any]:
    """Config, counters and the live arrays of ``learner``."""
    state: dict[str, Any] = {
        "format": STATE_FORMAT,
        "n_classes": learner.n_classes,
        "bits": learner.bits,
        "rule": learner.rule,
        "margin": learner.margin,
        "aggressiveness": learner.aggressiveness,
        "updates": learner.updates,
        "seen": learner.seen,
        "weights": learner.weights_,
    }
    if learner.accum_ is not None:
        state["accum"] = learner.accum_
    return state


def rebuild(cls: type[L], state: dict[str, Any], *, copy: bool = True) -> L:
    """A ``cls`` learner equal to the one :func:`state_of` read ``state`` from."""
    if not isinstance(state, dict) or state.get("format") != STATE_FORMAT:
        raise InvalidConfig(f"learner state format must be {STATE_FORMAT}", path="format")
    try:
        learner = cls(
            state["n_classes"],
            state["bits"],
            rule=state["rule"],
            margin=state["margin"],
            aggressiveness=state["aggressiveness"],
        )
    except KeyError as missing:
        raise InvalidConfig("missing from learner state", path=str(missing.args[0])) from None
    learner.updates = integer_in(state.get("updates"), "updates", 0, 2**63 - 1)
    learner.seen = integer_in(state.get("seen"), "seen", 0, 2**63 - 1)
    shape = learner.weights_.shape
    for key in ("weights", "accum") if learner.accum_ is not None else ("weights",):
        arr = state.get(key)
        if not isinstance(arr, np.ndarray) or arr.dtype != np.float32 or arr.shape != shape:
            raise InvalidConfig(f"must be a float32 array of shape {shape}", path=key)
        if copy or not (arr.flags.c_contiguous and arr.flags.writeable):
            arr = np.array(arr, dtype=np.float32, order="C")
        setattr(learner, f"{key}_", arr)
    return learner


def digest_of(learner: Learner) -> str:
    """Hex SHA-256 of config, counters and array bytes; equal means bit-identical."""
    h = hashlib.sha256()
    header = (
        f"thresher-learner/{STATE_FORMAT}|{learner.n_classes}|{learner.bits}|{learner.rule}|"
        f"{learner.margin.hex()}|{learner.aggressiveness.hex()}|{learner.updates}|"
        f"{learner.seen}|"
    )
    h.update(header.encode())
    for arr in (learner.weights_, learner.accum_):
        if arr is not None:
            h.update(memoryview(np.ascontiguousarray(arr, dtype="<f4")).cast("B"))
    return h.hexdigest()
