"""Which rows a run feeds to the evidence streams, in maturity order, and what it counts.

A run feeds (see ``evaluate/evidence.py`` for why):

1. backfills: rows received since the last run whose ``predicted_at`` the evidence
   frontier had already passed;
2. rows the frontier passed in this run, ``e0 < predicted_at <= e1``, by
   ``(predicted_at, id)``.

The second set mostly lies in the range the sketch deltas read anyway
(``f0 < predicted_at <= f1``, in the same order, with the same outcome state), so
those rows are taken from that pass (:meth:`Rows.observe`, handed to
``deltas.collect``) instead of being read twice: on a first run over millions of
rows this halves the reading. Only the part before the sketch frontier ``f0`` (for
regular runs, the rows of the last interval that waited out the grace) is read
here.
"""

from __future__ import annotations

from array import array
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import orjson
import sqlalchemy as sa

from plumbwatch.evaluate.cohorts import RowState, state_lookup
from plumbwatch.store.evidence import EvidenceCursor
from plumbwatch.store.tables import outcome_revisions, outcomes, predictions

NEG_INF = -(2**62)
_CHUNK = 50_000


@dataclass
class Rows:
    """Rows to feed, in order, with their (version, segments) combination."""

    multiclass: bool = False
    combos: dict[tuple[str, str | None], int] = field(default_factory=dict)
    cid: array[int] = field(default_factory=lambda: array("q"))
    at: array[int] = field(default_factory=lambda: array("q"))
    y: array[int] = field(default_factory=lambda: array("q"))
    # Binary: an array of doubles (millions of retained float objects cost a first run
    # about a tenth of its time); multiclass: lists of class probabilities.
    p: Any = None
    skipped: int = 0

    def __post_init__(self) -> None:
        if self.p is None:
            self.p = [] if self.multiclass else array("d")

    def observe(
        self, at: int, prob: Any, version: str, segments: str | None, state: RowState
    ) -> None:
        """Take one row in maturity order with its state at this run."""
        if not state.included:
            self.skipped += 1
            return
        combo = self.combos.get((version, segments))
        if combo is None:
            combo = self.combos[(version, segments)] = len(self.combos)
        self.cid.append(combo)
        self.at.append(at)
        self.y.append(state.y)
        self.p.append(orjson.loads(prob) if self.multiclass else prob)

    def observer(self) -> Callable[[int, Any, str, str | None, RowState], None]:
        """:meth:`observe` with everything it touches bound locally: the deltas' pass
        calls it for every newly matured row of a first run, millions of times."""
        combos, cid, at_, y_, p_ = self.combos, self.cid, self.at, self.y, self.p
        add_c, add_at, add_y, add_p = cid.append, at_.append, y_.append, p_.append
        parse = orjson.loads if self.multiclass else None

        def observe(at: int, prob: Any, version: str, segments: str | None, s: RowState) -> None:
            if not s.included:
                self.skipped += 1  # rare: a plain attribute update will do
                return
            key = (version, segments)
            combo = combos.get(key)
            if combo is None:
                combo = combos[key] = len(combos)
            add_c(combo)
            add_at(at)
            add_y(s.y)
            add_p(parse(prob) if parse else prob)

        return observe

    @property
    def count(self) -> int:
        return len(self.cid) + self.skipped

    def then(self, later: Rows) -> Rows:
        """These rows followed by ``later``'s (one combination numbering)."""
        if not later.count:
            return self
        if not self.count:
            return later
        out = Rows(
            self.multiclass,
            dict(self.combos),
            array("q", self.cid),
            array("q", self.at),
            array("q", self.y),
            list(self.p) if self.multiclass else array("d", self.p),
            self.skipped + later.skipped,
        )
        renumber = [0] * len(later.combos)
        for key, c in later.combos.items():
            found = out.combos.get(key)
            if found is None:
                found = out.combos[key] = len(out.combos)
            renumber[c] = found
        mapped = np.asarray(renumber, dtype=np.int64)[np.frombuffer(later.cid, np.int64)]
        out.cid.frombytes(mapped.tobytes())
        out.at.extend(later.at)
        out.y.extend(later.y)
        out.p.extend(later.p)
        return out

    def arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        cid = np.frombuffer(self.cid, dtype=np.int64)
        at = np.frombuffer(self.at, dtype=np.int64)
        y = np.frombuffer(self.y, dtype=np.int64)
        p = np.asarray(self.p, dtype=np.float64) if self.multiclass else np.frombuffer(self.p)
        return cid, at, y, p


@dataclass(frozen=True)
class Frontiers:
    """The evidence frontier before (``e0``) and after (``e1``) this run, the sketch
    frontier before it (``f0``), and the evidence cursor's prediction id."""

    e0: int
    e1: int
    f0: int
    p0: int

    @property
    def observed(self) -> tuple[int, int]:
        """The range taken from the deltas' pass: ``(max(e0, f0), e1]``."""
        return max(self.e0, self.f0), self.e1

    def watcher(self, rows: Rows) -> tuple[int, int, Callable[..., None]]:
        lower, upper = self.observed
        return lower, upper, rows.observer()


def read(
    conn: sa.Connection,
    *,
    model_id: int,
    multiclass: bool,
    horizon_us: int,
    missing_negative: bool,
    max_prediction_id: int,
    frontiers: Frontiers,
) -> tuple[Rows, Rows]:
    """(backfills, rows between the old evidence frontier and the sketch frontier)."""
    p, o = predictions.c, outcomes.c
    prob = p.probabilities if multiclass else p.probability
    joined = (
        sa.select(p.predicted_at_us, prob, p.version, p.segments, o.outcome, o.observed_at_us)
        .select_from(predictions.outerjoin(outcomes, o.prediction_id == p.id))
        .where(p.model_id == model_id, p.id <= max_prediction_id)
    )
    f = frontiers
    backfills, gap = Rows(multiclass), Rows(multiclass)
    state_of = state_lookup(horizon_us=horizon_us, missing_negative=missing_negative)
    work = []
    if f.e0 > NEG_INF:
        work.append((backfills, joined.where(p.id > f.p0, p.predicted_at_us <= f.e0)))
    if f.e0 < min(f.e1, f.f0):
        where = sa.and_(p.predicted_at_us > f.e0, p.predicted_at_us <= min(f.e1, f.f0))
        work.append((gap, joined.where(where)))
    for rows, query in work:
        ordered = query.order_by(p.predicted_at_us, p.id).execution_options(yield_per=_CHUNK)
        for at, pr, version, segments, outcome, observed in conn.execute(ordered):
            state = state_of(at, outcome, observed)
            rows.observe(at, pr, version, segments, state)
    return backfills, gap


def afterwards(
    conn: sa.Connection,
    *,
    model_id: int,
    previous: EvidenceCursor,
    seqs: tuple[int, int, int],
) -> list[tuple[str, int, int, str, str | None]]:
    """Outcomes that arrived (``late_labels``), and corrections made (``corrections``),
    after their row was fed: ``(kind, prediction id, predicted_at, version, segments)``."""
    p, o, r = predictions.c, outcomes.c, outcome_revisions.c
    fed = sa.and_(p.id <= previous.prediction_seq, p.predicted_at_us <= previous.frontier_us)
    late = (
        sa.select(p.id, p.predicted_at_us, p.version, p.segments)
        .select_from(outcomes.join(predictions, p.id == o.prediction_id))
        .where(o.model_id == model_id, o.id > previous.outcome_seq, o.id <= seqs[1], fed)
    )
    corrected = (
        sa.select(p.id, p.predicted_at_us, p.version, p.segments)
        .select_from(
            outcome_revisions.join(outcomes, o.id == r.outcome_id).join(
                predictions, p.id == o.prediction_id
            )
        )
        .where(
            o.model_id == model_id,
            r.id > previous.revision_seq,
            r.id <= seqs[2],
            o.id <= previous.outcome_seq,  # the fed row had this outcome already
            fed,
        )
    )
    return [
        (kind, *row)
        for query, kind in ((late, "late_labels"), (corrected, "corrections"))
        for row in conn.execute(query)
    ]


__all__ = ["NEG_INF", "Frontiers", "Rows", "afterwards", "read"]
