"""From metrics to verdicts: evidence, drift, false-discovery control, health, advice.

The run (``evaluate/run.py``) builds the window entries; :class:`Assessment` fills,
per entry, ``psi``, ``psi_threshold``, ``ks_statistic``, ``ks_p_value``,
``log_evidence`` and ``log_threshold``, then, over the whole record, the per-run
FDR families, each entry's ``signals`` and ``health``, the model's health (its
worst slice's), and the ``evidence``, ``fdr``, ``baseline`` and
``recalibration`` sections. Entries with ``version: null`` (across versions) read
the evidence and the baseline of the current version: the version of the latest
prediction.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, field
from typing import Any

import sqlalchemy as sa

from plumbwatch.evaluate import advice, advice_multiclass, verdicts
from plumbwatch.evaluate import drift as drift_mod
from plumbwatch.evaluate import evidence as evidence_mod
from plumbwatch.evaluate import fdr as fdr_mod
from plumbwatch.evaluate.cohorts import Window
from plumbwatch.evaluate.drift import Baselines
from plumbwatch.evaluate.evidence import EvidenceRun
from plumbwatch.evaluate.immature import frozen_view
from plumbwatch.evaluate.metrics import health, worst
from plumbwatch.evaluate.options import Options
from plumbwatch.evaluate.slices import SliceSpec, ValueCap
from plumbwatch.store.models import MonitoredModel
from plumbwatch.store.sketches import Bucket, BucketKey, WindowSums, empty_sketch

_EVIDENCE = ("log_evidence", "log_threshold")


@dataclass
class Assessment:
    """What one run knows beyond the window sums; see the module docstring."""

    evidence: EvidenceRun | None
    evidence_missing: str  # the reason for null evidence metrics when ``evidence`` is None
    baselines: Baselines | None
    current_version: str | None
    tolerances: verdicts.Tolerances
    evidence_alpha: float
    fdr_alpha: float
    cusum_arl0: int
    base_health: dict[int, str] = field(default_factory=dict)  # by id() of the entry
    score_drift: dict[int, bool] = field(default_factory=dict)
    _evidence_families: list[dict[str, Any]] = field(default_factory=list)

    def _reference(self, version: str | None, slice_name: str) -> tuple[Any, str]:
        """The baseline's score counts of this slice, or None and why."""
        if self.baselines is None or version is None:
            return None, "no_baseline"
        if version not in self.baselines.days:
            return None, "baseline_not_matured"
        ref = self.baselines.buckets.get((version, slice_name))
        return (drift_mod.score_counts(ref.sketch) if ref else None), "no_baseline_rows"

    # -- per entry, while the windows are built ---------------------------------------
    def slice_entry(self, w: Window, entry: dict[str, Any], bucket: Bucket) -> None:
        metrics, reasons = entry["metrics"], entry["reasons"]
        version = entry["version"] or self.current_version
        self.base_health[id(entry)] = entry["health"]
        reference, missing = self._reference(version, entry["slice"])
        values, why, exceeds = drift_mod.drift(
            reference, drift_mod.score_counts(bucket.sketch), missing=missing
        )
        self._merge(metrics, reasons, values, why)
        self.score_drift[id(entry)] = exceeds
        stream = (
            self.evidence.streams.get((version, entry["slice"]))
            if (self.evidence and version)
            else None
        )
        if stream is None or self.evidence is None or version is None:
            why_none = self.evidence_missing if self.evidence is None else "no_stream_yet"
            self._merge(
                metrics, reasons, dict.fromkeys(_EVIDENCE), dict.fromkeys(_EVIDENCE, why_none)
            )
        else:
            self._merge(
                metrics,
                reasons,
                {
                    "log_evidence": float(stream.state.log_evidence),
                    "log_threshold": self.evidence.log_threshold(version, self.evidence_alpha),
                },
                {},
            )

    @staticmethod
    def _merge(
        metrics: dict[str, Any],
        reasons: dict[str, str],
        values: dict[str, Any],
        why: dict[str, str],
    ) -> None:
        for name, value in values.items():
            metrics[name] = value
            if value is None and name in why:
                reasons[name] = why[name]
            else:
                reasons.pop(name, None)

    # -- over the record ------------------------------------------------------------
    def finish(self, record: dict[str, Any], immature_scores: dict[str, list[float]]) -> None:
        versions: set[str] = {
            v
            for w in record["windows"]
            for s in w["slices"]
            if (v := s["version"] or self.current_version) is not None
        }
        e_found = self._evidence_fdr(versions)
        p_found: set[tuple[str, str | None, str]] = set()
        families = []
        for w in record["windows"]:
            by_version: dict[str | None, list[dict[str, Any]]] = {}
            for s in w["slices"]:
                if self.base_health.get(id(s)) == "ok":
                    by_version.setdefault(s["version"], []).append(s)
            for version, entries in by_version.items():
                fam = fdr_mod.p_value_discoveries(
                    entries, alpha=self.fdr_alpha, window=w["window"], version=version
                )
                families.append(fam)
                p_found |= {(w["window"], version, d["slice"]) for d in fam["discoveries"]}
        states = []
        for w in record["windows"]:
            for s in w["slices"]:
                base = self.base_health.get(id(s), s["health"])
                version = s["version"] or self.current_version
                log_e, log_t = s["metrics"].get("log_evidence"), s["metrics"].get("log_threshold")
                sig = verdicts.signals(
                    s["metrics"],
                    base,
                    evidence=log_e is not None and log_t is not None and log_e >= log_t,
                    fdr=(version, s["slice"]) in e_found
                    or (w["window"], s["version"], s["slice"]) in p_found,
                    tol=self.tolerances,
                )
                s["signals"] = {**sig, "score_drift": self.score_drift.get(id(s), False)}
                s["health"] = verdicts.health(base, sig)
                states.append(s["health"])
        record["health"] = worst(states)
        record["fdr"] = {
            "alpha": self.fdr_alpha,
            "evidence": self._evidence_families,
            "p_values": families,
        }
        record["evidence"] = (
            self.evidence.entries(versions, alpha=self.evidence_alpha, cusum_arl0=self.cusum_arl0)
            if self.evidence
            else []
        )
        if self.evidence is not None:
            record["evidence_feed"] = self.evidence.feed
        record["baseline"] = self.baselines.record() if self.baselines else {}
        self._immature(record["immature"], immature_scores)

    def _evidence_fdr(self, versions: set[str]) -> set[tuple[str, str]]:
        if self.evidence is None:
            return set()
        by_version: dict[str, dict[str, float]] = {}
        for (v, s), stream in self.evidence.streams.items():
            if v in versions:
                by_version.setdefault(v, {})[s] = float(stream.state.log_evidence)
        self._evidence_families = fdr_mod.evidence_discoveries(by_version, alpha=self.fdr_alpha)
        return {(f["version"], s) for f in self._evidence_families for s in f["discoveries"]}

    def _immature(self, entries: list[dict[str, Any]], scores: dict[str, list[float]]) -> None:
        for entry in entries:
            reference, missing = self._reference(self.current_version, entry["slice"])
            current = drift_mod.histogram(scores.get(entry["slice"], []))
            values, why, exceeds = drift_mod.drift(reference, current, missing=missing)
            entry["metrics"].update(values)
            entry["reasons"] = {k: v for k, v in why.items() if values.get(k) is None}
            entry["signals"] = {"score_drift": exceeds}


def build(
    conn: sa.Connection,
    model: MonitoredModel,
    options: Options,
    windows: list[Window],
    version_now: str | None,
    replay_backwards: bool,
    pending: evidence_mod.Pending | None,
    *,
    as_of_us: int,
    seqs: tuple[int, int, int],
    spec: SliceSpec,
    cap: ValueCap,
    touched: dict[BucketKey, Bucket],
    buckets: dict[BucketKey, Bucket],
) -> Assessment:
    """Advance the evidence streams and resolve the baselines for one run."""
    decl = model.declaration
    horizon_us = decl.label_horizon_seconds * 1_000_000
    ev = None
    if pending is not None:
        ev = evidence_mod.advance(
            conn,
            pending,
            model_id=model.id,
            n_classes=len(model.classes),
            spec=spec,
            cap=cap,
            horizon_us=horizon_us,
            missing_negative=decl.missing_outcome == "negative",
            as_of_us=as_of_us,
            seqs=seqs,
            cusum_arl0=options.cusum_arl0,
        )
    baselines = None
    if options.evidence:
        first = windows[0]  # the model's first declared window sets the baseline's length
        in_windows = {
            v for v, day, _ in buckets if any(w.first_day <= day < w.end_day for w in windows)
        }
        baselines = drift_mod.resolve_baselines(
            conn,
            model,
            window_days=first.end_day - first.first_day,
            complete_day=first.end_day,
            touched=touched,
            wanted=in_windows | ({version_now} if version_now else set()),
        )
        if replay_backwards:
            baselines.fixed_now = []
    return Assessment(
        evidence=ev,
        evidence_missing="backwards_replay" if replay_backwards else "evidence_off",
        baselines=baselines,
        current_version=version_now,
        tolerances=options.tolerances,
        evidence_alpha=options.evidence_alpha,
        fdr_alpha=options.fdr_alpha,
        cusum_arl0=options.cusum_arl0,
    )


def recalibration(
    conn: sa.Connection,
    model: MonitoredModel,
    options: Options,
    windows: list[Window],
    buckets: dict[BucketKey, Bucket],
    window_sums: dict[str, WindowSums],
    assessment: Assessment,
    *,
    spec: SliceSpec,
    cap: ValueCap,
) -> dict[str, Any] | None:
    """Advice on the latest matured window: the shortest declared window in which the
    current version's overall slice has enough events for a verdict (``min_events``)."""
    version = assessment.current_version
    if not options.evidence or version is None or assessment.baselines is None:
        return None
    k = len(model.classes)
    for w in sorted(windows, key=lambda w: w.end_day - w.first_day):
        sums: dict[str, Bucket] = defaultdict(lambda: Bucket(empty_sketch(k)))
        sums.update((name, b) for (v, name), b in window_sums[w.name][1].items() if v == version)
        enough = {
            name
            for name, b in sums.items()
            if health(b, min_events=options.min_events, multiclass_model=k > 0) == "ok"
        }
        if "overall" in enough:
            break
    else:
        return None
    if k:
        return advice_multiclass.advise_multiclass(
            conn,
            model_id=model.id,
            version=version,
            window=w,
            horizon_us=model.declaration.label_horizon_seconds * 1_000_000,
            spec=spec,
            cap=frozen_view(cap),
            window_buckets=sums,
            baselines=assessment.baselines.buckets,
            enough=enough,
            tol=options.tolerances,
        )
    return advice.advise(
        buckets=buckets,
        version=version,
        window=w,
        baselines=assessment.baselines.buckets,
        enough=enough,
        tol=options.tolerances,
    )


__all__ = ["Assessment", "build", "recalibration"]
