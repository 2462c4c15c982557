"""The recent mistakes of a model, each explained by the tokens that weighed most in it.

:class:`Mistakes` is the part of :class:`~thresher.models.Model` that keeps the last
RECENT_MISTAKES mistakes its learning made (`applying`) and works out their top tokens with the
served weights each prediction was made with. A batch leaves that work until the mistakes are
first read: most are pushed out by later ones before anyone looks.
"""

from __future__ import annotations

from collections import deque
from typing import TYPE_CHECKING, Any, NamedTuple

import numpy as np

from . import records
from .errors import InvalidEvent
from .features import Featurizer, SparseRow

if TYPE_CHECKING:
    from .models import ModelConfig

RECENT_MISTAKES = 50


class Unexplained(NamedTuple):
    """A recent mistake whose top tokens are worked out when they are first read."""

    entry: dict[str, Any]
    record: dict[str, Any]  # its fields may still be packed (`records.fields`)
    row: SparseRow
    before: np.ndarray  # (rows, nnz) served weights behind the prediction
    predicted: int


class Mistakes:
    """Recent mistakes of a model; its state is set up by ``Model.__init__``."""

    config: ModelConfig
    featurizer: Featurizer
    _recent: deque[dict[str, Any]]
    _unexplained: deque[Unexplained]

    @property
    def recent_mistakes(self) -> deque[dict[str, Any]]:
        """The last RECENT_MISTAKES mistakes, newest first, each with its top tokens.

        A batch leaves its mistakes' tokens to be worked out here, when they are first read:
        most are pushed out by later mistakes before anyone looks (a replay makes thousands).
        """
        if self._unexplained:
            shown = {id(entry) for entry in self._recent}
            for entry, record, row, before, predicted in self._unexplained:
                if id(entry) in shown:
                    entry["top"] = self._explain_before(record, row, before, predicted)
            self._unexplained.clear()
        return self._recent

    @recent_mistakes.setter
    def recent_mistakes(self, entries: deque[dict[str, Any]]) -> None:
        self._recent = entries
        self._unexplained = deque(maxlen=entries.maxlen)

    def _explain_before(
        self, record: dict[str, Any], row: Any, before: np.ndarray, predicted: int
    ) -> list[dict[str, Any]]:
        """Top tokens of a mistaken prediction, by |weight x value| under the weights used."""
        weights = before[predicted if before.shape[0] > 1 else 0]
        values = np.asarray(row.values, dtype=np.float64)
        contrib = weights * values
        order = np.lexsort((row.indices, -np.abs(contrib)))
        order = order[contrib[order] != 0][:5]
        if order.size == 0:
            return []
        try:
            fields = records.fields(record)
            _, tokens = self.featurizer.transform_with_tokens(fields, path="fields")
        except (InvalidEvent, records.CorruptRecord):  # a foreign or damaged record: no names
            return []
        names: dict[int, str] = {}
        for token, index, _value in tokens:
            names.setdefault(int(index), token)
        return [
            {
                "token": names.get(int(row.indices[i]), f"#{int(row.indices[i])}"),
                "weight": float(weights[i]),
                "value": float(values[i]),
                "contribution": float(contrib[i]),
            }
            for i in order
        ]

    def _mistake_entry(
        self, record: dict[str, Any], predicted: int, margins: Any, top: list[dict[str, Any]]
    ) -> dict[str, Any]:
        predicted = int(predicted)
        margins = np.asarray(margins, dtype=np.float64)
        margin = float(margins[predicted] if margins.size > 1 else margins[0])
        return {
            "id": record.get("id"),
            "label": record["label"],
            "predicted": self.config.classes[predicted],
            "margin": margin,
            "source": record["source"],
            "time": record.get("time"),
            "top": top,
        }
