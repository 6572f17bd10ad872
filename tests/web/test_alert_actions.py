"""Acknowledge from the page with the real alert store and actions.

The seeded north-coast region drifts strongly (observed about 1.8 times the
predicted rate for three weeks), which the default rules are expected to page on.
"""

from __future__ import annotations

import re

from plumbwatch.api import alerts_source
from tests.web.seed import Seeded


def test_acknowledge_a_real_alert_from_the_page(seeded: Seeded) -> None:
    with seeded.svc.engine.connect() as conn:
        active = alerts_source.list_alerts(
            conn, state="active", model_id=seeded.model_ids["late-delivery"]
        )
    assert active, "the seeded drift raised no alert; the page actions need one to act on"
    alert = active[0]
    client = seeded.svc.client
    client.cookies.clear()
    nonce = re.search(r'name="nonce" value="([^"]+)"', client.get("/sign-in").text)
    assert nonce is not None
    client.post(
        "/sign-in",
        data={"token": seeded.svc.tokens["admin"], "nonce": nonce.group(1)},
        follow_redirects=False,
    )
    try:
        csrf = re.search(r'name="csrf" value="([^"]+)"', client.get("/alerts").text)
        assert csrf is not None
        r = client.post(
            f"/alerts/{alert['id']}/acknowledge",
            data={"csrf": csrf.group(1)},
            follow_redirects=False,
        )
        assert r.status_code == 303
    finally:
        client.cookies.clear()
    with seeded.svc.engine.connect() as conn:
        after = alerts_source.list_alerts(conn, state="acknowledged")
    mine = [a for a in after if a["id"] == alert["id"]]
    assert mine and mine[0]["acknowledged_by"] == "t-admin"
