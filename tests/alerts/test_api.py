"""The alerts API and the alerts in the status JSON, through the real evaluation path."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from sqlalchemy.engine import Engine

from tests.alerts.flow import RULES, declare, evaluate, load_drifting, settle
from tests.factories import Service, make_token, running_service


@pytest.fixture
def svc(engine: Engine) -> Iterator[Service]:
    with running_service(engine) as s:
        declare(s)
        load_drifting(s, regions=("coast", "inland"))
        yield s


def test_status_json_shows_alerts_health_and_deliveries(svc: Service) -> None:
    record = evaluate(svc)
    assert record["health"] == "drifting"
    p7 = {e["slice"]: e["health"] for e in record["windows"][0]["slices"]}
    assert p7["region:coast"] == "drifting" and p7["region:inland"] == "drifting"
    assert p7["overall"] != "drifting"  # the rule covers region slices only
    status = svc.client.get("/v1/models/late/status", headers=svc.headers("read")).json()
    alerts = status["alerts"]
    assert [(a["slice"], a["state"], a["rule"]) for a in alerts] == [
        ("region:coast", "active", "oe-high"),
        ("region:inland", "active", "oe-high"),
    ]
    assert set(alerts[0]) == {
        "id",
        "rule",
        "slice",
        "version",
        "window",
        "state",
        "severity",
        "raised_at",
        "since",
        "acknowledged_by",
        "shelved_until",
        "cleared_at",
        "values",
    }
    assert set(status["deliveries"]) == {"pending", "delivered", "failed", "failures"}


def test_list_acknowledge_shelve(svc: Service) -> None:
    evaluate(svc)
    r = svc.client.get("/v1/alerts?state=active", headers=svc.headers("read"))
    assert r.status_code == 200
    listed = r.json()
    assert len(listed["alerts"]) == 2 and listed["next_cursor"] is None
    first, second = (a["id"] for a in listed["alerts"])
    r = svc.post(f"/v1/alerts/{first}/acknowledge", {})
    assert r.status_code == 200, r.text
    assert r.json()["state"] == "acknowledged" and r.json()["acknowledged_by"] == "t-admin"
    assert svc.post(f"/v1/alerts/{first}/acknowledge", {}).json() == r.json()  # idempotent
    r = svc.post(f"/v1/alerts/{second}/shelve", {"until": "2026-06-02T09:00:00+02:00"})
    assert r.status_code == 200, r.text
    assert r.json()["state"] == "shelved"
    assert r.json()["shelved_until"] == "2026-06-02T07:00:00Z"
    page = svc.client.get("/v1/alerts?limit=1", headers=svc.headers("read")).json()
    assert len(page["alerts"]) == 1 and page["next_cursor"] is not None
    rest = svc.client.get(
        f"/v1/alerts?limit=1&cursor={page['next_cursor']}", headers=svc.headers("read")
    ).json()
    assert {page["alerts"][0]["id"], rest["alerts"][0]["id"]} == {first, second}
    states = svc.client.get("/v1/alerts?state=open&model=late", headers=svc.headers("read"))
    assert {a["state"] for a in states.json()["alerts"]} == {"acknowledged", "shelved"}
    detail = svc.client.get(f"/v1/alerts/{first}", headers=svc.headers("read")).json()
    assert [(e["kind"], e["actor"]) for e in detail["events"]] == [
        ("raised", None),
        ("acknowledged", "t-admin"),
    ]
    assert detail["events"][0]["evaluation_id"] is not None
    status = svc.client.get("/v1/models/late/status", headers=svc.headers("read")).json()
    assert {a["state"] for a in status["alerts"]} == {"acknowledged", "shelved"}


def test_errors_and_scopes(svc: Service) -> None:
    evaluate(svc)
    (alert, _) = svc.client.get("/v1/alerts", headers=svc.headers("read")).json()["alerts"]
    aid = alert["id"]
    cases = [
        (svc.post(f"/v1/alerts/{aid}/acknowledge", {}, who="read"), 403),
        (svc.post(f"/v1/alerts/{aid}/acknowledge", {}, who="ingest"), 403),
        (svc.client.get("/v1/alerts", headers=svc.headers("ingest")), 403),
        (svc.client.post(f"/v1/alerts/{aid}/acknowledge", json={}), 401),
        (svc.post("/v1/alerts/999999/acknowledge", {}), 404),
        (svc.post("/v1/alerts/999999/shelve", {"until": "bad"}), 404),  # 404 before 422
        (svc.post(f"/v1/alerts/{aid}/shelve", {"until": "2026-06-02T09:00:00"}), 422),
        (svc.post(f"/v1/alerts/{aid}/shelve", {"until": "2026-05-01T00:00:00Z"}), 422),
        (svc.post(f"/v1/alerts/{aid}/shelve", {}), 422),
        (svc.post(f"/v1/alerts/{aid}/acknowledge", {"note": "x"}), 422),
        (svc.client.get("/v1/alerts?state=burning", headers=svc.headers("read")), 422),
        (svc.client.get("/v1/alerts?cursor=abc", headers=svc.headers("read")), 422),
        (svc.client.get("/v1/alerts?model=nope", headers=svc.headers("read")), 404),
        (svc.client.get("/v1/alerts/abc", headers=svc.headers("read")), 422),
    ]
    for response, status in cases:
        assert response.status_code == status, response.text
        assert set(response.json()["error"]) == {"code", "message", "details"}


def test_a_cleared_alert_answers_conflict(svc: Service) -> None:
    evaluate(svc)
    # Three weeks later the window no longer holds those rows: clear_after = 1.
    evaluate(svc, as_of="2026-06-01T00:00:00Z")
    alerts = svc.client.get("/v1/alerts?state=cleared", headers=svc.headers("read")).json()
    assert len(alerts["alerts"]) == 2
    aid = alerts["alerts"][0]["id"]
    assert svc.post(f"/v1/alerts/{aid}/acknowledge", {}).status_code == 409
    r = svc.post(f"/v1/alerts/{aid}/shelve", {"until": "2026-06-02T00:00:00Z"})
    assert r.status_code == 409


def test_a_bound_token_sees_only_its_model(svc: Service) -> None:
    declare(svc, "claims")
    load_drifting(svc, "claims")
    evaluate(svc)
    evaluate(svc, "claims")
    settle(svc)
    with svc.engine.connect() as conn:
        from plumbwatch.store.models import get

        claims = get(conn=conn, name="claims")
    assert claims is not None
    bound = make_token(svc.engine, "claims-reader", "read", model_id=claims.id)
    admin_bound = make_token(svc.engine, "claims-admin", "admin", model_id=claims.id)
    r = svc.client.get("/v1/alerts", headers={"Authorization": f"Bearer {bound}"})
    assert r.status_code == 200 and {a["model"] for a in r.json()["alerts"]} == {"claims"}
    r = svc.client.get("/v1/alerts?model=late", headers={"Authorization": f"Bearer {bound}"})
    assert r.status_code == 403
    late = svc.client.get("/v1/alerts?model=late", headers=svc.headers("read")).json()
    aid = late["alerts"][0]["id"]
    r = svc.client.post(
        f"/v1/alerts/{aid}/acknowledge",
        json={},
        headers={"Authorization": f"Bearer {admin_bound}"},
    )
    assert r.status_code == 403


def test_rules_round_trip_through_the_model_declaration(svc: Service) -> None:
    body = svc.client.get("/v1/models/late", headers=svc.headers("read")).json()
    assert body["rules"] == RULES  # as declared: unset fields stay unset
    bad = {"kind": "binary", "label_horizon": "P1D", "rules": [{"name": "x", "condition": "odd"}]}
    r = svc.client.put("/v1/models/other", json=bad, headers=svc.headers())
    assert r.status_code == 422
    assert any("rules" in d["field"] for d in r.json()["error"]["details"])
