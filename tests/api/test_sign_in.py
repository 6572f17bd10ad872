"""Browser sign-in: the form, the signed session cookie, sign-out, CSRF, public pages."""

from __future__ import annotations

import re
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from http.cookies import SimpleCookie

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.engine import Engine

from plumbwatch.api import create_app
from plumbwatch.api.page_auth import SESSION_COOKIE, SESSION_SECONDS, SIGN_IN_COOKIE
from plumbwatch.config import Settings
from plumbwatch.store import tokens
from tests.factories import NOW_US, make_token


@dataclass
class Site:
    client: TestClient
    engine: Engine
    clock: list[int]
    secrets: dict[str, str]


@contextmanager
def _site(
    engine: Engine, base_url: str = "http://testserver", **settings: object
) -> Iterator[Site]:
    clock = [NOW_US]
    config = Settings(database_url=str(engine.url), scheduler="off", **settings)  # type: ignore[arg-type]
    app = create_app(config, engine=engine, clock_us=lambda: clock[0])
    secrets = {}
    for scope in ("admin", "read", "ingest"):
        with engine.connect() as conn:
            known = {t.name for t in tokens.list_tokens(conn=conn)}
        name = f"web-{scope}-{len(known)}"
        secrets[scope] = make_token(engine, name, scope)
    secrets["read-name"] = f"web-read-{len(known) - 1}"
    with TestClient(app, base_url=base_url) as client:
        yield Site(client, engine, clock, secrets)


@pytest.fixture
def site(engine: Engine) -> Iterator[Site]:
    with _site(engine) as s:
        yield s


def _nonce(client: TestClient, next_url: str = "/") -> str:
    r = client.get("/sign-in", params={"next": next_url})
    assert r.status_code == 200
    match = re.search(r'name="nonce" value="([^"]+)"', r.text)
    assert match and client.cookies.get(SIGN_IN_COOKIE) == match.group(1)
    return match.group(1)


def _sign_in(site: Site, who: str = "read", next_url: str = "/", **extra: str):  # type: ignore[no-untyped-def]
    form = {"token": site.secrets.get(who, who), "nonce": _nonce(site.client, next_url)}
    form["next"] = next_url
    form.update(extra)
    return site.client.post("/sign-in", data=form, follow_redirects=False)


def _set_cookie(response) -> SimpleCookie:  # type: ignore[no-untyped-def]
    jar: SimpleCookie = SimpleCookie()
    for header in response.headers.get_list("set-cookie"):
        jar.load(header)
    return jar


def test_sign_in_sets_a_signed_http_only_strict_cookie(site: Site) -> None:
    r = _sign_in(site, next_url="/alerts")
    assert r.status_code == 303 and r.headers["location"] == "/alerts"
    cookie = _set_cookie(r)[SESSION_COOKIE]
    assert cookie["httponly"] and cookie["samesite"].lower() == "strict"
    assert cookie["path"] == "/" and not cookie["secure"]
    assert int(cookie["max-age"]) == SESSION_SECONDS
    # The cookie holds an id, an expiry and a MAC: never the token itself.
    assert site.secrets["read"] not in cookie.value
    assert site.client.get("/", follow_redirects=False).status_code == 200


def test_the_cookie_is_secure_over_https(engine: Engine) -> None:
    with _site(engine, base_url="https://testserver") as site:
        r = _sign_in(site)
        assert _set_cookie(r)[SESSION_COOKIE]["secure"]


def test_the_cookie_is_no_bearer_token(site: Site) -> None:
    _sign_in(site)
    value = site.client.cookies.get(SESSION_COOKIE)
    r = site.client.get("/v1/models", headers={"Authorization": f"Bearer {value}"})
    assert r.status_code == 401


@pytest.mark.parametrize(
    ("who", "status", "words"),
    [("pw_wrong", 401, "unknown, revoked or expired"), ("ingest", 403, "pages need read or admin")],
)
def test_tokens_that_cannot_read_are_refused(site: Site, who: str, status: int, words: str) -> None:
    r = _sign_in(site, who=who)
    assert r.status_code == status and words in r.text
    assert SESSION_COOKIE not in site.client.cookies


def test_sign_in_needs_the_forms_nonce(site: Site) -> None:
    _nonce(site.client)
    r = site.client.post(
        "/sign-in", data={"token": site.secrets["read"], "nonce": "forged"}, follow_redirects=False
    )
    assert r.status_code == 403 and SESSION_COOKIE not in site.client.cookies


def test_sign_in_from_another_origin_is_refused(site: Site) -> None:
    nonce = _nonce(site.client)
    r = site.client.post(
        "/sign-in",
        data={"token": site.secrets["read"], "nonce": nonce},
        headers={"Origin": "http://elsewhere.example"},
        follow_redirects=False,
    )
    assert r.status_code == 403


@pytest.mark.parametrize("target", ["//elsewhere.example/x", "http://elsewhere.example", "\\\\x"])
def test_next_never_leaves_the_site(site: Site, target: str) -> None:
    r = _sign_in(site, next_url=target)
    assert r.status_code == 303 and r.headers["location"] == "/"


def test_sign_out_needs_the_csrf_token_and_clears_the_cookie(site: Site) -> None:
    _sign_in(site)
    page = site.client.get("/")
    csrf = re.search(r'name="csrf" value="([^"]+)"', page.text)
    assert csrf is not None
    assert site.client.post("/sign-out", data={"csrf": "stale"}).status_code == 403
    r = site.client.post("/sign-out", data={"csrf": csrf.group(1)}, follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/sign-in"
    assert int(_set_cookie(r)[SESSION_COOKIE]["max-age"]) == 0
    assert site.client.get("/", follow_redirects=False).status_code == 303


def test_revoking_the_token_ends_its_sessions(site: Site) -> None:
    _sign_in(site)
    with site.engine.begin() as conn:
        tokens.revoke(conn=conn, name=site.secrets["read-name"], now_us=NOW_US)
    assert site.client.get("/", follow_redirects=False).status_code == 303


def test_sessions_expire(site: Site) -> None:
    _sign_in(site)
    site.clock[0] += (SESSION_SECONDS - 60) * 1_000_000
    assert site.client.get("/", follow_redirects=False).status_code == 200
    site.clock[0] += 120 * 1_000_000
    assert site.client.get("/", follow_redirects=False).status_code == 303


def test_a_session_never_outlives_its_token(engine: Engine) -> None:
    with _site(engine) as site:
        secret = make_token(engine, "short", "read", expires_at_us=NOW_US + 3_600_000_000)
        r = _sign_in(site, who=secret)
        assert int(_set_cookie(r)[SESSION_COOKIE]["max-age"]) == 3600


def test_a_tampered_cookie_is_refused(site: Site) -> None:
    _sign_in(site)
    value = site.client.cookies.get(SESSION_COOKIE)
    assert value is not None
    version, token_id, expires, mac = value.split(".")
    site.client.cookies.clear()
    site.client.cookies.set(SESSION_COOKIE, f"{version}.{token_id}.{int(expires) + 10**6}.{mac}")
    assert site.client.get("/", follow_redirects=False).status_code == 303


def test_a_session_from_another_server_key_is_refused(engine: Engine) -> None:
    with _site(engine, session_key="k" * 32) as first:
        _sign_in(first)
        value = first.client.cookies.get(SESSION_COOKIE)
    assert value is not None
    with _site(engine, session_key="j" * 32) as other:
        other.client.cookies.set(SESSION_COOKIE, value)
        assert other.client.get("/", follow_redirects=False).status_code == 303
    with _site(engine, session_key="k" * 32) as same:  # servers sharing the key agree
        same.client.cookies.set(SESSION_COOKIE, value)
        assert same.client.get("/", follow_redirects=False).status_code == 200


def test_admin_forms_refuse_a_missing_csrf_token(site: Site) -> None:
    _sign_in(site, who="admin")
    r = site.client.post("/alerts/1/acknowledge", data={"csrf": "stale"})
    assert r.status_code == 403 and "CSRF" in r.text


def test_a_read_session_may_not_act_on_alerts(site: Site) -> None:
    _sign_in(site)
    page = site.client.get("/")
    csrf = re.search(r'name="csrf" value="([^"]+)"', page.text)
    assert csrf is not None
    r = site.client.post("/alerts/1/acknowledge", data={"csrf": csrf.group(1)})
    assert r.status_code == 403 and "admin" in r.text


def test_public_pages_need_no_token(engine: Engine) -> None:
    with _site(engine, public_pages=True) as site:
        r = site.client.get("/", follow_redirects=False)
        assert r.status_code == 200 and "Public read-only view" in r.text
        assert site.client.get("/metrics").status_code == 200
        assert site.client.get("/v1/models").status_code == 401  # the API stays closed


def test_metrics_without_a_token_is_401(site: Site) -> None:
    r = site.client.get("/metrics")
    assert r.status_code == 401 and r.json()["error"]["code"] == "unauthorized"
