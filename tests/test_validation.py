"""The fast path of ingest validation agrees with the full checks.

validation.py checks plainly valid rows with a short path and sends anything
else through the full checks; these properties pin that the short path never
accepts what the full checks refuse, nor stores a different value.
"""

from __future__ import annotations

from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from plumbwatch.timefmt import parse_instant, to_micros
from plumbwatch.validation import (
    ModelShape,
    _checked_outcome,
    _checked_prediction,
    _fast_binary_prediction,
    _fast_instant,
    _fast_outcome,
    _Problems,
    _SegmentCache,
)

SHAPE = ModelShape(kind="binary", classes=(), segment_keys=frozenset({"region", "tier"}))
LATEST_US = to_micros(parse_instant("2026-06-01T13:00:00Z"))

digits = st.integers(min_value=0, max_value=99).map(lambda n: f"{n:02d}")
timestamps = st.builds(
    lambda y, mo, d, h, mi, s, frac, sep, off: f"{y:04d}-{mo}-{d}{sep}{h}:{mi}:{s}{frac}{off}",
    st.integers(min_value=0, max_value=9999),
    digits,
    digits,
    digits,
    digits,
    digits,
    st.sampled_from(["", ".5", ".123456", ".1234567", ".123456789", "."]),
    st.sampled_from(["T", "t", " ", "_"]),
    st.sampled_from(["Z", "z", "+02:00", "-23:59", "+24:00", "", "+0200", "Z\n"]),
)


def slow_instant(text: str) -> int | None:
    try:
        return to_micros(parse_instant(text))
    except (ValueError, OverflowError):
        return None


@settings(max_examples=1_000, deadline=None, database=None)
@given(timestamps)
def test_fast_instant_matches_the_full_parse(text: str) -> None:
    fast = _fast_instant(text)
    if fast is not None:
        assert fast == slow_instant(text)


# The form pipelines send ('Z', upper-case 'T'), read field by field with each minute
# cached: near-valid values, calendar edges (Feb 29, second 60, hour 24) and years at both
# ends of the calendar.
plain_utc = st.builds(
    lambda y, mo, d, h, mi, s, frac: f"{y:04d}-{mo:02d}-{d:02d}T{h:02d}:{mi:02d}:{s:02d}{frac}Z",
    st.one_of(st.integers(1969, 2101), st.sampled_from([1, 2, 1900, 2000, 9998, 9999])),
    st.integers(0, 13),
    st.integers(0, 32),
    st.integers(0, 24),
    st.integers(0, 60),
    st.integers(0, 60),
    st.sampled_from(["", ".0", ".5", ".000001", ".123456", ".999999", ".1234567"]),
)


@settings(max_examples=2_000, deadline=None, database=None)
@given(plain_utc)
def test_plain_utc_instants_match_the_full_parse(text: str) -> None:
    expected = slow_instant(text)
    fast = _fast_instant(text)
    if fast is not None:
        assert fast == expected
    elif expected is not None:
        # Only the calendar's edges and sub-microsecond digits take the slow path.
        assert text.startswith(("0001-", "9999-")) or text.endswith(".1234567Z")


values = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-2, 2),
    st.floats(allow_nan=True),
    st.text(max_size=3),
    st.lists(st.integers(), max_size=1),
)
rows = st.fixed_dictionaries(
    {"id": st.one_of(st.text(max_size=3), st.integers(), st.just("x" * 201))},
    optional={
        "predicted_at": st.one_of(timestamps, st.just("2026-06-01T12:00:00Z"), values),
        "probability": values,
        "version": values,
        "segments": st.one_of(
            values, st.dictionaries(st.sampled_from(["region", "tier", "depot"]), values)
        ),
        "probabilities": values,
        "colour": values,
    },
)


@settings(max_examples=1_000, deadline=None, database=None)
@given(rows)
def test_fast_row_matches_the_full_checks(item: dict[str, Any]) -> None:
    fast = _fast_binary_prediction(0, item, LATEST_US, _SegmentCache(SHAPE.segment_keys))
    if fast is not None:
        problems = _Problems()
        assert _checked_prediction(problems, 0, item, SHAPE, LATEST_US, 1e-6) == fast
        assert problems.details == []


outcome_rows = st.fixed_dictionaries(
    {"id": st.one_of(st.text(max_size=3), st.integers(), st.just("x" * 201))},
    optional={
        "outcome": st.one_of(values, st.sampled_from(["late", "on_time", "lost", "Late"])),
        "observed_at": st.one_of(timestamps, st.just("2026-06-01T12:00:00Z"), values),
        "colour": values,
    },
)


@settings(max_examples=1_000, deadline=None, database=None)
@given(outcome_rows, st.sampled_from(["binary", "multiclass"]))
def test_fast_outcome_matches_the_full_checks(item: dict[str, Any], kind: str) -> None:
    classes = ("on_time", "late") if kind == "multiclass" else ()
    shape = ModelShape(kind=kind, classes=classes, segment_keys=frozenset())
    index = {c: k for k, c in enumerate(classes)}
    now_us = LATEST_US - 3_600_000_000
    fast = _fast_outcome(0, item, kind == "binary", index, now_us, LATEST_US)
    if fast is not None:
        problems = _Problems()
        assert _checked_outcome(problems, 0, item, shape, index, now_us, LATEST_US) == fast
        assert problems.details == []
