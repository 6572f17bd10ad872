"""Cohorts that have not matured: label coverage and label-free figures only.

Calibration of an immature cohort is never reported: positives are often
labelled before negatives, so its observed rate is biased (METHODS.md section 13).
Score drift needs no labels: the scores of the current version's immature rows
are binned per slice on the probability grid (multiclass: the top-label
confidence), for comparison with the version's baseline (``evaluate/drift.py``).
"""

from __future__ import annotations

from collections import defaultdict
from typing import Any

import orjson
import sqlalchemy as sa

from plumbwatch.evaluate.slices import SliceSpec, ValueCap
from plumbwatch.store.tables import outcomes, predictions
from plumbwatch.timefmt import format_instant


def immature_summary(
    conn: sa.Connection,
    *,
    model_id: int,
    spec: SliceSpec,
    cap: ValueCap,
    frontier_us: int,
    as_of_us: int,
    max_prediction_id: int,
    multiclass_model: bool = False,
    version: str | None = None,
) -> tuple[list[dict[str, Any]], dict[str, list[float]]]:
    """The immature entries of the record, and per slice the scores of ``version``'s rows."""
    p, o = predictions.c, outcomes.c
    query = (
        sa.select(
            p.probabilities if multiclass_model else p.probability,
            p.version,
            p.segments,
            o.observed_at_us,
        )
        .select_from(predictions.outerjoin(outcomes, o.prediction_id == p.id))
        .where(
            p.model_id == model_id,
            p.predicted_at_us > frontier_us,
            p.predicted_at_us <= as_of_us,
            p.id <= max_prediction_id,
        )
    )
    totals: dict[str, list[float]] = defaultdict(lambda: [0, 0, 0.0])  # n, labelled, sum p
    names_of: dict[str | None, list[str]] = {}
    scores: dict[str, list[float]] = defaultdict(list)
    frozen = frozen_view(cap)
    for prob, row_version, segments, observed in conn.execute(
        query.execution_options(yield_per=50_000)
    ):
        names = names_of.get(segments)
        if names is None:
            # Immature rows do not add kept values (the cap follows matured data only):
            # a value not kept yet reads as `other` here.
            parsed = orjson.loads(segments) if segments else {}
            names = names_of[segments] = spec.names(parsed, frozen)
        labelled = observed is not None and observed <= as_of_us
        score = max(orjson.loads(prob)) if multiclass_model else prob
        for name in names:
            t = totals[name]
            t[0] += 1
            t[1] += labelled
            t[2] += score
            if row_version == version:
                scores[name].append(score)
    out = []
    for name in sorted(totals, key=lambda n: (n != "overall", n.count(","), n)):
        n, labelled, sum_p = totals[name]
        out.append(
            {
                "slice": name,
                "start": format_instant(frontier_us),
                "end": format_instant(as_of_us),
                "n": int(n),
                "label_coverage": labelled / n,
                "metrics": {
                    "psi": None,
                    "psi_threshold": None,
                    "ks_statistic": None,
                    "ks_p_value": None,
                    "mean_predicted": sum_p / n if multiclass_model is False else None,
                },
            }
        )
    return out, dict(scores)


def frozen_view(cap: ValueCap) -> ValueCap:
    """A view of the cap that folds unknown values into ``other`` without adding them."""
    return ValueCap(cap=0, kept={k: dict(v) for k, v in cap.kept.items()})
