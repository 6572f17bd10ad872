"""Rules: pure functions from an evaluation record (and freshness facts) to per-slice
verdicts. No database, no clock: the same record always gives the same verdicts.

A calibration rule (``evidence`` or ``metric``) holds on a slice when its condition
holds AND the effect is material AND the window has the minimum number of events
and non-events. The lifecycle (``plumbwatch.alerts.lifecycle``) turns consecutive
verdicts into alerts.

The default rules (a model with ``"rules": null``), after DESIGN.md "Paging":

- ``calibration``: evidence past K/alpha for K slices (Ville's inequality with a
  Bonferroni split; METHODS.md 7.4), material on ``ece_debiased`` or ``|ln O/E|``,
  ``min_events``, raised after 2 consecutive evaluations, cleared after 3.
- ``no-predictions``: no prediction for ``no_predictions_after`` (default P1D).
- ``no-outcomes`` (``missing_outcome = wait`` only: with ``negative`` silence is
  normal): rows matured during the last ``no_outcomes_after`` (default P2D) and not
  one of them has an outcome, the mark of a stalled labelling job.
"""

from __future__ import annotations

import fnmatch
import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from plumbwatch.config import Settings
from plumbwatch.declarations import ModelDeclaration
from plumbwatch.rulespec import RuleSpec
from plumbwatch.timefmt import format_instant, parse_duration

CALIBRATION_CONDITIONS = ("evidence", "metric")
FRESHNESS_CONDITIONS = ("no_predictions", "no_outcomes")


@dataclass(frozen=True)
class Defaults:
    """What an unset rule field means (from the settings)."""

    evidence_alpha: float = 0.01
    materiality_ece: float = 0.03
    materiality_log_oe: float = 0.1
    min_events: int = 100
    no_predictions_after: str = "P1D"
    no_outcomes_after: str = "P2D"
    # Hysteresis: one noisy evaluation neither pages nor clears (common practice).
    raise_after: int = 2
    clear_after: int = 3

    @classmethod
    def from_settings(cls, settings: Settings) -> Defaults:
        return cls(
            evidence_alpha=settings.evidence_alpha,
            materiality_ece=settings.materiality_ece,
            materiality_log_oe=settings.materiality_log_oe,
            min_events=settings.min_events,
            no_predictions_after=settings.no_predictions_after,
            no_outcomes_after=settings.no_outcomes_after,
        )


@dataclass(frozen=True)
class Rule:
    """A rule with every field resolved."""

    name: str
    condition: str
    severity: str
    raise_after: int
    clear_after: int
    window: str | None = None
    slices: tuple[str, ...] = ("*",)
    metric: str | None = None
    above: float | None = None
    below: float | None = None
    alpha: float | None = None  # evidence: None means the evidence work's own level
    materiality: Mapping[str, float] = field(default_factory=dict)
    min_events: int = 0
    sinks: tuple[str, ...] | None = None
    after: str | None = None

    @property
    def calibration(self) -> bool:
        return self.condition in CALIBRATION_CONDITIONS

    def as_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "name": self.name,
            "condition": self.condition,
            "severity": self.severity,
            "raise_after": self.raise_after,
            "clear_after": self.clear_after,
        }
        if self.calibration:
            out.update(
                window=self.window,
                slices=list(self.slices),
                materiality=dict(self.materiality),
                min_events=self.min_events,
            )
        if self.condition == "metric":
            out.update(metric=self.metric, above=self.above, below=self.below)
        if self.condition == "evidence":
            out["alpha"] = self.alpha
        if self.after is not None:
            out["after"] = self.after
        if self.sinks is not None:
            out["sinks"] = list(self.sinks)
        return out


def default_specs(declaration: ModelDeclaration) -> list[RuleSpec]:
    specs = [
        {"name": "calibration", "condition": "evidence", "severity": "critical"},
        {"name": "no-predictions", "condition": "no_predictions", "severity": "warning"},
    ]
    if declaration.missing_outcome == "wait":
        specs.append({"name": "no-outcomes", "condition": "no_outcomes", "severity": "warning"})
    return [RuleSpec.model_validate(spec) for spec in specs]


def _default_materiality(declaration: ModelDeclaration, d: Defaults) -> dict[str, float]:
    if declaration.kind == "multiclass":
        return {"ece_top_label": d.materiality_ece}
    return {"ece_debiased": d.materiality_ece, "log_oe": d.materiality_log_oe}


def resolve(spec: RuleSpec, declaration: ModelDeclaration, d: Defaults) -> Rule:
    condition = spec.condition
    materiality: dict[str, float] = {}
    if spec.materiality is not None:
        materiality = dict(spec.materiality)
    elif condition == "evidence":
        materiality = _default_materiality(declaration, d)
    after = spec.after
    if condition == "no_predictions":
        after = after or d.no_predictions_after
    elif condition == "no_outcomes":
        after = after or d.no_outcomes_after
    calibration = condition in CALIBRATION_CONDITIONS
    return Rule(
        name=spec.name,
        condition=condition,
        severity=spec.severity or ("critical" if calibration else "warning"),
        raise_after=spec.raise_after or d.raise_after,
        clear_after=spec.clear_after or d.clear_after,
        window=(spec.window or declaration.windows[0]) if calibration else None,
        slices=tuple(spec.slices or ("*",)) if calibration else ("overall",),
        metric=spec.metric,
        above=spec.above,
        below=spec.below,
        alpha=spec.alpha,
        materiality=materiality,
        min_events=(spec.min_events if spec.min_events is not None else d.min_events)
        if calibration
        else 0,
        sinks=tuple(spec.sinks) if spec.sinks is not None else None,
        after=after,
    )


def model_rules(declaration: ModelDeclaration, defaults: Defaults) -> list[Rule]:
    """The model's rules, resolved: its own, or the defaults when it declares none."""
    specs = declaration.rules if declaration.rules is not None else default_specs(declaration)
    return [resolve(spec, declaration, defaults) for spec in specs]


# -- verdicts -----------------------------------------------------------------------------


@dataclass(frozen=True)
class Verdict:
    """What one rule says about one slice in one evaluation."""

    slice: str
    holds: bool
    version: str | None = None
    window: str | None = None
    values: dict[str, Any] = field(default_factory=dict)
    # Record entries (window, slice, version) whose health this verdict speaks for.
    entries: tuple[tuple[str, str, str | None], ...] = ()


@dataclass(frozen=True)
class Freshness:
    """Facts the freshness rules need, read from the database as of the evaluation."""

    as_of_us: int
    last_prediction_us: int | None = None
    matured_from_us: int | None = None
    matured_to_us: int | None = None
    matured_rows: bool = False
    labelled_rows: bool = False


def effect(metrics: Mapping[str, Any], name: str) -> float | None:
    """A metric by name, or ``log_oe`` = |ln O/E|; None when it cannot be computed."""
    if name == "log_oe":
        ratio = metrics.get("oe_ratio")
        if not isinstance(ratio, int | float) or ratio < 0:
            return None
        return math.inf if ratio == 0 else abs(math.log(ratio))
    value = metrics.get(name)
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    return float(value)


def matches(slice_name: str, patterns: Iterable[str]) -> bool:
    return any(fnmatch.fnmatchcase(slice_name, p) for p in patterns)


def enough_events(metrics: Mapping[str, Any], minimum: int) -> bool:
    n = metrics.get("n") or 0
    events = metrics.get("events")
    if isinstance(events, int | float):  # binary: events and non-events
        return min(events, n - events) >= minimum
    correct = metrics.get("top_label_correct")
    if isinstance(correct, int | float):  # multiclass: correct and incorrect top labels
        return min(correct, n - correct) >= minimum
    return n >= minimum


def _best_evidence(
    slice_name: str,
    entry: Mapping[str, Any],
    evidence: list[Mapping[str, Any]],
    shift: float,
) -> tuple[float, dict[str, Any]] | None:
    """The strongest evidence stream of the slice: (margin over the threshold, values).

    Streams are per (version, slice); the record's ``evidence`` list has them. Without
    it, the slice entry's own ``log_evidence``/``log_threshold`` stand in.
    """
    streams = [e for e in evidence if e.get("slice") == slice_name]
    if not streams:
        m = entry.get("metrics", {})
        streams = [
            {
                "version": entry.get("version"),
                "log_evidence": m.get("log_evidence"),
                "log_threshold": m.get("log_threshold"),
            }
        ]
    best: tuple[float, dict[str, Any]] | None = None
    for s in streams:
        log_e, log_t = s.get("log_evidence"), s.get("log_threshold")
        if not isinstance(log_e, int | float) or not isinstance(log_t, int | float):
            continue
        threshold = float(log_t) + shift
        margin = float(log_e) - threshold
        values = {
            "log_evidence": float(log_e),
            "log_threshold": threshold,
            "evidence_version": s.get("version"),
        }
        if s.get("n") is not None:
            values["evidence_n"] = s["n"]
        if best is None or margin > best[0]:
            best = (margin, values)
    return best


def _calibration(rule: Rule, record: Mapping[str, Any], defaults: Defaults) -> list[Verdict]:
    window = next((w for w in record.get("windows", []) if w.get("window") == rule.window), None)
    if window is None:
        return []
    entries = window.get("slices", [])
    per_version = {(e["slice"], e.get("version")): e for e in entries}
    evidence = list(record.get("evidence") or [])
    # The rule's alpha moves the evidence work's threshold K/alpha_setting to K/alpha_rule.
    shift = math.log(defaults.evidence_alpha / rule.alpha) if rule.alpha else 0.0
    verdicts = []
    for entry in entries:
        name = entry["slice"]
        if entry.get("version") is not None or not matches(name, rule.slices):
            continue
        values: dict[str, Any] = {}
        version: str | None = None
        used = entry
        marks: list[tuple[str, str, str | None]] = [(rule.window or "", name, None)]
        if rule.condition == "evidence":
            best = _best_evidence(name, entry, evidence, shift)
            condition = best is not None and best[0] >= 0
            if best is not None:
                values.update(best[1])
                version = best[1]["evidence_version"]
                if (name, version) in per_version:  # judge the effect on that version
                    used = per_version[(name, version)]
                    marks.append((rule.window or "", name, version))
        else:
            assert rule.metric is not None
            value = effect(entry.get("metrics", {}), rule.metric)
            values[rule.metric] = value
            condition = value is not None and (
                (rule.above is not None and value > rule.above)
                or (rule.below is not None and value < rule.below)
            )
        metrics = used.get("metrics", {})
        sizes = {k: effect(metrics, k) for k in rule.materiality}
        material = _material(sizes, rule.materiality)
        enough = enough_events(metrics, rule.min_events)
        values.update({k: v for k, v in sizes.items() if k not in values})
        values.update(
            n=metrics.get("n"),
            events=metrics.get("events"),
            material=material,
            enough_events=enough,
        )
        verdicts.append(
            Verdict(
                slice=name,
                holds=bool(condition and material and enough),
                version=version,
                window=rule.window,
                values=_finite(values),
                entries=tuple(marks),
            )
        )
    return verdicts


def _material(sizes: Mapping[str, float | None], tolerances: Mapping[str, float]) -> bool:
    """Material when any effect size reaches its tolerance (no tolerances: always)."""
    if not tolerances:
        return True
    for name, tolerance in tolerances.items():
        value = sizes.get(name)
        if value is not None and value >= tolerance:
            return True
    return False


def _freshness(rule: Rule, facts: Freshness | None) -> list[Verdict]:
    if facts is None:
        return []
    after_us = int(parse_duration(rule.after or "P1D").total_seconds() * 1_000_000)
    values: dict[str, Any] = {"after": rule.after}
    if rule.condition == "no_predictions":
        last = facts.last_prediction_us
        # A model that never had a prediction has not started; nothing has stopped.
        holds = last is not None and facts.as_of_us - last > after_us
        values["last_prediction_at"] = format_instant(last) if last is not None else None
    else:
        holds = facts.matured_rows and not facts.labelled_rows
        if facts.matured_from_us is not None and facts.matured_to_us is not None:
            values["matured_from"] = format_instant(facts.matured_from_us)
            values["matured_to"] = format_instant(facts.matured_to_us)
        values["matured_rows"] = facts.matured_rows
        values["labelled_rows"] = facts.labelled_rows
    return [Verdict(slice="overall", holds=holds, values=values)]


def judge(
    rule: Rule,
    record: Mapping[str, Any],
    *,
    defaults: Defaults,
    freshness: Freshness | None = None,
) -> list[Verdict]:
    """The rule's verdict on every slice it applies to in this record."""
    if rule.calibration:
        return _calibration(rule, record, defaults)
    return _freshness(rule, freshness)


def _finite(values: dict[str, Any]) -> dict[str, Any]:
    # JSON has no infinity: an O/E of 0 (no events at all) reports |ln O/E| as null.
    return {
        k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in values.items()
    }
