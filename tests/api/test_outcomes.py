"""POST /v1/models/{model}/outcomes: late arrival, idempotency, corrections and their audit."""

from __future__ import annotations

import pytest
import sqlalchemy as sa

from plumbwatch.store.tables import outcome_revisions, outcomes, predictions
from plumbwatch.timefmt import parse_instant, to_micros
from tests.factories import NOW_US, Service, binary_model, multiclass_model, outcome, prediction

P_URL = "/v1/models/late/predictions"
O_URL = "/v1/models/late/outcomes"


@pytest.fixture
def svc(service: Service) -> Service:
    service.put_model("late", binary_model())
    return service


def outcome_rows(svc: Service) -> dict[str, sa.Row]:
    with svc.engine.connect() as conn:
        return {r.client_id: r for r in conn.execute(sa.select(outcomes))}


def test_outcome_for_a_stored_prediction(svc: Service) -> None:
    svc.post(P_URL, {"predictions": [prediction(1)]})
    r = svc.post(O_URL, {"outcomes": [outcome(1)]}, who="ingest")
    assert r.status_code == 200, r.text
    assert r.json() == {"accepted": 1, "duplicates": 0, "corrections": 0, "awaiting_prediction": 0}
    row = outcome_rows(svc)["p-1"]
    assert row.outcome == 1
    assert row.observed_at_us == to_micros(parse_instant("2026-05-31T09:00:00Z"))
    with svc.engine.connect() as conn:
        pid = conn.execute(sa.select(predictions.c.id)).scalar_one()
    assert row.prediction_id == pid


def test_outcome_before_its_prediction_is_kept_and_joined_later(svc: Service) -> None:
    r = svc.post(O_URL, {"outcomes": [outcome(1), outcome(2, outcome=False)]})
    assert r.json() == {"accepted": 2, "duplicates": 0, "corrections": 0, "awaiting_prediction": 2}
    assert outcome_rows(svc)["p-1"].prediction_id is None
    svc.post(P_URL, {"predictions": [prediction(1)]})
    rows = outcome_rows(svc)
    assert rows["p-1"].prediction_id is not None
    assert rows["p-2"].prediction_id is None and rows["p-2"].outcome == 0
    # Re-sending now reports only the one still waiting.
    again = svc.post(O_URL, {"outcomes": [outcome(1), outcome(2, outcome=0)]}).json()
    assert again == {"accepted": 0, "duplicates": 2, "corrections": 0, "awaiting_prediction": 1}


def test_observed_at_defaults_to_receipt_time(svc: Service) -> None:
    svc.post(O_URL, {"outcomes": [{"id": "p-9", "outcome": 1}]})
    assert outcome_rows(svc)["p-9"].observed_at_us == NOW_US


def test_repeats_are_idempotent(svc: Service) -> None:
    svc.post(O_URL, {"outcomes": [outcome(1)]})
    # Same value, another observed_at (a re-sent default): still a duplicate, first time kept.
    r = svc.post(O_URL, {"outcomes": [outcome(1, observed_at="2026-05-31T10:00:00Z"), outcome(1)]})
    assert r.json()["duplicates"] == 2 and r.json()["accepted"] == 0
    assert outcome_rows(svc)["p-1"].observed_at_us == to_micros(
        parse_instant("2026-05-31T09:00:00Z")
    )


def test_a_different_value_without_correction_is_409(svc: Service) -> None:
    svc.post(O_URL, {"outcomes": [outcome(1)]})
    r = svc.post(O_URL, {"outcomes": [outcome(2), outcome(1, outcome=0)]})
    assert r.status_code == 409
    assert r.json()["error"]["details"] == [
        {
            "index": 1,
            "field": "outcome",
            "reason": "'p-1' has a stored outcome with another value; "
            "send it with ?correction=true to correct it",
        }
    ]
    assert set(outcome_rows(svc)) == {"p-1"}  # p-2 not stored: all or nothing


def test_correction_keeps_the_superseded_value_with_its_time(svc: Service) -> None:
    svc.post(P_URL, {"predictions": [prediction(1)]})
    svc.post(O_URL, {"outcomes": [outcome(1)]})
    r = svc.post(
        O_URL + "?correction=true",
        {"outcomes": [outcome(1, outcome=0, observed_at="2026-06-01T08:00:00Z"), outcome(3)]},
    )
    assert r.status_code == 200, r.text
    assert r.json() == {"accepted": 1, "duplicates": 0, "corrections": 1, "awaiting_prediction": 1}
    row = outcome_rows(svc)["p-1"]
    assert (row.outcome, row.revision) == (0, 1)
    assert row.observed_at_us == to_micros(parse_instant("2026-06-01T08:00:00Z"))
    with svc.engine.connect() as conn:
        audit = conn.execute(sa.select(outcome_revisions)).all()
    assert len(audit) == 1
    assert audit[0].outcome_id == row.id and audit[0].outcome == 1
    assert audit[0].observed_at_us == to_micros(parse_instant("2026-05-31T09:00:00Z"))
    assert audit[0].superseded_at_us == NOW_US
    # Correcting to the value it already has is a duplicate, not a new revision.
    same = svc.post(O_URL + "?correction=true", {"outcomes": [outcome(1, outcome=0)]}).json()
    assert same["duplicates"] == 1 and same["corrections"] == 0


@pytest.mark.parametrize(
    ("change", "field", "reason"),
    [
        ({"outcome": 2}, "outcome", "required: 0 or 1 (true/false accepted)"),
        ({"outcome": "1"}, "outcome", "required: 0 or 1 (true/false accepted)"),
        ({"outcome": None}, "outcome", "required: 0 or 1 (true/false accepted)"),
        ({"outcome": 0.5}, "outcome", "required: 0 or 1 (true/false accepted)"),
        ({"observed_at": "2026-05-31"}, "observed_at", "not an RFC 3339 timestamp: '2026-05-31'"),
        (
            {"observed_at": "2027-01-01T00:00:00Z"},
            "observed_at",
            "lies further in the future than the future_tolerance setting",
        ),
        ({"id": ""}, "id", "required: a non-empty string"),
        ({"value": 1}, "value", "unknown field"),
    ],
)
def test_outcome_validation(svc: Service, change: dict, field: str, reason: str) -> None:
    r = svc.post(O_URL, {"outcomes": [outcome(0), outcome(1, **change)]})
    assert r.status_code == 422
    assert r.json()["error"]["details"] == [{"index": 1, "field": field, "reason": reason}]
    assert outcome_rows(svc) == {}


def test_repeat_within_a_batch(svc: Service) -> None:
    r = svc.post(O_URL, {"outcomes": [outcome(1), outcome(1, outcome=0)]})
    assert r.status_code == 422
    ok = svc.post(O_URL, {"outcomes": [outcome(1), outcome(1, outcome=True)]}).json()
    assert ok["accepted"] == 1 and ok["duplicates"] == 1


def test_multiclass_outcomes_are_class_names(service: Service) -> None:
    service.put_model("route", multiclass_model())
    url = "/v1/models/route/outcomes"
    assert service.post(url, {"outcomes": [outcome(1, outcome="late")]}).status_code == 200
    r = service.post(url, {"outcomes": [outcome(2, outcome="stolen")]})
    assert r.json()["error"]["details"][0]["reason"] == (
        "required: one of the classes ['on_time', 'late', 'lost']"
    )
    with service.engine.connect() as conn:
        assert conn.execute(sa.select(outcomes.c.outcome)).scalar_one() == 1  # index of 'late'
