"""Property tests (hypothesis) for the ingest validators and time parsing."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta, timezone

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from plumbwatch.errors import InvalidInput
from plumbwatch.timefmt import format_instant, parse_duration, parse_instant, to_micros
from plumbwatch.validation import ModelShape, validate_outcomes, validate_predictions

SHAPE = ModelShape(kind="binary", classes=(), segment_keys=frozenset({"region"}))
NOW = to_micros(datetime(2030, 1, 1, tzinfo=UTC))
instants = st.datetimes(
    min_value=datetime(1990, 1, 1),
    max_value=datetime(2029, 12, 31),
    timezones=st.sampled_from(
        [UTC, timezone(timedelta(hours=5, minutes=30)), timezone(timedelta(hours=-8))]
    ),
)


def check(rows: list) -> tuple:
    return validate_predictions(
        {"predictions": rows}, SHAPE, now_us=NOW, future_tolerance_us=0, sum_tolerance=1e-6
    )


@settings(max_examples=200, deadline=None)
@given(instants)
def test_instants_round_trip_to_the_microsecond(value: datetime) -> None:
    text = value.isoformat()
    parsed = parse_instant(text)
    assert parsed == value
    assert parse_instant(format_instant(parsed)) == value
    assert to_micros(parsed) == to_micros(value)


@settings(max_examples=100, deadline=None)
@given(st.datetimes(min_value=datetime(1990, 1, 1), max_value=datetime(2029, 1, 1)))
def test_naive_instants_are_refused(value: datetime) -> None:
    with pytest.raises(ValueError, match="no UTC offset"):
        parse_instant(value.isoformat())


@settings(max_examples=100, deadline=None)
@given(st.integers(0, 400), st.integers(0, 23), st.integers(0, 59))
def test_durations(days: int, hours: int, minutes: int) -> None:
    text = "P" + (f"{days}D" if days else "") + "T" + f"{hours}H{minutes}M"
    assert parse_duration(text) == timedelta(days=days, hours=hours, minutes=minutes)


@settings(max_examples=200, deadline=None)
@given(
    st.one_of(
        st.floats(allow_nan=True, allow_infinity=True),
        st.integers(-3, 3),
        st.booleans(),
        st.text(max_size=3),
        st.none(),
    )
)
def test_probability_accepted_iff_a_finite_number_in_unit_interval(value: object) -> None:
    row = {"id": "a", "predicted_at": "2029-01-01T00:00:00Z", "probability": value}
    ok = (
        not isinstance(value, bool)
        and isinstance(value, int | float)
        and math.isfinite(value)
        and 0 <= value <= 1
    )
    if ok:
        rows, _ = check([row])
        assert rows[0].probability == float(value)
    else:
        with pytest.raises(InvalidInput) as err:
            check([row])
        assert [(d.index, d.field) for d in err.value.details] == [(0, "probability")]


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 30), st.booleans()), max_size=40))
def test_every_bad_row_is_reported_once_with_its_index(spec: list) -> None:
    rows = [
        {
            "id": f"r{i}-{k}",
            "predicted_at": "2029-01-01T00:00:00Z",
            "probability": 0.5 if good else 2.0,
        }
        for i, (k, good) in enumerate(spec)
    ]
    bad = [i for i, (_, good) in enumerate(spec) if not good]
    if not bad:
        assert len(check(rows)[0]) == len(rows)
        return
    with pytest.raises(InvalidInput) as err:
        check(rows)
    assert [d.index for d in err.value.details] == bad


@settings(max_examples=100, deadline=None)
@given(st.permutations(list(range(8))))
def test_result_does_not_depend_on_segment_order(order: list) -> None:
    shape = ModelShape(kind="binary", classes=(), segment_keys=frozenset(f"k{i}" for i in range(8)))
    segments = {f"k{i}": f"v{i}" for i in order}
    rows, _ = validate_predictions(
        {
            "predictions": [
                {
                    "id": "a",
                    "predicted_at": "2029-01-01T00:00:00Z",
                    "probability": 0.1,
                    "segments": segments,
                }
            ]
        },
        shape,
        now_us=NOW,
        future_tolerance_us=0,
        sum_tolerance=1e-6,
    )
    assert rows[0].segments == "{" + ",".join(f'"k{i}":"v{i}"' for i in range(8)) + "}"


@settings(max_examples=100, deadline=None)
@given(st.one_of(st.integers(), st.booleans(), st.text(max_size=2), st.none(), st.floats()))
def test_binary_outcomes(value: object) -> None:
    body = {"outcomes": [{"id": "a", "outcome": value}]}
    ok = isinstance(value, bool) or (isinstance(value, int) and value in (0, 1))
    if ok:
        rows, _ = validate_outcomes(body, SHAPE, now_us=NOW, future_tolerance_us=0)
        assert rows[0].outcome == int(value)  # type: ignore[arg-type]
    else:
        with pytest.raises(InvalidInput):
            validate_outcomes(body, SHAPE, now_us=NOW, future_tolerance_us=0)
