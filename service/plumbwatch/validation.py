"""Row validation for ingest: every row checked, every problem reported, nothing stored.

The checks run before any database work, in one pass per batch, and return
rows in their stored form (instants as integer microseconds, maps as canonical
JSON) so that repeats can be compared exactly: the instant to the microsecond,
probabilities as float64, segments as an unordered map, strings exactly.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, NamedTuple

import orjson

from plumbwatch.errors import Detail, InvalidInput
from plumbwatch.timefmt import fast_micros as _fast_instant
from plumbwatch.timefmt import parse_instant, to_micros

MAX_ID_LENGTH = 200
MAX_SEGMENT_VALUE_LENGTH = 200
MAX_VERSION_LENGTH = 64
DEFAULT_VERSION = "unversioned"
PREDICTION_FIELDS = frozenset(
    {"id", "predicted_at", "probability", "probabilities", "version", "segments"}
)
OUTCOME_FIELDS = frozenset({"id", "outcome", "observed_at"})
_BINARY_FIELDS = PREDICTION_FIELDS - {"probabilities"}


# Rows are named tuples, not frozen dataclasses: building one is 4x cheaper, and
# ingest builds one per row of every batch.
class PredictionRow(NamedTuple):
    position: int  # index of the row in the request, for error details
    client_id: str
    predicted_at_us: int
    probability: float | None  # binary
    probabilities: str | None  # multiclass: JSON array in declared class order
    version: str
    segments: str | None  # canonical JSON object, keys sorted; None when empty

    def same_content(self, other: PredictionRow) -> bool:
        return (
            self.predicted_at_us == other.predicted_at_us
            and self.probability == other.probability
            and self.probabilities == other.probabilities
            and self.version == other.version
            and self.segments == other.segments
        )


class OutcomeRow(NamedTuple):
    position: int
    client_id: str
    outcome: int  # binary 0/1, multiclass: index into the declared classes
    observed_at_us: int


@dataclass(frozen=True)
class ModelShape:
    """What validation needs to know about the model."""

    kind: str
    classes: tuple[str, ...]
    segment_keys: frozenset[str]


class _Problems:
    def __init__(self) -> None:
        self.details: list[Detail] = []

    def add(self, index: int | None, field: str, reason: str) -> None:
        self.details.append(Detail(field=field, reason=reason, index=index))


def _rows(body: Any, key: str) -> list[Any]:
    if not isinstance(body, dict) or not isinstance(body.get(key), list):
        raise InvalidInput(
            f'the body must be a JSON object {{"{key}": [...]}}',
            [Detail(field=key, reason="missing or not a list")],
        )
    extra = sorted(set(body) - {key})
    if extra:
        raise InvalidInput(
            "unknown top-level fields", [Detail(field=f, reason="unknown field") for f in extra]
        )
    return body[key]


def _client_id(problems: _Problems, i: int, value: Any) -> str | None:
    if not isinstance(value, str) or not value:
        problems.add(i, "id", "required: a non-empty string")
        return None
    if len(value) > MAX_ID_LENGTH:
        problems.add(i, "id", f"longer than {MAX_ID_LENGTH} characters")
        return None
    return value


def _instant(problems: _Problems, i: int, field: str, value: Any, latest_us: int) -> int | None:
    if not isinstance(value, str):
        problems.add(i, field, "required: an RFC 3339 timestamp with an offset")
        return None
    try:
        micros = to_micros(parse_instant(value))
    except (ValueError, OverflowError) as exc:
        problems.add(i, field, str(exc))
        return None
    if micros > latest_us:
        problems.add(i, field, "lies further in the future than the future_tolerance setting")
        return None
    return micros


def _probability(value: Any) -> float | None:
    """A finite JSON number within [0, 1], else None. Booleans are not numbers here."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    p = float(value)
    if not (0.0 <= p <= 1.0):  # also rejects NaN
        return None
    return p + 0.0  # -0.0 -> 0.0, so equal values store equal text


class _SegmentCache:
    """Canonical JSON of segment maps already seen in this batch (few distinct maps)."""

    def __init__(self, keys: frozenset[str]) -> None:
        self._keys = keys
        self._known: dict[tuple[tuple[Any, Any], ...], str | None] = {}

    def get(self, value: dict[Any, Any]) -> tuple[bool, str | None]:
        """(True, canonical) for a valid map; (False, None) to take the slow path."""
        try:
            items = tuple(value.items())
            return True, self._known[items]
        except KeyError:
            pass
        except TypeError:  # an unhashable value: certainly invalid, say why the slow way
            return False, None
        clean = {}
        for key, v in items:
            if key not in self._keys:
                return False, None
            if v is None:
                continue
            if type(v) is not str or not v or len(v) > MAX_SEGMENT_VALUE_LENGTH:
                return False, None
            clean[key] = v
        canonical = orjson.dumps(clean, option=orjson.OPT_SORT_KEYS).decode() if clean else None
        self._known[items] = canonical
        return True, canonical


def _fast_binary_prediction(
    i: int, item: Any, latest_us: int, segments: _SegmentCache
) -> PredictionRow | None:
    """The row, if it is a plainly valid binary prediction; None to take the slow path.

    Most rows of real batches are valid, so this path checks them with as few
    calls as possible; any doubt goes to the full checks, which word the errors.
    """
    # issuperset walks the keys without building a keys view (one allocation per row).
    if type(item) is not dict or not _BINARY_FIELDS.issuperset(item):
        return None
    client_id = item.get("id")
    if type(client_id) is not str or not 0 < len(client_id) <= MAX_ID_LENGTH:
        return None
    p = item.get("probability")
    if type(p) is float:
        if not 0.0 <= p <= 1.0:
            return None
        p += 0.0  # -0.0 -> 0.0
    elif type(p) is int and 0 <= p <= 1:
        p = float(p)
    else:
        return None
    version = item.get("version", DEFAULT_VERSION)
    if type(version) is not str or not 0 < len(version) <= MAX_VERSION_LENGTH:
        return None
    micros = _fast_instant(item.get("predicted_at"))
    if micros is None or micros > latest_us:
        return None
    seg = item.get("segments")
    canonical = None
    if seg is not None:
        if type(seg) is not dict:
            return None
        ok, canonical = segments.get(seg)
        if not ok:
            return None
    return PredictionRow(i, client_id, micros, p, None, version, canonical)


def validate_predictions(
    body: Any,
    shape: ModelShape,
    *,
    now_us: int,
    future_tolerance_us: int,
    sum_tolerance: float,
    earliest_us: int | None = None,
) -> tuple[list[PredictionRow], int]:
    """Validate a predictions body. Returns (distinct rows, repeats within the batch).

    ``earliest_us``: with a retention setting, rows predicted before it are refused:
    their raw rows would already be pruned, so storing one again would count it twice.
    Raises InvalidInput listing every bad row.
    """
    raw = _rows(body, "predictions")
    problems = _Problems()
    latest_us = now_us + future_tolerance_us
    binary = shape.kind == "binary"
    segment_cache = _SegmentCache(shape.segment_keys)
    out: list[PredictionRow] = []
    seen: dict[str, tuple[int, PredictionRow]] = {}
    repeats = 0
    for i, item in enumerate(raw):
        row = _fast_binary_prediction(i, item, latest_us, segment_cache) if binary else None
        if row is None:
            row = _checked_prediction(problems, i, item, shape, latest_us, sum_tolerance)
            if row is None:
                continue
        if earliest_us is not None and row.predicted_at_us < earliest_us:
            problems.add(i, "predicted_at", "is older than the retention_days setting keeps")
            continue
        previous = seen.get(row.client_id)
        if previous is not None:
            if not previous[1].same_content(row):
                problems.add(i, "id", f"repeats the id of row {previous[0]} with different content")
            repeats += 1
            continue
        seen[row.client_id] = (i, row)
        out.append(row)
    if problems.details:
        raise InvalidInput(_summary(problems, len(raw)), problems.details)
    return out, repeats


def _checked_prediction(
    problems: _Problems,
    i: int,
    item: Any,
    shape: ModelShape,
    latest_us: int,
    sum_tolerance: float,
) -> PredictionRow | None:
    """Every check on one row, each problem recorded; the row, or None if any failed."""
    if not isinstance(item, dict):
        problems.add(i, "", "each row must be a JSON object")
        return None
    before = len(problems.details)
    extra = item.keys() - PREDICTION_FIELDS
    for field in sorted(extra):
        problems.add(i, field, "unknown field")
    client_id = _client_id(problems, i, item.get("id"))
    predicted_at = _instant(problems, i, "predicted_at", item.get("predicted_at"), latest_us)
    probability: float | None = None
    probabilities: str | None = None
    if shape.kind == "binary":
        if "probabilities" in item:
            problems.add(i, "probabilities", "binary model: send 'probability' instead")
        probability = _probability(item.get("probability"))
        if probability is None:
            problems.add(i, "probability", "required: a finite number within [0, 1]")
    else:
        if "probability" in item:
            problems.add(i, "probability", "multiclass model: send 'probabilities' instead")
        probabilities = _class_probabilities(
            problems, i, item.get("probabilities"), shape.classes, sum_tolerance
        )
    version = item.get("version", DEFAULT_VERSION)
    if not isinstance(version, str) or not version or len(version) > MAX_VERSION_LENGTH:
        problems.add(i, "version", f"a non-empty string of at most {MAX_VERSION_LENGTH} characters")
    segments = _segments(problems, i, item.get("segments"), shape.segment_keys)
    if len(problems.details) != before:
        return None
    assert client_id is not None and predicted_at is not None
    return PredictionRow(i, client_id, predicted_at, probability, probabilities, version, segments)


def _class_probabilities(
    problems: _Problems, i: int, value: Any, classes: tuple[str, ...], tolerance: float
) -> str | None:
    if not isinstance(value, dict):
        problems.add(i, "probabilities", "required: an object mapping each class to a probability")
        return None
    missing = [c for c in classes if c not in value]
    unknown = [c for c in value if c not in classes]
    if missing or unknown:
        reason = []
        if missing:
            reason.append(f"missing classes {missing}")
        if unknown:
            reason.append(f"undeclared classes {unknown}")
        problems.add(i, "probabilities", "; ".join(reason))
        return None
    values = []
    for c in classes:
        p = _probability(value[c])
        if p is None:
            problems.add(i, f"probabilities.{c}", "a finite number within [0, 1]")
            return None
        values.append(p)
    total = math.fsum(values)
    if abs(total - 1.0) > tolerance:
        problems.add(i, "probabilities", f"sum to {total!r}, not 1 within {tolerance:g}")
        return None
    return orjson.dumps(values).decode()


def _segments(problems: _Problems, i: int, value: Any, keys: frozenset[str]) -> str | None:
    if value is None:
        return None
    if not isinstance(value, dict):
        problems.add(i, "segments", "an object mapping segment keys to string values")
        return None
    clean: dict[str, str] = {}
    for key, v in value.items():
        if key not in keys:
            allowed = ", ".join(sorted(keys)) or "none declared"
            problems.add(i, f"segments.{key}", f"undeclared segment key (declared: {allowed})")
        elif v is None:
            continue  # a null value means the row has no value for this key
        elif not isinstance(v, str) or not v or len(v) > MAX_SEGMENT_VALUE_LENGTH:
            problems.add(
                i,
                f"segments.{key}",
                f"a non-empty string of at most {MAX_SEGMENT_VALUE_LENGTH} characters",
            )
        else:
            clean[key] = v
    if not clean:
        return None
    return orjson.dumps(clean, option=orjson.OPT_SORT_KEYS).decode()


def validate_outcomes(
    body: Any, shape: ModelShape, *, now_us: int, future_tolerance_us: int
) -> tuple[list[OutcomeRow], int]:
    """Validate an outcomes body. Returns (distinct rows, repeats within the batch)."""
    raw = _rows(body, "outcomes")
    problems = _Problems()
    latest_us = now_us + future_tolerance_us
    binary = shape.kind == "binary"
    class_index = {c: k for k, c in enumerate(shape.classes)}
    out: list[OutcomeRow] = []
    seen: dict[str, tuple[int, OutcomeRow]] = {}
    repeats = 0
    for i, item in enumerate(raw):
        row = _fast_outcome(i, item, binary, class_index, now_us, latest_us)
        if row is None:
            row = _checked_outcome(problems, i, item, shape, class_index, now_us, latest_us)
            if row is None:
                continue
        previous = seen.get(row.client_id)
        if previous is not None:
            if previous[1].outcome != row.outcome:
                problems.add(i, "id", f"repeats the id of row {previous[0]} with another outcome")
            repeats += 1
            continue
        seen[row.client_id] = (i, row)
        out.append(row)
    if problems.details:
        raise InvalidInput(_summary(problems, len(raw)), problems.details)
    return out, repeats


def _fast_outcome(
    i: int, item: Any, binary: bool, class_index: dict[str, int], now_us: int, latest_us: int
) -> OutcomeRow | None:
    """The row, if it is plainly valid; None to take the full checks (as for predictions)."""
    if type(item) is not dict or not OUTCOME_FIELDS.issuperset(item):
        return None
    client_id = item.get("id")
    if type(client_id) is not str or not 0 < len(client_id) <= MAX_ID_LENGTH:
        return None
    value = item.get("outcome")
    if binary:
        if type(value) is bool:
            outcome = int(value)
        elif type(value) is int and (value == 0 or value == 1):
            outcome = value
        else:
            return None
    elif type(value) is str and value in class_index:
        outcome = class_index[value]
    else:
        return None
    observed = item.get("observed_at")
    if observed is None:
        return OutcomeRow(i, client_id, outcome, now_us)
    micros = _fast_instant(observed)
    if micros is None or micros > latest_us:
        return None
    return OutcomeRow(i, client_id, outcome, micros)


def _checked_outcome(
    problems: _Problems,
    i: int,
    item: Any,
    shape: ModelShape,
    class_index: dict[str, int],
    now_us: int,
    latest_us: int,
) -> OutcomeRow | None:
    """Every check on one outcome row, each problem recorded; the row, or None."""
    if not isinstance(item, dict):
        problems.add(i, "", "each row must be a JSON object")
        return None
    before = len(problems.details)
    for field in sorted(item.keys() - OUTCOME_FIELDS):
        problems.add(i, field, "unknown field")
    client_id = _client_id(problems, i, item.get("id"))
    value = item.get("outcome")
    outcome: int | None = None
    if shape.kind == "binary":
        if isinstance(value, bool):
            outcome = int(value)
        elif isinstance(value, int) and value in (0, 1):
            outcome = value
        else:
            problems.add(i, "outcome", "required: 0 or 1 (true/false accepted)")
    elif isinstance(value, str) and value in class_index:
        outcome = class_index[value]
    else:
        problems.add(i, "outcome", f"required: one of the classes {list(shape.classes)}")
    observed = item.get("observed_at")
    observed_at = now_us if observed is None else _fast_instant(observed)
    if observed_at is None or observed_at > latest_us:
        observed_at = _instant(problems, i, "observed_at", observed, latest_us)
    if len(problems.details) != before:
        return None
    assert client_id is not None and outcome is not None and observed_at is not None
    return OutcomeRow(i, client_id, outcome, observed_at)


def _summary(problems: _Problems, n_rows: int) -> str:
    bad_rows = {d.index for d in problems.details}
    return (
        f"{len(bad_rows)} of {n_rows} rows are invalid; nothing was stored "
        "(details list every problem)"
    )
