"""Reading rows for ``plumbwatch load``: CSV, JSON lines and Parquet, streamed.

Every reader yields :class:`Line` items: where the row is in the file (a line
number for CSV and JSON lines, counting the header as line 1; a row number for
Parquet) and either the row in the API's shape or the reason it could not be
read. Values are converted only where the file format cannot say the type
(CSV text); anything that does not convert is passed on as it is, so that the
server's validation words the problem, exactly as it would for a direct call.
"""

from __future__ import annotations

import csv
import json
import os
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

PREDICTION_COLUMNS = frozenset({"id", "predicted_at", "probability", "version"})
OUTCOME_COLUMNS = frozenset({"id", "outcome", "observed_at"})
FORMATS = ("csv", "jsonl", "parquet")
_SUFFIXES = {
    ".csv": "csv",
    ".jsonl": "jsonl",
    ".ndjson": "jsonl",
    ".json": "jsonl",
    ".parquet": "parquet",
    ".pq": "parquet",
}


class FileProblem(ValueError):
    """The file as a whole cannot be loaded (unknown format or columns, no pyarrow)."""


@dataclass(frozen=True)
class Line:
    where: int  # line number (CSV, JSON lines) or row number (Parquet), 1-based
    row: dict[str, Any] | None
    problem: str | None = None


def detect_format(path: Path, given: str | None) -> str:
    if given:
        return given
    found = _SUFFIXES.get(path.suffix.lower())
    if found is None:
        raise FileProblem(
            f"cannot tell the format of {path.name} from its suffix: pass --format "
            f"({', '.join(FORMATS)})"
        )
    return found


def check_columns(kind: str, columns: list[str]) -> None:
    """Refuse unknown column names up front: one typo would otherwise reject every row."""
    allowed = PREDICTION_COLUMNS if kind == "predictions" else OUTCOME_COLUMNS
    prefixes = ("segment.", "probability.") if kind == "predictions" else ()
    unknown = [c for c in columns if c not in allowed and not c.startswith(prefixes)]
    if unknown:
        expected = sorted(allowed) + ([f"{p}<name>" for p in prefixes] if prefixes else [])
        raise FileProblem(f"unknown columns {unknown}; {kind} files have {', '.join(expected)}")
    if "id" not in columns:
        raise FileProblem(f"the file has no 'id' column (columns: {', '.join(columns)})")


def _number(text: Any) -> Any:
    if not isinstance(text, str):
        return text
    try:
        return float(text)
    except ValueError:
        return text  # the server says why


_BINARY = {"0": 0, "1": 1, "true": True, "false": False}


def shape_row(flat: dict[str, Any], *, text: bool, binary: bool | None) -> dict[str, Any]:
    """A row of flat columns (CSV style) in the API's shape.

    ``text``: values are CSV strings (empty means absent). ``binary``: the model's
    kind when known; None guesses from the value (0/1/true/false are binary).
    """
    row: dict[str, Any] = {}
    segments: dict[str, Any] = dict(flat.get("segments") or {})
    probabilities: dict[str, Any] = dict(flat.get("probabilities") or {})
    for key, value in flat.items():
        if key in ("segments", "probabilities"):
            continue
        if value is None or (text and value == ""):
            continue
        if key.startswith("segment."):
            segments[key[len("segment.") :]] = value
        elif key.startswith("probability."):
            probabilities[key[len("probability.") :]] = _number(value) if text else value
        elif key == "probability" and text:
            row[key] = _number(value)
        elif key == "outcome" and isinstance(value, str) and binary is not False:
            row[key] = _BINARY.get(value.strip().lower(), value)
        elif isinstance(value, datetime):
            row[key] = value  # the client converts aware datetimes and refuses naive ones
        else:
            row[key] = value
    if segments:
        row["segments"] = segments
    if probabilities:
        row["probabilities"] = probabilities
    return row


class Source:
    """One file, read in order; ``position`` and ``size`` drive the progress bar."""

    def __init__(self, path: Path, fmt: str, kind: str, *, binary: bool | None) -> None:
        self.path = path
        self.format = fmt
        self.kind = kind
        self.binary = binary
        self.size = path.stat().st_size
        self.position = 0

    def lines(self) -> Iterator[Line]:
        if self.format == "csv":
            return self._csv()
        if self.format == "jsonl":
            return self._jsonl()
        if self.format == "parquet":
            return self._parquet()
        raise FileProblem(f"unknown format {self.format!r}; use one of {', '.join(FORMATS)}")

    def _csv(self) -> Iterator[Line]:
        with self.path.open(newline="", encoding="utf-8-sig") as handle:
            reader = csv.reader(handle)
            header = next(reader, None)
            if header is None:
                return
            check_columns(self.kind, header)
            start = reader.line_num + 1
            for values in reader:
                self.position = os.lseek(handle.fileno(), 0, os.SEEK_CUR)
                where, start = start, reader.line_num + 1
                if not values or values == [""]:
                    continue  # a blank line
                if len(values) != len(header):
                    yield Line(
                        where,
                        None,
                        f"{len(values)} fields where the header has {len(header)}",
                    )
                    continue
                flat = dict(zip(header, values, strict=True))
                yield Line(where, shape_row(flat, text=True, binary=self.binary))
        self.position = self.size

    def _jsonl(self) -> Iterator[Line]:
        with self.path.open("rb") as handle:
            for number, raw in enumerate(handle, start=1):
                self.position += len(raw)
                if not raw.strip():
                    continue
                try:
                    value = json.loads(raw)
                except ValueError as exc:
                    yield Line(number, None, f"not valid JSON: {exc}")
                    continue
                if not isinstance(value, dict):
                    yield Line(number, None, "each line must be a JSON object")
                    continue
                yield Line(number, shape_row(value, text=False, binary=self.binary))

    def _parquet(self) -> Iterator[Line]:
        try:
            import pyarrow.parquet as pq
        except ImportError:
            raise FileProblem(
                "reading Parquet needs pyarrow: pip install 'plumbwatch[parquet]'"
            ) from None
        parquet = pq.ParquetFile(self.path)
        check_columns(self.kind, list(parquet.schema_arrow.names))
        total = max(parquet.metadata.num_rows, 1)
        number = 0
        for batch in parquet.iter_batches(batch_size=10_000):
            for flat in batch.to_pylist():
                number += 1
                problem = _naive_time(flat)
                if problem:
                    yield Line(number, None, problem)
                    continue
                yield Line(number, shape_row(flat, text=False, binary=self.binary))
            self.position = int(self.size * number / total)


def _naive_time(flat: dict[str, Any]) -> str | None:
    for key, value in flat.items():
        if isinstance(value, datetime) and value.tzinfo is None:
            return f"{key}: a timestamp without a time zone (store it as UTC in the file)"
    return None
