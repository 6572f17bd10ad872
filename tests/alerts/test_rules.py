"""The pure rules on hand-built records: condition, materiality, minimum events,
slice patterns, the alpha of a rule, freshness, defaults, and health marking."""

from __future__ import annotations

import math
from typing import Any

import pytest
from pydantic import ValidationError

from plumbwatch.alerts.process import mark_health
from plumbwatch.alerts.rules import (
    Defaults,
    Freshness,
    effect,
    judge,
    model_rules,
    resolve,
)
from plumbwatch.declarations import ModelDeclaration
from plumbwatch.rulespec import RuleSpec
from tests.alerts.records import entry, record, stream

DEFAULTS = Defaults()
DECL = ModelDeclaration.model_validate({"kind": "binary", "label_horizon": "P1D"})


def rule(**fields: Any):  # type: ignore[no-untyped-def]
    spec = RuleSpec.model_validate({"name": "r", "condition": "evidence", **fields})
    return resolve(spec, DECL, DEFAULTS)


def verdicts(r, rec):  # type: ignore[no-untyped-def]
    return {v.slice: v for v in judge(r, rec, defaults=DEFAULTS)}


# K = 3 slices at alpha 0.01: threshold ln(300) = 5.70 nats (Ville + Bonferroni, METHODS 7.4).
THRESHOLD = math.log(3 / 0.01)


def test_evidence_rule_needs_crossing_materiality_and_events() -> None:
    rec = record(
        [
            entry("overall"),
            # crossed, material (|ln 1.3| = 0.26 >= 0.1), enough events
            entry("region:coast", oe=1.3, ece=0.05),
            # crossed, not material
            entry("region:inland", oe=1.02, ece=0.01),
            # crossed, material, too few non-events (min(90, 10) < 100)
            entry("region:hills", n=100, events=90, oe=1.5, ece=0.2),
        ],
        [
            stream("overall", 1.0),
            stream("region:coast", THRESHOLD + 0.5),
            stream("region:inland", THRESHOLD + 3.0),
            stream("region:hills", THRESHOLD + 3.0),
        ],
    )
    found = verdicts(rule(), rec)
    assert [s for s, v in found.items() if v.holds] == ["region:coast"]
    coast = found["region:coast"]
    assert coast.values["log_evidence"] == pytest.approx(THRESHOLD + 0.5)
    assert coast.values["log_threshold"] == pytest.approx(THRESHOLD)
    assert coast.values["log_oe"] == pytest.approx(math.log(1.3))
    assert coast.values["material"] and coast.values["enough_events"]
    assert found["region:inland"].values["material"] is False
    assert found["region:hills"].values["enough_events"] is False
    assert found["overall"].holds is False  # below the threshold


def test_evidence_just_below_the_threshold_does_not_hold() -> None:
    rec = record([entry("overall", oe=1.5, ece=0.1)], [stream("overall", THRESHOLD - 1e-9)])
    assert verdicts(rule(), rec)["overall"].holds is False
    rec = record([entry("overall", oe=1.5, ece=0.1)], [stream("overall", THRESHOLD)])
    assert verdicts(rule(), rec)["overall"].holds is True  # e >= K/alpha pages


def test_a_stricter_alpha_raises_the_threshold_by_its_ratio() -> None:
    # K/alpha with alpha 0.001 instead of the setting's 0.01: ln(K/0.001) = ln(K/0.01) + ln 10.
    rec = record([entry("overall", oe=1.5, ece=0.1)], [stream("overall", THRESHOLD + 1.0)])
    strict = verdicts(rule(alpha=0.001), rec)["overall"]
    assert strict.values["log_threshold"] == pytest.approx(math.log(3 / 0.001))
    assert strict.holds is False  # ln 10 = 2.30 > 1.0
    assert verdicts(rule(alpha=0.01), rec)["overall"].holds is True


def test_the_strongest_version_stream_speaks_and_its_metrics_judge_materiality() -> None:
    rec = record(
        [
            entry("overall", oe=1.02, ece=0.01),  # across versions: not material
            entry("overall", version="v1", oe=1.0, ece=0.0),
            entry("overall", version="v2", oe=1.4, ece=0.08),
        ],
        [stream("overall", 1.0, version="v1"), stream("overall", THRESHOLD + 2, version="v2")],
    )
    found = verdicts(rule(), rec)["overall"]
    assert found.holds and found.version == "v2"
    assert found.values["evidence_version"] == "v2"
    assert found.entries == (("P7D", "overall", None), ("P7D", "overall", "v2"))


def test_without_an_evidence_list_the_slice_metrics_stand_in() -> None:
    rec = record([entry("overall", oe=1.5, ece=0.1, log_evidence=9.0, log_threshold=5.0)], None)
    assert verdicts(rule(), rec)["overall"].holds
    no_evidence = record([entry("overall", oe=1.5, ece=0.1)])
    assert not verdicts(rule(), no_evidence)["overall"].holds


def test_metric_rule_above_and_below_and_log_oe() -> None:
    rec = record(
        [
            entry("overall", oe=1.0),
            entry("region:coast", oe=0.7),  # |ln 0.7| = 0.357
            entry("region:inland", oe=1.1),  # |ln 1.1| = 0.095
        ]
    )
    r = rule(condition="metric", metric="log_oe", above=0.2, min_events=0)
    assert [s for s, v in verdicts(r, rec).items() if v.holds] == ["region:coast"]
    low = rule(condition="metric", metric="oe_ratio", below=0.8, min_events=0)
    assert [s for s, v in verdicts(low, rec).items() if v.holds] == ["region:coast"]
    band = rule(condition="metric", metric="oe_ratio", above=1.05, below=0.8, min_events=0)
    assert {s for s, v in verdicts(band, rec).items() if v.holds} == {
        "region:coast",
        "region:inland",
    }


def test_a_null_metric_never_holds() -> None:
    rec = record([entry("overall", oe=None, ece=None)])
    r = rule(condition="metric", metric="ece_debiased", above=0.0, min_events=0)
    assert verdicts(r, rec)["overall"].holds is False
    assert effect({"oe_ratio": 0.0}, "log_oe") == math.inf
    assert effect({"oe_ratio": None}, "log_oe") is None
    assert effect({"flag": True}, "flag") is None


def test_slice_patterns() -> None:
    rec = record([entry("overall", oe=2.0), entry("region:coast", oe=2.0), entry("tier:x", oe=2.0)])
    r = rule(condition="metric", metric="oe_ratio", above=1.5, min_events=0, slices=["region:*"])
    assert list(verdicts(r, rec)) == ["region:coast"]


def test_rule_window_other_than_the_first() -> None:
    rec = record([entry("overall", oe=2.0)], window="P28D")
    r = rule(condition="metric", metric="oe_ratio", above=1.5, min_events=0)
    assert r.window == "P7D" and judge(r, rec, defaults=DEFAULTS) == []
    r28 = rule(condition="metric", metric="oe_ratio", above=1.5, min_events=0, window="P28D")
    assert verdicts(r28, rec)["overall"].holds


def test_freshness_rules() -> None:
    day = 86_400_000_000
    as_of = 100 * day
    quiet = rule(condition="no_predictions", after="P1D")
    assert judge(quiet, record([]), defaults=DEFAULTS) == []  # no facts, no verdict
    facts = Freshness(as_of_us=as_of, last_prediction_us=as_of - 2 * day)
    (v,) = judge(quiet, record([]), defaults=DEFAULTS, freshness=facts)
    assert v.holds and v.slice == "overall"
    fresh = Freshness(as_of_us=as_of, last_prediction_us=as_of - day // 2)
    assert not judge(quiet, record([]), defaults=DEFAULTS, freshness=fresh)[0].holds
    never = Freshness(as_of_us=as_of, last_prediction_us=None)
    assert not judge(quiet, record([]), defaults=DEFAULTS, freshness=never)[0].holds

    stalled = rule(condition="no_outcomes", after="P2D")
    cases = [(True, False, True), (True, True, False), (False, False, False)]
    for matured, labelled, holds in cases:
        facts = Freshness(as_of_us=as_of, matured_rows=matured, labelled_rows=labelled)
        assert judge(stalled, record([]), defaults=DEFAULTS, freshness=facts)[0].holds is holds


def test_default_rules() -> None:
    rules = model_rules(DECL, DEFAULTS)
    assert [(r.name, r.condition, r.severity) for r in rules] == [
        ("calibration", "evidence", "critical"),
        ("no-predictions", "no_predictions", "warning"),
        ("no-outcomes", "no_outcomes", "warning"),
    ]
    cal = rules[0]
    assert dict(cal.materiality) == {"ece_debiased": 0.03, "log_oe": 0.1}
    assert (cal.min_events, cal.raise_after, cal.clear_after, cal.window) == (100, 2, 3, "P7D")
    assert cal.alpha is None  # the evidence layer's own K/alpha
    negative = DECL.model_copy(update={"missing_outcome": "negative"})
    assert [r.name for r in model_rules(negative, DEFAULTS)] == ["calibration", "no-predictions"]
    none = DECL.model_copy(update={"rules": []})
    assert model_rules(none, DEFAULTS) == []


@pytest.mark.parametrize(
    ("fields", "message"),
    [
        ({"condition": "metric", "metric": "oe_ratio"}, "above, below"),
        ({"condition": "metric", "above": 1}, "names its metric"),
        ({"condition": "evidence", "above": 1.0}, "metric rules only"),
        ({"condition": "metric", "metric": "x", "above": 1, "alpha": 0.1}, "evidence rules only"),
        ({"condition": "evidence", "after": "P1D"}, "after is for"),
        ({"condition": "no_outcomes", "slices": ["*"]}, "does not apply"),
        ({"condition": "evidence", "window": "P0D"}, "positive duration"),
        ({"condition": "evidence", "severity": "loud"}, "severity"),
        ({"condition": "evidence", "materiality": {"ece": -1}}, "tolerance"),
        ({"condition": "evidence", "raise_after": 0}, "raise_after"),
        ({"condition": "evidence", "colour": "red"}, "colour"),
    ],
)
def test_invalid_rules_say_why(fields: dict[str, Any], message: str) -> None:
    with pytest.raises(ValidationError, match=message):
        RuleSpec.model_validate({"name": "r", **fields})


def test_rule_names_are_distinct_in_a_declaration() -> None:
    body = {
        "kind": "binary",
        "label_horizon": "P1D",
        "rules": [{"name": "a", "condition": "evidence"}, {"name": "a", "condition": "evidence"}],
    }
    with pytest.raises(ValidationError, match="distinct"):
        ModelDeclaration.model_validate(body)


def test_health_marks_drifting_where_a_rule_holds_and_the_model_takes_the_worst() -> None:
    rec = record(
        [
            entry("overall", health="ok"),
            entry("region:coast", oe=1.3, ece=0.05),
            # set drifting by an earlier layer, but no rule holds here: watch
            entry("region:inland", health="drifting"),
            entry("region:hills", health="insufficient_data"),
        ],
        [stream("region:coast", THRESHOLD + 1)],
    )
    rules = [rule()]
    found = {"r": verdicts(rules[0], rec)}
    mark_health(rec, rules, found)
    health = {e["slice"]: e["health"] for e in rec["windows"][0]["slices"]}
    assert health == {
        "overall": "ok",
        "region:coast": "drifting",
        "region:inland": "watch",
        "region:hills": "insufficient_data",
    }
    assert rec["health"] == "drifting"
    calm = record([entry("overall"), entry("region:inland", health="drifting")])
    mark_health(calm, rules, {"r": verdicts(rules[0], calm)})
    assert calm["health"] == "watch"


def test_freshness_rules_do_not_mark_health() -> None:
    rec = record([entry("overall")])
    r = rule(condition="no_predictions")
    facts = Freshness(as_of_us=10**12, last_prediction_us=0)
    found = {"r": {v.slice: v for v in judge(r, rec, defaults=DEFAULTS, freshness=facts)}}
    assert found["r"]["overall"].holds
    mark_health(rec, [r], found)
    assert rec["health"] == "ok"
