"""A monitored model's declaration: the body of ``PUT /v1/models/{model}``.

The same validation serves the HTTP API and the ``[models.<name>]`` tables of
the TOML file, so a declaration means one thing wherever it comes from.
"""

from __future__ import annotations

import re
from datetime import datetime
from typing import Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    field_serializer,
    field_validator,
    model_validator,
)

from plumbwatch.rulespec import RuleSpec, check_rule_names
from plumbwatch.timefmt import parse_duration, parse_instant

NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,199}$"
SEGMENT_KEY_PATTERN = r"^[A-Za-z0-9_.-]{1,64}$"
DEFAULT_WINDOWS = ("P7D", "P28D")


class Baseline(BaseModel):
    model_config = ConfigDict(extra="forbid")

    start: str
    end: str

    @model_validator(mode="after")
    def _ordered(self) -> Baseline:
        if parse_instant(self.start) >= parse_instant(self.end):
            raise ValueError("baseline start must be before its end")
        return self

    @field_validator("start", "end")
    @classmethod
    def _instant(cls, value: str) -> str:
        parse_instant(value)
        return value


class ModelDeclaration(BaseModel):
    """What plumbwatch needs to know about a model before it accepts its rows."""

    model_config = ConfigDict(extra="forbid")

    kind: Literal["binary", "multiclass"]
    classes: list[str] | None = Field(None, description="multiclass only: the class names")
    label_horizon: str = Field(description="ISO 8601 duration: the outcome window, e.g. P5D")
    missing_outcome: Literal["wait", "negative"] = "wait"
    segment_keys: list[str] = Field(default_factory=list)
    crosses: list[list[str]] = Field(default_factory=list)
    windows: list[str] = Field(default_factory=lambda: list(DEFAULT_WINDOWS))
    baseline: Baseline | None = None
    rules: list[RuleSpec] | None = Field(
        None, description="alert rules (null: the default rules; [] none); see README"
    )
    description: str = Field("", max_length=2000)

    @field_validator("rules")
    @classmethod
    def _rules(cls, value: list[RuleSpec] | None) -> list[RuleSpec] | None:
        if value is not None:
            check_rule_names(value)
        return value

    @field_serializer("rules")
    def _dump_rules(self, value: list[RuleSpec] | None) -> list[dict[str, Any]] | None:
        # As declared: unset fields stay out (they take the current defaults).
        return None if value is None else [r.model_dump(exclude_none=True) for r in value]

    @field_validator("label_horizon")
    @classmethod
    def _horizon(cls, value: str) -> str:
        if parse_duration(value).total_seconds() <= 0:
            raise ValueError("label_horizon must be a positive duration")
        return value

    @field_validator("windows")
    @classmethod
    def _windows(cls, value: list[str]) -> list[str]:
        if not value:
            raise ValueError("at least one window is needed")
        for text in value:
            seconds = parse_duration(text).total_seconds()
            if seconds <= 0 or seconds % 86_400:
                raise ValueError(f"window {text} must be a positive whole number of days")
        if len(set(value)) != len(value):
            raise ValueError("windows must be distinct")
        return value

    @field_validator("segment_keys")
    @classmethod
    def _keys(cls, value: list[str]) -> list[str]:
        for key in value:
            if not re.match(SEGMENT_KEY_PATTERN, key):
                raise ValueError(
                    f"segment key {key!r} must be 1-64 letters, digits, '_', '.' or '-'"
                )
        if len(set(value)) != len(value):
            raise ValueError("segment keys must be distinct")
        return value

    @model_validator(mode="after")
    def _consistent(self) -> ModelDeclaration:
        if self.kind == "multiclass":
            if not self.classes or len(self.classes) < 2:
                raise ValueError("a multiclass model declares at least two classes")
            if len(set(self.classes)) != len(self.classes):
                raise ValueError("class names must be distinct")
            if any(not c or len(c) > 200 for c in self.classes):
                raise ValueError("class names are 1-200 characters")
            if self.missing_outcome == "negative":
                raise ValueError("missing_outcome 'negative' is for binary models only")
        elif self.classes is not None:
            raise ValueError("classes are declared for multiclass models only")
        for cross in self.crosses:
            if len(cross) < 2 or len(set(cross)) != len(cross):
                raise ValueError("a cross names two or more distinct segment keys")
            unknown = [k for k in cross if k not in self.segment_keys]
            if unknown:
                raise ValueError(f"cross {cross} uses undeclared segment keys {unknown}")
        return self

    @property
    def label_horizon_seconds(self) -> int:
        return int(parse_duration(self.label_horizon).total_seconds())


def baseline_instants(baseline: Baseline | None) -> tuple[datetime, datetime] | None:
    if baseline is None:
        return None
    return parse_instant(baseline.start), parse_instant(baseline.end)
