"""Rows in, JSON bytes out: dicts as the API spells them, or pandas DataFrames.

Dict rows are sent as they are (the API's shape: nested ``segments`` and, for
multiclass, ``probabilities``); datetimes and numpy scalars are converted while
encoding, so the common case costs one ``json.dumps``. DataFrames may also use
the flat column names of the CSV format (``segment.<key>``,
``probability.<class>``); pandas is never imported here, only recognised.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Iterator
from datetime import UTC, datetime
from itertools import islice
from typing import Any

from plumbwatch.client._errors import RowError

SEGMENT_PREFIX = "segment."
PROBABILITY_PREFIX = "probability."


def instant_text(value: datetime) -> str:
    """RFC 3339 in UTC with a ``Z``; a naive datetime is refused (its zone is unknown)."""
    if value.tzinfo is None or value.utcoffset() is None:
        raise ValueError(
            f"naive datetime {value.isoformat()}: give it a time zone (plumbwatch refuses "
            "times without an offset)"
        )
    utc = value.astimezone(UTC)
    # Whole seconds stay short; anything finer is kept to the microsecond, which is
    # what the server stores (pandas' nanoseconds would be refused).
    spec = "seconds" if utc.microsecond == 0 else "microseconds"
    return utc.replace(tzinfo=None).isoformat(timespec=spec) + "Z"


def _json_default(value: Any) -> Any:
    if isinstance(value, datetime):
        return instant_text(value)
    item = getattr(value, "item", None)  # numpy scalars
    if callable(item) and type(value).__module__ == "numpy":
        return item()
    raise TypeError(f"{type(value).__name__} {value!r} cannot be sent as JSON")


def encode(key: str, rows: list[Any]) -> bytes:
    """The request body ``{key: rows}``; RowError names the first row that cannot be encoded."""
    try:
        text = json.dumps(
            {key: rows}, separators=(",", ":"), default=_json_default, allow_nan=False
        )
    except (TypeError, ValueError):
        _raise_for_bad_row(rows)
        raise
    return text.encode()


def _raise_for_bad_row(rows: list[Any]) -> None:
    # The slow path, only after the fast one failed: find the row and field to name.
    for i, row in enumerate(rows):
        fields = row.items() if isinstance(row, dict) else [("", row)]
        for field, value in fields:
            try:
                json.dumps(value, default=_json_default, allow_nan=False)
            except ValueError as exc:
                reason = "NaN or infinity is not a JSON number" if "JSON" in str(exc) else str(exc)
                raise RowError(i, str(field), reason) from None
            except TypeError as exc:
                raise RowError(i, str(field), str(exc)) from None


def is_dataframe(data: Any) -> bool:
    return type(data).__module__.startswith("pandas") and hasattr(data, "to_dict")


def _missing(value: Any) -> bool:
    if value is None:
        return True
    try:
        return bool(value != value)  # NaN, NaT, pd.NA (which raises, see below)
    except TypeError:
        return True  # pd.NA refuses truth testing: it is missing
    except ValueError:
        return False  # an array: a value, not a missing one


def dataframe_rows(frame: Any) -> Iterator[dict[str, Any]]:
    """Rows of a DataFrame in the API's shape; flat CSV-style columns are nested."""
    columns = [str(c) for c in frame.columns]
    for position, column in enumerate(columns):
        dtype = frame.dtypes.iloc[position]
        if str(dtype).startswith("datetime64") and getattr(dtype, "tz", None) is None:
            raise RowError(
                0,
                column,
                "naive timestamps: localize the column first, e.g. "
                "frame[col].dt.tz_localize('UTC')",
            )
    segment_cols = [c for c in columns if c.startswith(SEGMENT_PREFIX)]
    probability_cols = [c for c in columns if c.startswith(PROBABILITY_PREFIX)]
    plain_cols = [c for c in columns if c not in segment_cols and c not in probability_cols]
    for values in frame.itertuples(index=False, name=None):
        record = dict(zip(columns, values, strict=True))
        row: dict[str, Any] = {}
        for c in plain_cols:
            value = record[c]
            if not _missing(value):
                row[c] = value
        if segment_cols:
            segments = dict(row.get("segments") or {})
            for c in segment_cols:
                value = record[c]
                if not _missing(value) and value != "":
                    segments[c[len(SEGMENT_PREFIX) :]] = str(value)
            if segments:
                row["segments"] = segments
        if probability_cols:
            row["probabilities"] = {
                c[len(PROBABILITY_PREFIX) :]: (None if _missing(record[c]) else record[c])
                for c in probability_cols
            }
        yield row


def as_rows(data: Any) -> Iterable[Any]:
    """Any supported input as an iterable of row dicts."""
    if is_dataframe(data):
        return dataframe_rows(data)
    if isinstance(data, dict):
        raise TypeError("pass a list (or any iterable) of row dicts, or a DataFrame, not one dict")
    return data


def chunks(rows: Iterable[Any], size: int) -> Iterator[list[Any]]:
    iterator = iter(rows)
    while batch := list(islice(iterator, size)):
        yield batch
