"""POST /v1/models/{model}/predictions: validation, idempotency, conflicts, limits."""

from __future__ import annotations

import orjson
import pytest
import sqlalchemy as sa

from plumbwatch.store.tables import predictions
from tests.factories import Service, binary_model, multiclass_model, prediction, running_service

URL = "/v1/models/late/predictions"


@pytest.fixture
def svc(service: Service) -> Service:
    service.put_model("late", binary_model())
    return service


def stored(svc: Service) -> list[sa.Row]:
    with svc.engine.connect() as conn:
        return list(conn.execute(sa.select(predictions).order_by(predictions.c.client_id)))


def test_accepts_a_batch_and_stores_parsed_values(svc: Service) -> None:
    body = {
        "predictions": [
            prediction(1),
            prediction(2, predicted_at="2026-05-30T10:00:00+02:00", probability=1, segments=None),
        ]
    }
    r = svc.post(URL, body, who="ingest")
    assert r.status_code == 200, r.text
    assert r.json() == {"accepted": 2, "duplicates": 0}
    rows = stored(svc)
    assert [row.client_id for row in rows] == ["p-1", "p-2"]
    # +02:00 is stored in UTC: 08:00Z, the same instant as row 1.
    assert rows[0].predicted_at_us == rows[1].predicted_at_us
    assert rows[1].probability == 1.0 and rows[1].segments is None
    assert orjson.loads(rows[0].segments) == {"region": "coast", "tier": "express"}


def test_same_content_again_is_a_duplicate(svc: Service) -> None:
    svc.post(URL, {"predictions": [prediction(1)]})
    # Same instant in another offset, segments in another order: still equal on parsed values.
    again = prediction(
        1,
        predicted_at="2026-05-30T10:00:00.000000+02:00",
        segments={"tier": "express", "region": "coast"},
    )
    r = svc.post(URL, {"predictions": [again, prediction(2)]})
    assert r.status_code == 200
    assert r.json() == {"accepted": 1, "duplicates": 1}
    assert len(stored(svc)) == 2


def test_different_content_for_a_stored_id_is_409_and_stores_nothing(svc: Service) -> None:
    svc.post(URL, {"predictions": [prediction(1)]})
    r = svc.post(URL, {"predictions": [prediction(2), prediction(1, probability=0.26)]})
    assert r.status_code == 409
    err = r.json()["error"]
    assert err["code"] == "conflict"
    assert err["details"] == [
        {"index": 1, "field": "id", "reason": "'p-1' is stored with different content"}
    ]
    assert [row.client_id for row in stored(svc)] == ["p-1"]  # p-2 was not stored either


@pytest.mark.parametrize(
    "change",
    [
        {"predicted_at": "2026-05-30T08:00:00.000001Z"},
        {"version": "v2"},
        {"segments": {"region": "coast"}},
        {"segments": {"region": "coast", "tier": "standard"}},
    ],
)
def test_any_field_difference_is_a_conflict(svc: Service, change: dict) -> None:
    svc.post(URL, {"predictions": [prediction(1)]})
    assert svc.post(URL, {"predictions": [prediction(1, **change)]}).status_code == 409


def test_repeat_within_one_batch(svc: Service) -> None:
    same = svc.post(URL, {"predictions": [prediction(1), prediction(1)]})
    assert same.json() == {"accepted": 1, "duplicates": 1}
    different = svc.post(URL, {"predictions": [prediction(5), prediction(5, probability=0.9)]})
    assert different.status_code == 422
    assert different.json()["error"]["details"] == [
        {"index": 1, "field": "id", "reason": "repeats the id of row 0 with different content"}
    ]


INVALID_ROWS = [
    ({"id": ""}, "id", "required: a non-empty string"),
    ({"id": 7}, "id", "required: a non-empty string"),
    ({"id": "x" * 201}, "id", "longer than 200 characters"),
    (
        {"predicted_at": "2026-05-30T08:00:00"},
        "predicted_at",
        "timestamp '2026-05-30T08:00:00' has no UTC offset (add Z or +hh:mm)",
    ),
    ({"predicted_at": "yesterday"}, "predicted_at", "not an RFC 3339 timestamp: 'yesterday'"),
    (
        {"predicted_at": "2026-06-01T13:00:01Z"},
        "predicted_at",
        "lies further in the future than the future_tolerance setting",
    ),
    ({"probability": 1.01}, "probability", "required: a finite number within [0, 1]"),
    ({"probability": -0.1}, "probability", "required: a finite number within [0, 1]"),
    ({"probability": "0.5"}, "probability", "required: a finite number within [0, 1]"),
    ({"probability": True}, "probability", "required: a finite number within [0, 1]"),
    ({"probability": None}, "probability", "required: a finite number within [0, 1]"),
    (
        {"segments": {"depot": "d1"}},
        "segments.depot",
        "undeclared segment key (declared: region, tier)",
    ),
    (
        {"segments": {"region": 3}},
        "segments.region",
        "a non-empty string of at most 200 characters",
    ),
    (
        {"segments": {"region": "r" * 201}},
        "segments.region",
        "a non-empty string of at most 200 characters",
    ),
    ({"segments": ["region"]}, "segments", "an object mapping segment keys to string values"),
    ({"version": ""}, "version", "a non-empty string of at most 64 characters"),
    ({"version": "v" * 65}, "version", "a non-empty string of at most 64 characters"),
    ({"probabilities": {"a": 1.0}}, "probabilities", "binary model: send 'probability' instead"),
    ({"colour": "red"}, "colour", "unknown field"),
]


@pytest.mark.parametrize(("change", "field", "reason"), INVALID_ROWS)
def test_each_validation_rule(svc: Service, change: dict, field: str, reason: str) -> None:
    r = svc.post(URL, {"predictions": [prediction(0), prediction(1, **change)]})
    assert r.status_code == 422, r.text
    assert r.json()["error"]["details"] == [{"index": 1, "field": field, "reason": reason}]
    assert stored(svc) == []


def test_nan_and_infinity_are_rejected(svc: Service) -> None:
    # JSON has no NaN; orjson refuses the literal, so the whole body is invalid JSON.
    raw = (
        b'{"predictions": [{"id": "a", "predicted_at": "2026-05-30T08:00:00Z",'
        b' "probability": NaN}]}'
    )
    r = svc.client.post(URL, content=raw, headers=svc.headers())
    assert r.status_code == 422
    assert r.json()["error"]["details"][0]["field"] == "body"
    # 1e400 overflows float64; orjson refuses it rather than reading infinity.
    raw = b'{"predictions":[{"id":"a","predicted_at":"2026-05-30T08:00:00Z","probability":1e400}]}'
    assert svc.client.post(URL, content=raw, headers=svc.headers()).status_code == 422


def test_every_bad_row_is_listed(svc: Service) -> None:
    rows = [prediction(i) for i in range(10)]
    rows[2]["probability"] = 2
    rows[7]["id"] = ""
    rows[7]["predicted_at"] = "nope"
    rows[9] = "not an object"
    r = svc.post(URL, {"predictions": rows})
    assert r.status_code == 422
    err = r.json()["error"]
    assert [(d["index"], d["field"]) for d in err["details"]] == [
        (2, "probability"),
        (7, "id"),
        (7, "predicted_at"),
        (9, ""),
    ]
    assert err["message"].startswith("3 of 10 rows are invalid; nothing was stored")


@pytest.mark.parametrize(
    "body", [[], {"rows": []}, {"predictions": {}}, {"predictions": [], "extra": 1}]
)
def test_body_shape(svc: Service, body: object) -> None:
    r = svc.post(URL, body)
    assert r.status_code == 422
    assert r.json()["error"]["code"] == "invalid"


def test_empty_batch_is_fine(svc: Service) -> None:
    assert svc.post(URL, {"predictions": []}).json() == {"accepted": 0, "duplicates": 0}


def test_batch_row_limit_is_413_before_validation(engine) -> None:
    with running_service(engine, max_batch_rows=3) as svc:
        svc.put_model("late", binary_model())
        rows = [prediction(i, probability=5) for i in range(4)]  # invalid too: 413 wins
        r = svc.post(URL, {"predictions": rows})
        assert r.status_code == 413
        assert "limit is 3" in r.json()["error"]["message"]
        assert svc.post(URL, {"predictions": rows[:3]}).status_code == 422


def test_body_byte_limit_is_413_before_parsing(engine) -> None:
    with running_service(engine, max_body_bytes=2048) as svc:
        svc.put_model("late", binary_model())
        raw = b"{" + b" " * 4096  # not even JSON: the size check comes first
        r = svc.client.post(URL, content=raw, headers=svc.headers())
        assert r.status_code == 413
        assert r.json()["error"]["code"] == "too_large"

        def chunks():  # no Content-Length: the limit holds while streaming too
            for _ in range(10):
                yield b" " * 1000

        r = svc.client.post(URL, content=chunks(), headers=svc.headers())
        assert r.status_code == 413


def test_unknown_model_is_404_and_says_how_to_declare(svc: Service) -> None:
    r = svc.post("/v1/models/lat/predictions", {"predictions": [prediction(1)]})
    assert r.status_code == 404
    assert "PUT /v1/models/lat" in r.json()["error"]["message"]
    r = svc.client.get("/v1/models/lat", headers=svc.headers())
    assert r.status_code == 404  # the typo did not create a model


def test_archived_model_refuses_ingest(svc: Service) -> None:
    assert svc.client.delete("/v1/models/late", headers=svc.headers()).status_code == 200
    r = svc.post(URL, {"predictions": [prediction(1)]})
    assert r.status_code == 404
    assert "archived" in r.json()["error"]["message"]


def test_multiclass_rules(service: Service) -> None:
    service.put_model("route", multiclass_model())
    url = "/v1/models/route/predictions"
    good = prediction(1, probability=None)
    del good["probability"]
    good["segments"] = {"region": "coast"}
    good["probabilities"] = {"on_time": 0.7, "late": 0.2, "lost": 0.1}
    assert service.post(url, {"predictions": [good]}).json() == {"accepted": 1, "duplicates": 0}

    def bad(probs: object) -> list[dict]:
        row = dict(good, id="x", probabilities=probs)
        return service.post(url, {"predictions": [row]}).json()["error"]["details"]

    assert bad({"on_time": 0.7, "late": 0.3}) == [
        {"index": 0, "field": "probabilities", "reason": "missing classes ['lost']"}
    ]
    assert bad({"on_time": 0.7, "late": 0.2, "lost": 0.05, "stolen": 0.05})[0]["reason"] == (
        "undeclared classes ['stolen']"
    )
    assert bad({"on_time": 0.7, "late": 0.2, "lost": 0.2})[0]["reason"].startswith("sum to 1.1")
    assert bad({"on_time": 1.2, "late": -0.2, "lost": 0.0})[0]["field"] == "probabilities.on_time"
    # Sums within the stated tolerance (1e-6 by default) are accepted.
    ok = dict(good, id="y", probabilities={"on_time": 0.7, "late": 0.2, "lost": 0.1000005})
    assert service.post(url, {"predictions": [ok]}).status_code == 200
    assert bad(0.5)[0]["reason"] == "required: an object mapping each class to a probability"
