"""The JSON shape of an alert rule, as declared in ``PUT /v1/models/{model}`` ``"rules"``
and in ``[[models.<name>.rules]]`` of the TOML file.

::

    {"name": "coast-calibration",          required; unique within the model
     "condition": "evidence",               evidence | metric | no_predictions | no_outcomes
     "metric": "ece_debiased",              metric: a metric name of the status record, or log_oe
     "above": 0.05, "below": null,          metric: holds when value > above or value < below
     "alpha": 0.01,                         evidence: paging level (default: evidence_alpha)
     "window": "P7D",                       default: the model's first window
     "slices": ["overall", "region:*"],     shell patterns on slice names; default ["*"]
     "materiality": {"ece_debiased": 0.03, "log_oe": 0.1},
                                            effect sizes, material when ANY is >= its tolerance;
                                            default (evidence): the materiality_* settings;
                                            {} or default (metric): no materiality test
     "min_events": 100,                     events and non-events in the window (default: setting)
     "raise_after": 2, "clear_after": 3,    consecutive evaluations (hysteresis)
     "severity": "critical",                critical | warning | info
     "sinks": ["webhook", "log"],           default: the route of the severity, else every sink
     "after": "P1D"}                        no_predictions / no_outcomes: how long

``log_oe`` is ``|ln(oe_ratio)|``. Unset fields take their defaults when the rule is
evaluated (see ``plumbwatch.alerts.rules``), so a changed setting reaches every rule
that did not set it.
"""

from __future__ import annotations

import math
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from plumbwatch.timefmt import parse_duration

RULE_NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$"
CONDITIONS = ("evidence", "metric", "no_predictions", "no_outcomes")
SEVERITIES = ("critical", "warning", "info")
# Effect sizes computed from the metrics rather than read from them.
DERIVED_METRICS = ("log_oe",)


class RuleSpec(BaseModel):
    """One alert rule of a model (unset fields take defaults at evaluation)."""

    model_config = ConfigDict(extra="forbid")

    name: str = Field(pattern=RULE_NAME_PATTERN, description="unique within the model")
    condition: Literal["evidence", "metric", "no_predictions", "no_outcomes"]
    metric: str | None = Field(None, max_length=200, description="metric: the value tested")
    above: float | None = Field(None, description="metric: holds when the value is above")
    below: float | None = Field(None, description="metric: holds when the value is below")
    alpha: float | None = Field(None, gt=0, lt=1, description="evidence: paging level")
    window: str | None = Field(None, description="which window's slices (default: the first)")
    slices: list[str] | None = Field(
        None, min_length=1, description="shell patterns on slice names (default: all)"
    )
    materiality: dict[str, float] | None = Field(
        None, description="effect size -> tolerance; material when any is at or over it"
    )
    min_events: int | None = Field(None, ge=0, description="events and non-events needed")
    raise_after: int | None = Field(None, ge=1, le=1000, description="evaluations to raise")
    clear_after: int | None = Field(None, ge=1, le=1000, description="evaluations to clear")
    severity: Literal["critical", "warning", "info"] | None = None
    sinks: list[str] | None = Field(None, description="sink names (default: by severity)")
    after: str | None = Field(None, description="freshness: ISO 8601 duration")

    @field_validator("window", "after")
    @classmethod
    def _duration(cls, value: str | None) -> str | None:
        if value is not None and parse_duration(value).total_seconds() <= 0:
            raise ValueError("must be a positive duration")
        return value

    @field_validator("above", "below")
    @classmethod
    def _finite(cls, value: float | None) -> float | None:
        if value is not None and not math.isfinite(value):
            raise ValueError("must be a finite number")
        return value

    @field_validator("materiality")
    @classmethod
    def _tolerances(cls, value: dict[str, float] | None) -> dict[str, float] | None:
        for name, tolerance in (value or {}).items():
            if not name or len(name) > 200:
                raise ValueError("effect size names are 1-200 characters")
            if not math.isfinite(tolerance) or tolerance < 0:
                raise ValueError(f"tolerance of {name} must be a finite number >= 0")
        return value

    @model_validator(mode="after")
    def _consistent(self) -> RuleSpec:
        c = self.condition
        if c == "metric":
            if not self.metric:
                raise ValueError("a metric rule names its metric")
            if self.above is None and self.below is None:
                raise ValueError("a metric rule sets above, below or both")
        else:
            for field in ("metric", "above", "below"):
                if getattr(self, field) is not None:
                    raise ValueError(f"{field} is for metric rules only")
        if c != "evidence" and self.alpha is not None:
            raise ValueError("alpha is for evidence rules only")
        if c in ("no_predictions", "no_outcomes"):
            for field in ("window", "slices", "materiality", "min_events"):
                if getattr(self, field) is not None:
                    raise ValueError(f"{field} does not apply to a {c} rule")
        elif self.after is not None:
            raise ValueError("after is for no_predictions and no_outcomes rules only")
        return self


def check_rule_names(rules: list[RuleSpec]) -> None:
    names = [r.name for r in rules]
    if len(set(names)) != len(names):
        raise ValueError("rule names must be distinct within a model")
