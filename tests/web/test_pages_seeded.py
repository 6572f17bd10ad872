"""The pages on a seeded database (real API and evaluations, both engines): they
render, show the numbers of the status JSON, escape user text, and guard access."""

from __future__ import annotations

from typing import Any
from urllib.parse import quote

import pytest

from plumbwatch.api.html import CSP
from tests.web.html_tree import Node, parse
from tests.web.seed import XSS_ATTRIBUTE, XSS_SCRIPT, Seeded

MODELS = ("late-delivery", "damage-claim", "route-outcome")


def _status(pages: Seeded, model: str) -> dict[str, Any]:
    r = pages.get(f"/v1/models/{model}/status")
    assert r.status_code == 200, r.text
    return r.json()


def _page(pages: Seeded, path: str, who: str = "read") -> Node:
    r = pages.get(path, who=who)
    assert r.status_code == 200, r.text[:500]
    assert r.headers["content-type"].startswith("text/html")
    return parse(r.text)


def _no_injected_markup(root: Node) -> None:
    """Only our own script element, and no event-handler attributes anywhere."""
    scripts = root.by("script")
    assert [s.attrs.get("src") for s in scripts] == ["/static/sort.js"]
    assert all(not s.text for s in scripts)
    handlers = [(n.tag, a) for n in root.walk() for a in n.attrs if a.lower().startswith("on")]
    assert handlers == []
    assert root.by("img") == []


@pytest.mark.parametrize("path", ["/", "/models/late-delivery", "/alerts"])
def test_without_credentials_a_browser_is_sent_to_sign_in(pages: Seeded, path: str) -> None:
    r = pages.svc.client.get(path, follow_redirects=False)
    assert r.status_code == 303
    assert r.headers["location"] == f"/sign-in?next={quote(path, safe='')}"


def test_an_invalid_bearer_header_is_sent_to_sign_in(pages: Seeded) -> None:
    r = pages.svc.client.get(
        "/", headers={"Authorization": "Bearer pw_not-a-token"}, follow_redirects=False
    )
    assert r.status_code == 303


def test_pages_carry_a_strict_content_security_policy(pages: Seeded) -> None:
    r = pages.get("/models/late-delivery")
    assert r.headers["content-security-policy"] == CSP
    assert "'unsafe-inline'" not in CSP and "script-src 'self'" in CSP
    assert r.headers["x-content-type-options"] == "nosniff"
    assert r.headers["cache-control"] == "no-store"


def test_overview_numbers_equal_the_status_json(pages: Seeded) -> None:
    root = _page(pages, "/")
    rows = {tr.attrs["data-model"]: tr for tr in root.by("tr") if "data-model" in tr.attrs}
    assert set(rows) == set(MODELS)
    for model, tr in rows.items():
        status = _status(pages, model)
        overall = next(s for s in status["windows"][0]["slices"] if s["slice"] == "overall")
        shown = {td.attrs["data-metric"]: td for td in tr.walk() if "data-metric" in td.attrs}
        for name in ("n", "label_coverage", "log_loss", "ece", "oe_ratio", "auroc"):
            value = overall["metrics"].get(name)
            if value is None:
                assert "data-value" not in shown[name].attrs and shown[name].text.startswith("—")
            else:
                assert float(shown[name].attrs["data-value"]) == value, (model, name)
        assert f"{overall['metrics']['log_loss']:.4f}" in shown["log_loss"].text
        assert status["health"].replace("_", " ") in tr.text


def _slice_rows(root: Node) -> dict[tuple[str, str | None], Node]:
    return {
        (tr.attrs["data-slice"], tr.attrs.get("data-version")): tr
        for tr in root.by("tr")
        if "data-slice" in tr.attrs
    }


@pytest.mark.parametrize("model", ["late-delivery", "damage-claim"])
def test_slice_tables_equal_the_status_json_in_every_window(pages: Seeded, model: str) -> None:
    status = _status(pages, model)
    for window in status["windows"]:
        root = _page(pages, f"/models/{model}?window={window['window']}")
        rows = _slice_rows(root)
        assert len(rows) == len(window["slices"])
        for entry in window["slices"]:
            tr = rows[(entry["slice"], entry["version"])]
            cells = {td.attrs["data-metric"]: td for td in tr.walk() if "data-metric" in td.attrs}
            for name in ("n", "events", "log_loss", "ece", "oe_ratio", "calibration_slope"):
                value = entry["metrics"].get(name)
                if value is None:
                    assert "data-value" not in cells[name].attrs
                else:
                    assert float(cells[name].attrs["data-value"]) == value
            assert entry["health"].replace("_", " ") in tr.text


def test_model_page_has_every_chart_with_text_and_numbers(pages: Seeded) -> None:
    status = _status(pages, "late-delivery")
    root = _page(pages, "/models/late-delivery")
    figures = root.by("figure")
    titles = [f.by("h3")[0].text for f in figures]
    for w in status["windows"]:
        assert f"Reliability, overall, window {w['window']}" in titles
    for title in ("Log loss, overall", "ECE, overall", "Score distribution, overall"):
        assert title in titles
    assert "Label coverage by cohort age" in titles
    drawn = [f for f in figures if f.by("svg")]
    assert len(drawn) >= 7
    for f in drawn:
        svg = f.by("svg")[0]
        assert svg.attrs["role"] == "img"
        title_id, desc_id = svg.attrs["aria-labelledby"].split()
        assert svg.by("title", id=title_id)[0].text and svg.by("desc", id=desc_id)[0].text
        assert f.by("table"), "every chart has the table of its numbers"
        assert f.by("text"), "axis labels and ticks"


def test_reliability_table_counts_the_window_rows(pages: Seeded) -> None:
    status = _status(pages, "late-delivery")
    root = _page(pages, "/models/late-delivery")
    for w in status["windows"]:
        overall = next(s for s in w["slices"] if s["slice"] == "overall")
        fig = next(f for f in root.by("figure") if f.by("h3")[0].text.endswith(w["window"]))
        rows = fig.by("table")[0].by("tbody")[0].by("tr")
        counts = [int(tr.by("td")[1].text.replace(",", "")) for tr in rows]
        assert sum(counts) == overall["metrics"]["n"]
        assert f"{overall['metrics']['n']:,} rows" in fig.text


def test_trend_tables_follow_the_evaluation_history(pages: Seeded) -> None:
    history = pages.get("/v1/models/late-delivery/evaluations").json()["evaluations"]
    root = _page(pages, "/models/late-delivery")
    fig = next(f for f in root.by("figure") if f.by("h3")[0].text == "Log loss, overall")
    body = fig.by("table")[0].by("tbody")[0].by("tr")
    assert len(body) == len(history)
    newest = history[-1]["windows"][0]["slices"][0]
    assert newest["slice"] == "overall"
    assert body[0].by("td")[1].text == f"{newest['metrics']['log_loss']:.4f}"


def test_a_slice_can_be_selected(pages: Seeded) -> None:
    name = "region:north-coast"
    root = _page(pages, f"/models/late-delivery?slice={quote(name)}")
    assert root.by(id="selected-slice")[0].text == "region = north-coast"
    titles = [f.by("h3")[0].text for f in root.by("figure")]
    assert "Reliability, region = north-coast, window P7D" in titles


def test_user_text_is_escaped_everywhere(pages: Seeded) -> None:
    for path in (
        "/",
        "/models/late-delivery",
        "/models/late-delivery?slice=" + quote("region:" + XSS_SCRIPT.replace(":", "%3A")),
        "/alerts",
    ):
        r = pages.get(path)
        assert r.status_code == 200
        assert "<script>window.__xss" not in r.text
        assert '<img src=x onerror="window.__xss' not in r.text
        _no_injected_markup(parse(r.text))
    root = _page(pages, "/models/late-delivery")
    labels = [tr.by("th")[0].text for tr in _slice_rows(root).values()]
    assert f"region = {XSS_SCRIPT}" in labels
    assert f"region = {XSS_ATTRIBUTE}" in labels
    assert "<em>(not bold)</em>" in root.text  # the description, as text


def test_multiclass_models_render_without_reliability_diagrams(pages: Seeded) -> None:
    root = _page(pages, "/models/route-outcome")
    assert "drawn for binary models" in root.text
    assert _slice_rows(root)


def test_alerts_page_groups_the_alerts(pages: Seeded) -> None:
    root = _page(pages, "/alerts")
    ids = {
        state: [tr.attrs["data-alert-id"] for tr in t.by("tr") if "data-alert-id" in tr.attrs]
        for t in root.by("table")
        for state in [t.attrs.get("data-alert-state")]
        if state
    }
    assert ids == {"active": ["1"], "acknowledged": ["2"], "shelved": ["3"], "cleared": ["4"]}
    # A read token sees no action forms; the hand-built alert values show as text.
    assert root.by("form", action="/alerts/1/acknowledge") == []
    assert "ece 0.061" in root.text


def test_unknown_model_is_a_404_page(pages: Seeded) -> None:
    r = pages.get("/models/no-such-model")
    assert r.status_code == 404 and "not declared" in r.text
    assert r.headers["content-type"].startswith("text/html")


def test_an_ingest_token_may_not_read_pages(pages: Seeded) -> None:
    r = pages.get("/", who="ingest")
    assert r.status_code == 403 and "scope" in r.text


def test_a_bound_token_sees_its_model_only(pages: Seeded) -> None:
    from tests.factories import make_token

    secret = make_token(
        pages.svc.engine, f"bound-{id(pages)}", "read", model_id=pages.model_ids["damage-claim"]
    )
    headers = {"Authorization": f"Bearer {secret}"}
    root = parse(pages.svc.client.get("/", headers=headers).text)
    assert [tr.attrs["data-model"] for tr in root.by("tr") if "data-model" in tr.attrs] == [
        "damage-claim"
    ]
    assert pages.svc.client.get("/models/late-delivery", headers=headers).status_code == 403
    alerts = parse(pages.svc.client.get("/alerts", headers=headers).text)
    assert {tr.attrs["data-alert-id"] for tr in alerts.by("tr") if "data-alert-id" in tr.attrs} == {
        "3",
        "4",
    }
