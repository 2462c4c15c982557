"""Reading a ``thresher replay`` file: JSON Lines or CSV, line by line, into label items.

Each line becomes ``{"id"?, "label", "fields"}`` or a `BadLine` saying what is wrong with it,
by its line number; the replay command (`replay`) decides whether a bad line stops the run.
CSV cells that look like numbers are read as numbers, the way JSON would give them.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

from .cli_ops import EXIT_USAGE, CommandFailed, one_line

INT = re.compile(r"[-+]?(0|[1-9][0-9]*)")
FLOAT = re.compile(r"[-+]?([0-9]+\.[0-9]*|\.[0-9]+|[0-9]+)([eE][-+]?[0-9]+)?")
LEADING_ZERO = re.compile(r"[-+]?0[0-9]")  # "0042" is a code, not a number
FORMATS = {".jsonl": "jsonl", ".ndjson": "jsonl", ".json": "jsonl", ".csv": "csv"}
Item = dict[str, Any]


@dataclass(frozen=True, slots=True)
class BadLine:
    """A line that failed validation, by its 1-based line number in the file."""

    number: int
    message: str


def detect_format(path: str, given: str | None) -> str:
    fmt = given or FORMATS.get(Path(path).suffix.lower())
    if fmt is None:
        raise CommandFailed(f"cannot tell the format of {path!r} from its name; pass "
                            "--format jsonl or csv", EXIT_USAGE)  # fmt: skip
    return fmt


def read_items(
    handle: IO[bytes], fmt: str, label_field: str, id_field: str
) -> Iterator[tuple[int, Item | BadLine]]:
    """(line number, label item or the reason the line is bad), in file order."""
    if fmt == "csv":
        yield from _csv_items(handle, label_field, id_field)
        return
    for number, raw in enumerate(handle, 1):
        if number == 1 and raw.startswith(b"\xef\xbb\xbf"):
            raw = raw[3:]
        if not raw.strip():
            continue
        try:
            obj = json.loads(raw, parse_constant=_no_constant)
        except ValueError as error:
            yield number, BadLine(number, one_line(f"not valid JSON: {error}"))
            continue
        yield number, _item(obj, number, label_field, id_field)


def _no_constant(name: str) -> Any:
    raise ValueError(f"{name} is not a JSON number")


def _item(obj: Any, number: int, label_field: str, id_field: str) -> Item | BadLine:
    """``{"id"?, "label", "fields": {...}}``, or a flat object whose other keys are fields."""
    if not isinstance(obj, dict):
        return BadLine(number, "expected a JSON object with a label and the event's fields")
    nested = obj.get("fields")
    if isinstance(nested, dict) and set(obj) <= {label_field, id_field, "fields"}:
        fields = nested
    else:
        fields = {k: v for k, v in obj.items() if k not in (label_field, id_field)}
    label = obj.get(label_field)
    if label is None:
        return BadLine(number, f"no {label_field!r} field (see --label-field)")
    if not isinstance(label, str) or not label:
        return BadLine(number, f"{label_field}: the label must be a non-empty string")
    event_id = obj.get(id_field)
    if isinstance(event_id, int) and not isinstance(event_id, bool):
        event_id = str(event_id)  # exports often number their rows
    if event_id is not None and (not isinstance(event_id, str) or not 0 < len(event_id) <= 256):
        return BadLine(number, f"{id_field}: the id must be a string of 1 to 256 characters")
    item: Item = {"label": label, "fields": fields}
    if event_id is not None:
        item["id"] = event_id
    return item


def _csv_items(
    handle: IO[bytes], label_field: str, id_field: str
) -> Iterator[tuple[int, Item | BadLine]]:
    text = io.TextIOWrapper(handle, encoding="utf-8-sig", newline="")
    reader = csv.reader(text)
    try:
        header = next(reader, None)
        if header is None:
            return
        if label_field not in header:
            raise CommandFailed(f"the CSV header has no {label_field!r} column (it has "
                                f"{', '.join(header)}); pass --label-field")  # fmt: skip
        if len(set(header)) != len(header):
            raise CommandFailed("the CSV header names a column twice")
        for row in reader:
            number = reader.line_num
            if not any(cell.strip() for cell in row):
                continue
            if len(row) != len(header):
                yield number, BadLine(number, f"{len(row)} cells, the header has {len(header)}")
                continue
            obj: dict[str, Any] = {}
            for name, cell in zip(header, row, strict=True):
                if name == label_field or (name == id_field and cell):
                    obj[name] = cell
                elif name != id_field and cell != "":  # an empty cell is a missing field
                    obj[name] = cell_value(cell)
            yield number, _item(obj, number, label_field, id_field)
    except UnicodeDecodeError:
        raise CommandFailed(f"line {reader.line_num + 1}: the file is not UTF-8 text") from None
    except csv.Error as error:
        raise CommandFailed(f"line {reader.line_num}: {error}") from None
    finally:
        text.detach()


def cell_value(cell: str) -> Any:
    """A CSV cell as a number when it looks like one, else the text."""
    if LEADING_ZERO.match(cell):
        return cell
    if INT.fullmatch(cell):
        return int(cell)
    if FLOAT.fullmatch(cell):
        value = float(cell)
        if math.isfinite(value):
            return value
    return cell


def check_label(item: Item, classes: tuple[str, ...]) -> str | None:
    if classes and item["label"] not in classes:
        return f"label {item['label']!r} is not one of {', '.join(map(repr, classes))}"
    return None
