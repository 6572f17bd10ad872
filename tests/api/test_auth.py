"""The auth matrix: each scope and a model-bound token against each endpoint."""

from __future__ import annotations

import pytest

from tests.factories import NOW_US, Service, binary_model, make_token, outcome, prediction

# (method, path, body, scope needed); "late" is declared, "other" too.
ENDPOINTS = [
    ("GET", "/v1/models", None, "read"),
    ("GET", "/v1/models/late", None, "read"),
    ("PUT", "/v1/models/late", binary_model(), "admin"),
    ("DELETE", "/v1/models/late", None, "admin"),
    ("POST", "/v1/models/late/predictions", {"predictions": [prediction(1)]}, "ingest"),
    ("POST", "/v1/models/late/outcomes", {"outcomes": [outcome(1)]}, "ingest"),
]
ALLOWED = {"read": {"read", "admin"}, "ingest": {"ingest", "admin"}, "admin": {"admin"}}


@pytest.fixture
def svc(service: Service) -> Service:
    service.put_model("late", binary_model())
    service.put_model("other", binary_model())
    with service.engine.connect() as conn:
        from plumbwatch.store.models import get

        late = get(conn=conn, name="late")
        assert late is not None
    service.tokens["bound-ingest"] = make_token(service.engine, "bound", "ingest", late.id)
    service.tokens["bound-admin"] = make_token(service.engine, "bound-a", "admin", late.id)
    service.tokens["expired"] = make_token(service.engine, "old", "admin", expires_at_us=NOW_US - 1)
    return service


def call(svc: Service, method: str, path: str, body: object, token: str | None):
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    return svc.client.request(method, path, json=body, headers=headers)


@pytest.mark.parametrize(("method", "path", "body", "need"), ENDPOINTS)
@pytest.mark.parametrize("scope", ["read", "ingest", "admin"])
def test_scope_matrix(svc: Service, method, path, body, need, scope) -> None:
    r = call(svc, method, path, body, svc.tokens[scope])
    if scope in ALLOWED[need]:
        assert r.status_code in (200, 201), r.text
    else:
        assert r.status_code == 403
        assert r.json()["error"]["code"] == "forbidden"


@pytest.mark.parametrize(("method", "path", "body", "need"), ENDPOINTS)
def test_missing_bad_and_expired_tokens_are_401(svc: Service, method, path, body, need) -> None:
    for token in (None, "pw_not-a-real-token", svc.tokens["expired"]):
        r = call(svc, method, path, body, token)
        assert r.status_code == 401
        assert r.headers["www-authenticate"] == "Bearer"
    r = svc.client.request(method, path, json=body, headers={"Authorization": "Basic abc"})
    assert r.status_code == 401


def test_model_bound_token(svc: Service) -> None:
    token = svc.tokens["bound-ingest"]
    own = call(svc, "POST", "/v1/models/late/predictions", {"predictions": [prediction(1)]}, token)
    assert own.status_code == 200
    other = call(
        svc, "POST", "/v1/models/other/predictions", {"predictions": [prediction(1)]}, token
    )
    assert other.status_code == 403
    assert "bound to model 'late'" in other.json()["error"]["message"]
    # 403 comes before 404: a bound token learns nothing about other names.
    assert call(svc, "POST", "/v1/models/nope/outcomes", {"outcomes": []}, token).status_code == 403
    admin = svc.tokens["bound-admin"]
    assert call(svc, "GET", "/v1/models/late", None, admin).status_code == 200
    assert call(svc, "GET", "/v1/models/other", None, admin).status_code == 403
    listed = call(svc, "GET", "/v1/models", None, admin).json()["models"]
    assert [m["name"] for m in listed] == ["late"]


def test_precedence_401_403_404_413_422(svc: Service) -> None:
    bad_body = {"predictions": [prediction(1, probability=7)]}
    assert call(svc, "POST", "/v1/models/nope/predictions", bad_body, None).status_code == 401
    assert (
        call(svc, "POST", "/v1/models/nope/predictions", bad_body, svc.tokens["read"]).status_code
        == 403
    )
    assert (
        call(svc, "POST", "/v1/models/nope/predictions", bad_body, svc.tokens["ingest"]).status_code
        == 404
    )
    assert (
        call(svc, "POST", "/v1/models/late/predictions", bad_body, svc.tokens["ingest"]).status_code
        == 422
    )


def test_revoked_token_stops_working(svc: Service) -> None:
    from plumbwatch.store import tokens

    assert call(svc, "GET", "/v1/models", None, svc.tokens["read"]).status_code == 200
    with svc.engine.begin() as conn:
        tokens.revoke(conn=conn, name="t-read", now_us=NOW_US)
    assert call(svc, "GET", "/v1/models", None, svc.tokens["read"]).status_code == 401


def test_probes_are_open(svc: Service) -> None:
    assert svc.client.get("/healthz").json() == {"status": "ok"}
    assert svc.client.get("/readyz").json() == {"status": "ready"}


def test_errors_use_the_shared_body(svc: Service) -> None:
    for r in (
        svc.client.get("/nowhere"),
        svc.client.patch("/v1/models/late"),
        svc.client.get("/v1/models", params={"limit": "x"}, headers=svc.headers()),
    ):
        err = r.json()["error"]
        assert set(err) == {"code", "message", "details"}
    r = svc.client.get("/v1/models", params={"limit": 0}, headers=svc.headers())
    assert r.status_code == 422
    assert r.json()["error"]["details"][0]["field"] == "limit"
