"""Acknowledge and shelve from the pages, through the alert seam (fakes here; the
real actions are exercised in test_alert_actions.py once the alerts work is in)."""

from __future__ import annotations

import re
from typing import Any

import pytest

from plumbwatch.api import alerts_source
from plumbwatch.errors import NotFound
from tests.factories import NOW_US, make_token
from tests.web.seed import Seeded


@pytest.fixture
def calls(pages: Seeded, monkeypatch: pytest.MonkeyPatch) -> list[dict[str, Any]]:
    made: list[dict[str, Any]] = []

    def acknowledge(conn: Any, *, alert_id: int, actor: str, now_us: int) -> dict[str, Any]:
        if alert_id == 404:
            raise NotFound("no alert 404")
        made.append({"action": "acknowledge", "id": alert_id, "actor": actor, "now": now_us})
        return {}

    def shelve(
        conn: Any, *, alert_id: int, actor: str, until_us: int, now_us: int
    ) -> dict[str, Any]:
        made.append({"action": "shelve", "id": alert_id, "actor": actor, "until": until_us})
        return {}

    monkeypatch.setattr(alerts_source, "acknowledge", acknowledge)
    monkeypatch.setattr(alerts_source, "shelve", shelve)
    return made


def _signed_in_admin(pages: Seeded) -> tuple[Any, str]:
    client = pages.svc.client
    client.cookies.clear()
    form = client.get("/sign-in").text
    nonce = re.search(r'name="nonce" value="([^"]+)"', form)
    assert nonce is not None
    r = client.post(
        "/sign-in",
        data={"token": pages.svc.tokens["admin"], "nonce": nonce.group(1), "next": "/alerts"},
        follow_redirects=False,
    )
    assert r.status_code == 303
    page = client.get("/alerts").text
    csrf = re.search(r'name="csrf" value="([^"]+)"', page)
    assert csrf is not None and 'action="/alerts/1/acknowledge"' in page
    return client, csrf.group(1)


def test_acknowledge_and_shelve_from_the_page(pages: Seeded, calls: list[dict[str, Any]]) -> None:
    client, csrf = _signed_in_admin(pages)
    try:
        r = client.post(
            "/alerts/1/acknowledge",
            data={"csrf": csrf, "next": "/models/late-delivery"},
            follow_redirects=False,
        )
        assert r.status_code == 303 and r.headers["location"] == "/models/late-delivery"
        r = client.post(
            "/alerts/2/shelve", data={"csrf": csrf, "for": "PT4H"}, follow_redirects=False
        )
        assert r.status_code == 303 and r.headers["location"] == "/alerts"
    finally:
        client.cookies.clear()
    assert calls == [
        {"action": "acknowledge", "id": 1, "actor": "t-admin", "now": NOW_US},
        {"action": "shelve", "id": 2, "actor": "t-admin", "until": NOW_US + 4 * 3600 * 1_000_000},
    ]


def test_forms_are_checked(pages: Seeded, calls: list[dict[str, Any]]) -> None:
    client, csrf = _signed_in_admin(pages)
    try:
        assert client.post("/alerts/1/acknowledge", data={}).status_code == 403
        assert (
            client.post(
                "/alerts/1/acknowledge",
                data={"csrf": csrf},
                headers={"Origin": "http://evil.example"},
            ).status_code
            == 403
        )
        assert (
            client.post("/alerts/2/shelve", data={"csrf": csrf, "for": "soon"}).status_code == 422
        )
        r = client.post("/alerts/404/acknowledge", data={"csrf": csrf})
        assert r.status_code == 404 and "no alert 404" in r.text
    finally:
        client.cookies.clear()
    assert calls == []


def test_bearer_admins_need_no_csrf_token(pages: Seeded, calls: list[dict[str, Any]]) -> None:
    r = pages.svc.client.post(
        "/alerts/1/acknowledge", headers=pages.svc.headers("admin"), follow_redirects=False
    )
    assert r.status_code == 303 and calls[0]["actor"] == "t-admin"


def test_a_bound_admin_acts_on_its_models_alerts_only(
    pages: Seeded, calls: list[dict[str, Any]]
) -> None:
    secret = make_token(
        pages.svc.engine,
        f"bound-admin-{len(calls)}-{id(calls)}",
        "admin",
        model_id=pages.model_ids["damage-claim"],
    )
    headers = {"Authorization": f"Bearer {secret}"}
    assert pages.svc.client.post("/alerts/1/acknowledge", headers=headers).status_code == 403
    ok = pages.svc.client.post(
        "/alerts/3/shelve", data={"for": "P1D"}, headers=headers, follow_redirects=False
    )
    assert ok.status_code == 303 and [c["id"] for c in calls] == [3]
