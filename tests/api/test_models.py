"""Monitored models: PUT, GET, list with paging, DELETE (archive), TOML declarations."""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlalchemy.engine import Engine

from plumbwatch.config import Settings
from plumbwatch.errors import ConfigError
from plumbwatch.store.models import apply_declarations, get
from tests.factories import NOW, Service, binary_model, multiclass_model, prediction


def test_put_creates_then_replaces(service: Service) -> None:
    r = service.client.put("/v1/models/late", json=binary_model(), headers=service.headers())
    assert r.status_code == 201
    body = r.json()
    assert body == {
        "name": "late",
        "kind": "binary",
        "classes": None,
        "label_horizon": "P5D",
        "missing_outcome": "wait",
        "segment_keys": ["region", "tier"],
        "crosses": [["region", "tier"]],
        "windows": ["P7D", "P28D"],
        "baseline": None,
        "rules": None,
        "description": "late delivery",
        "created_at": NOW,
        "updated_at": NOW,
        "archived_at": None,
    }
    r = service.client.put(
        "/v1/models/late", json=binary_model(windows=["P14D"]), headers=service.headers()
    )
    assert r.status_code == 200 and r.json()["windows"] == ["P14D"]
    assert service.client.get("/v1/models/late", headers=service.headers("read")).json() == (
        r.json()
    )


@pytest.mark.parametrize(
    ("body", "field"),
    [
        ({"kind": "binary"}, "label_horizon"),
        (binary_model(kind="ternary"), "kind"),
        (binary_model(label_horizon="5 days"), "label_horizon"),
        (binary_model(label_horizon="P1M"), "label_horizon"),
        (binary_model(windows=["PT36H"]), "windows"),
        (binary_model(windows=[]), "windows"),
        (binary_model(segment_keys=["re gion"]), "segment_keys"),
        (binary_model(crosses=[["region", "depot"]]), ""),
        (binary_model(classes=["a", "b"]), ""),
        (multiclass_model(classes=["a"]), ""),
        (multiclass_model(missing_outcome="negative"), ""),
        (
            binary_model(baseline={"start": "2026-05-02T00:00:00Z", "end": "2026-05-01T00:00:00Z"}),
            "baseline",
        ),
        (binary_model(colour="red"), "colour"),
    ],
)
def test_invalid_declarations_are_422(service: Service, body: dict, field: str) -> None:
    r = service.client.put("/v1/models/late", json=body, headers=service.headers())
    assert r.status_code == 422, r.text
    details = r.json()["error"]["details"]
    assert details and all("reason" in d for d in details)
    if field:
        assert any(d["field"].startswith(field) for d in details), details


def test_invalid_model_name(service: Service) -> None:
    r = service.client.put("/v1/models/-bad", json=binary_model(), headers=service.headers())
    assert r.status_code == 422


def test_fixed_fields_cannot_change_once_rows_exist(service: Service) -> None:
    service.put_model("late", binary_model())
    # Before any row, anything may change.
    service.put_model("late", binary_model(label_horizon="P6D"))
    service.post("/v1/models/late/predictions", {"predictions": [prediction(1)]})
    for change in ({"label_horizon": "P7D"},):
        r = service.client.put(
            "/v1/models/late", json=binary_model(**change), headers=service.headers()
        )
        assert r.status_code == 409
        assert "label_horizon cannot change" in r.json()["error"]["message"]
    r = service.client.put(
        "/v1/models/late", json=multiclass_model(label_horizon="P6D"), headers=service.headers()
    )
    assert r.status_code == 409
    # Other fields still can.
    service.put_model("late", binary_model(label_horizon="P6D", description="new words"))


def test_list_pages_with_a_cursor(service: Service) -> None:
    for name in ("c", "a", "b", "d"):
        service.put_model(name, binary_model())
    seen, cursor = [], None
    while True:
        params = {"limit": 3} | ({"cursor": cursor} if cursor else {})
        page = service.client.get("/v1/models", params=params, headers=service.headers()).json()
        seen += [m["name"] for m in page["models"]]
        cursor = page["next_cursor"]
        if cursor is None:
            break
    assert seen == ["a", "b", "c", "d"]
    bad = service.client.get("/v1/models", params={"cursor": "%%%"}, headers=service.headers())
    assert bad.status_code == 422


def test_delete_archives_and_put_restores(service: Service) -> None:
    service.put_model("late", binary_model())
    service.post("/v1/models/late/predictions", {"predictions": [prediction(1)]})
    r = service.client.delete("/v1/models/late", headers=service.headers())
    assert r.status_code == 200 and r.json()["archived_at"] == NOW
    names = [
        m["name"]
        for m in service.client.get("/v1/models", headers=service.headers()).json()["models"]
    ]
    assert names == []
    # The data stays; GET still shows the archived declaration.
    assert service.client.get("/v1/models/late", headers=service.headers()).status_code == 200
    assert service.client.delete("/v1/models/late", headers=service.headers()).status_code == 404
    service.put_model("late", binary_model())
    r = service.post("/v1/models/late/predictions", {"predictions": [prediction(1)]})
    assert r.json() == {"accepted": 0, "duplicates": 1}


def test_toml_declarations_apply_at_start_idempotently(engine: Engine, tmp_path: Path) -> None:
    config = tmp_path / "plumbwatch.toml"
    config.write_text(
        "max_batch_rows = 500\n"
        '[models.late]\nkind = "binary"\nlabel_horizon = "P5D"\nsegment_keys = ["region"]\n'
        '[models.route]\nkind = "multiclass"\nclasses = ["a", "b"]\nlabel_horizon = "P2D"\n'
    )
    settings = Settings(config=str(config), database_url=str(engine.url))
    assert settings.max_batch_rows == 500
    apply_declarations(engine, settings.models, now_us=1)
    apply_declarations(engine, settings.models, now_us=2)
    with engine.connect() as conn:
        late = get(conn=conn, name="late")
        route = get(conn=conn, name="route")
    assert late is not None and route is not None
    assert late.updated_at_us == 1  # the second start changed nothing
    assert route.classes == ["a", "b"]


def test_bad_toml_declaration_names_the_model(engine: Engine) -> None:
    with pytest.raises(ConfigError, match=r"\[models.late\] in the config file: label_horizon"):
        apply_declarations(engine, {"late": {"kind": "binary"}}, now_us=1)
