"""Rules, sinks and routes declared in the TOML file."""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlalchemy.engine import Engine

from plumbwatch.alerts.rules import Defaults, model_rules
from plumbwatch.alerts.sinks import build_sinks
from plumbwatch.config import load_settings
from plumbwatch.store.models import apply_declarations, get

CONFIG = """
evidence_alpha = 0.005

[models.late-delivery]
kind = "binary"
label_horizon = "P6D"
segment_keys = ["region", "tier"]

[[models.late-delivery.rules]]
name = "calibration"
condition = "evidence"
slices = ["overall", "region:*"]
sinks = ["data-team"]

[[models.late-delivery.rules]]
name = "coast-oe"
condition = "metric"
metric = "oe_ratio"
above = 1.25
below = 0.8
slices = ["region:north-coast"]
severity = "warning"

[sinks.data-team]
type = "log"

[routes]
warning = ["data-team"]
"""


def test_rules_sinks_and_routes_from_the_file(
    engine: Engine, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    file = tmp_path / "pw.toml"
    file.write_text(CONFIG)
    monkeypatch.setenv("PLUMBWATCH_CONFIG", str(file))
    settings = load_settings()
    apply_declarations(engine, settings.models, now_us=0)
    with engine.connect() as conn:
        model = get(conn=conn, name="late-delivery")
    assert model is not None
    rules = model_rules(model.declaration, Defaults.from_settings(settings))
    assert [(r.name, r.condition, r.severity) for r in rules] == [
        ("calibration", "evidence", "critical"),
        ("coast-oe", "metric", "warning"),
    ]
    assert rules[0].slices == ("overall", "region:*") and rules[0].sinks == ("data-team",)
    assert (rules[1].above, rules[1].below) == (1.25, 0.8)
    sinks = build_sinks(settings)
    assert sinks.routing.sinks_for("warning") == ["data-team"]
    assert sinks.routing.sinks_for("critical", rules[0].sinks) == ["data-team"]
    assert Defaults.from_settings(settings).evidence_alpha == 0.005
