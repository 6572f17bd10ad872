"""What changed since the last run, as row deltas on (version, day, slice) buckets.

Ids are handed out inside each model's write lock, so a cursor of three ids
(predictions, outcomes, outcome revisions) splits all rows into "applied" and
"new", and one read snapshot gives both the new ids and the values they had.
A run applies:

1. predictions that matured since the last run (``f0 < predicted_at <= f1``);
2. predictions received since the last run that had already matured (backfills);
3. outcomes received, and outcomes corrected, since the last run, for predictions
   applied earlier: remove the row's previous contribution, add the new one.

So the work is proportional to what changed, never to the size of a window.
"""

from __future__ import annotations

from array import array
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from itertools import chain
from typing import Any

import numpy as np
import orjson
import sqlalchemy as sa
from numpy.typing import NDArray

from plumbwatch.evaluate import multiclass
from plumbwatch.evaluate.cohorts import DAY_US, RowState, classify, day_of, state_lookup
from plumbwatch.evaluate.slices import SliceSpec, ValueCap
from plumbwatch.stats.sketch import Sketch, merge_bins
from plumbwatch.store.sketches import Bucket, BucketKey, Cursor, empty_sketch
from plumbwatch.store.tables import outcome_revisions, outcomes, predictions

_NEG_INF = -(2**62)
_CHUNK = 50_000


@dataclass
class Deltas:
    """Row contributions to add and to remove, keyed by bucket.

    Rows are recorded once each, against their (version, day, segments) combination,
    and expanded to the buckets of that combination's slices only when applied
    (with numpy, in row order, so every bucket sums its rows in the order they came).
    """

    spec: SliceSpec
    cap: ValueCap
    n_classes: int = 0  # 0: binary; else p is a JSON array of class probabilities
    keys: dict[BucketKey, int] = field(default_factory=dict)
    rows: int = 0
    _slices: dict[str | None, list[str]] = field(default_factory=dict)
    # (version, day, segments) -> combination id; each combination's bucket indices.
    _combos: dict[tuple[str, int, str | None], int] = field(default_factory=dict)
    _combo_buckets: list[list[int]] = field(default_factory=list)
    _counts: list[list[int]] = field(default_factory=list)  # matured, late, unlabelled
    _plus: tuple[array[int], array[float], array[int]] = field(default_factory=lambda: _entries())
    _minus: tuple[array[int], array[float], array[int]] = field(default_factory=lambda: _entries())

    def reset(self) -> None:
        """Forget the collected deltas (after applying them); keep the slice-name cache."""
        self.keys = {}
        self.rows = 0
        self._combos = {}
        self._combo_buckets = []
        self._counts = []
        self._plus = _entries()
        self._minus = _entries()

    def _names(self, segments: str | None) -> list[str]:
        names = self._slices.get(segments)
        if names is None:
            names = self.spec.names(orjson.loads(segments) if segments else {}, self.cap)
            self._slices[segments] = names
        return names

    def _combo(self, version: str, day: int, segments: str | None) -> int:
        keys = self.keys
        buckets = []
        for name in self._names(segments):
            key = (version, day, name)
            index = keys.get(key)
            if index is None:
                index = keys[key] = len(keys)
            buckets.append(index)
        cid = self._combos[(version, day, segments)] = len(self._combo_buckets)
        self._combo_buckets.append(buckets)
        self._counts.append([0, 0, 0])
        return cid

    def add_new(
        self, version: str, predicted_at_us: int, segments: str | None, p: float, after: RowState
    ) -> None:
        """``add_row`` with ``before=None`` (a row applied for the first time), positionally."""
        self.rows += 1
        day = predicted_at_us // DAY_US
        cid = self._combos.get((version, day, segments))
        if cid is None:
            cid = self._combo(version, day, segments)
        counts = self._counts[cid]
        counts[0] += 1
        counts[1] += after.late
        counts[2] += after.unlabelled
        if after.included:
            plus = self._plus
            plus[0].append(cid)
            if self.n_classes:
                plus[1].extend(orjson.loads(p))  # type: ignore[arg-type]
            else:
                plus[1].append(p)
            plus[2].append(after.y)

    def add_row(
        self,
        *,
        version: str,
        predicted_at_us: int,
        segments: str | None,
        p: float,
        before: RowState | None,
        after: RowState,
    ) -> None:
        """Move one row from ``before`` (None: not applied yet) to ``after``."""
        self.rows += 1
        day = day_of(predicted_at_us)
        cid = self._combos.get((version, day, segments))
        if cid is None:
            cid = self._combo(version, day, segments)
        counts = self._counts[cid]
        if before is None:
            counts[0] += 1
        else:
            counts[1] -= before.late
            counts[2] -= before.unlabelled
            if before.included:
                self._push(self._minus, cid, p, before.y)
        counts[1] += after.late
        counts[2] += after.unlabelled
        if after.included:
            self._push(self._plus, cid, p, after.y)

    def _push(
        self, entries: tuple[array[int], array[float], array[int]], cid: int, p: Any, y: int
    ) -> None:
        entries[0].append(cid)
        if self.n_classes:
            entries[1].extend(orjson.loads(p))
        else:
            entries[1].append(p)
        entries[2].append(y)

    def apply_to(self, buckets: Mapping[BucketKey, Bucket]) -> dict[BucketKey, Bucket]:
        """The touched buckets after the deltas (``buckets`` holds their stored state)."""
        n = len(self.keys)
        if n == 0:
            return {}
        lens = np.fromiter((len(b) for b in self._combo_buckets), np.intp)
        flat = np.fromiter(chain.from_iterable(self._combo_buckets), np.intp)
        offsets = np.zeros(lens.size, np.intp)
        np.cumsum(lens[:-1], out=offsets[1:])
        k = self.n_classes
        adds = _grouped(_expand(self._plus, lens, offsets, flat, k), n, k)
        subs = _grouped(_expand(self._minus, lens, offsets, flat, k), n, k)
        counts = np.zeros((n, 3), np.int64)
        np.add.at(counts, flat, np.repeat(np.asarray(self._counts, np.int64), lens, axis=0))
        out = {}
        for (key, i), c in zip(self.keys.items(), counts.tolist(), strict=True):
            base = buckets.get(key) or Bucket(empty_sketch(k))
            sketch = base.sketch
            add, sub = adds.get(i), subs.get(i)
            changed = base.changed  # bins that may differ from the stored sketch
            if add is not None:
                sketch = sketch + add
            if sub is not None:
                sketch = sketch - sub
            if changed is not None:
                moved = [s.held_bins() for s in (add, sub) if s is not None]
                if moved:
                    changed = merge_bins(changed, *moved)
            out[key] = Bucket(
                sketch,
                base.matured + c[0],
                base.late + c[1],
                base.unlabelled + c[2],
                changed,
                base.patched,
            )
        return out


def _entries() -> tuple[array[int], array[float], array[int]]:
    return array("q"), array("d"), array("q")


def _expand(
    entries: tuple[array[int], array[float], array[int]],
    lens: NDArray[np.intp],
    offsets: NDArray[np.intp],
    flat: NDArray[np.intp],
    n_classes: int = 0,
) -> tuple[NDArray[np.intp], NDArray[np.float64], NDArray[np.float64]]:
    """One entry per (row, bucket of its combination), rows in order, buckets in slice order.

    Multiclass: the probabilities come back as a matrix, one row per entry."""
    cids = np.frombuffer(entries[0], dtype=np.int64).astype(np.intp)
    reps = lens[cids]
    total = int(reps.sum())
    starts = np.cumsum(reps) - reps  # first expanded position of each row
    within = np.arange(total, dtype=np.intp) - np.repeat(starts, reps)
    groups = flat[np.repeat(offsets[cids], reps) + within]
    probs = np.frombuffer(entries[1], dtype=np.float64)
    if n_classes:
        probs = probs.reshape(-1, n_classes)
    ps = np.repeat(probs, reps, axis=0)
    ys = np.repeat(np.frombuffer(entries[2], dtype=np.int64).astype(np.float64), reps)
    return groups, ps, ys


def _grouped(
    entries: tuple[NDArray[np.intp], NDArray[np.float64], NDArray[np.float64]],
    n: int,
    n_classes: int = 0,
) -> dict[int, Any]:
    """Sketch of each bucket index that has entries."""
    g, ps, ys = entries
    if not g.size:
        return {}
    if n_classes:
        grouped = multiclass.grouped(g, ps, ys.astype(np.int64), n, n_classes)
        return {i: s for i, s in enumerate(grouped) if s is not None}
    # Sparse: a run's few thousand rows touch thousands of buckets, a few bins each.
    return dict(Sketch.from_arrays_by_group(ys, ps, g))


def _rows(conn: sa.Connection, query: sa.Select[Any]) -> Iterator[Any]:
    yield from conn.execute(query.execution_options(yield_per=_CHUNK))


def _tuples(conn: sa.Connection, query: sa.Select[Any]) -> Iterator[tuple[Any, ...]]:
    rows: Iterator[tuple[Any, ...]] = iter(conn.execute(query.execution_options(yield_per=_CHUNK)))
    return rows


def current_seqs(conn: sa.Connection, *, model_id: int) -> tuple[int, int, int]:
    """The largest prediction, outcome and revision ids of the model in this snapshot."""
    p = conn.execute(
        sa.select(sa.func.coalesce(sa.func.max(predictions.c.id), 0)).where(
            predictions.c.model_id == model_id
        )
    ).scalar_one()
    o = conn.execute(
        sa.select(sa.func.coalesce(sa.func.max(outcomes.c.id), 0)).where(
            outcomes.c.model_id == model_id
        )
    ).scalar_one()
    r = conn.execute(
        sa.select(sa.func.coalesce(sa.func.max(outcome_revisions.c.id), 0))
        .join(outcomes, outcomes.c.id == outcome_revisions.c.outcome_id)
        .where(outcomes.c.model_id == model_id)
    ).scalar_one()
    return int(p), int(o), int(r)


def collect(
    conn: sa.Connection,
    *,
    model_id: int,
    horizon_us: int,
    missing_negative: bool,
    previous: Cursor | None,
    as_of_us: int,
    seqs: tuple[int, int, int],
    deltas: Deltas,
    flush: tuple[int, Callable[[], None]] | None = None,
    watch: tuple[int, int, Callable[..., None]] | None = None,
) -> None:
    """Fill ``deltas`` with everything that changed between ``previous`` and now.

    ``flush = (rows, callback)`` calls ``callback`` whenever that many rows are
    pending, so that a rebuild over millions of rows applies them in pieces.
    ``watch = (lower, upper, callback)`` hands each newly matured row with
    ``lower < predicted_at <= upper`` to ``callback(predicted_at, probability,
    version, segments, state)`` in maturity order (the evidence streams read them
    from this pass instead of a second one).
    """
    p, o = predictions.c, outcomes.c
    f1 = as_of_us - horizon_us
    f0 = previous.as_of_us - horizon_us if previous else _NEG_INF
    p0, o0, r0 = (
        (previous.prediction_seq, previous.outcome_seq, previous.revision_seq)
        if previous
        else (0, 0, 0)
    )
    p1, _, _ = seqs
    # Binary rows carry a number; multiclass rows a JSON array in class order.
    prob_col = p.probabilities if deltas.n_classes else p.probability

    def state(row: sa.Row[Any], outcome: int | None, observed: int | None) -> RowState:
        return classify(
            outcome=outcome,
            observed_at_us=observed,
            predicted_at_us=row.predicted_at_us,
            horizon_us=horizon_us,
            missing_negative=missing_negative,
        )

    joined = (
        sa.select(
            p.id,
            p.predicted_at_us,
            prob_col,
            p.version,
            p.segments,
            o.outcome,
            o.observed_at_us,
        )
        .select_from(predictions.outerjoin(outcomes, o.prediction_id == p.id))
        .where(p.model_id == model_id, p.id <= p1)
    )
    lower, upper, observe = watch if watch is not None else (0, -1, None)
    state_of = state_lookup(horizon_us=horizon_us, missing_negative=missing_negative)

    # 1. Matured since the last run, and 2. received since then although already matured.
    for query in (
        joined.where(p.predicted_at_us > f0, p.predicted_at_us <= f1).order_by(
            p.predicted_at_us, p.id
        ),
        joined.where(p.id > p0, p.predicted_at_us <= f0),
    ):
        # The bulk of a first run or a rebuild: plain tuples, the state looked up by
        # (outcome, observed within the horizon) instead of classified row by row.
        for _, at, prob, version, segments, outcome, observed in _tuples(conn, query):
            after = state_of(at, outcome, observed)
            deltas.add_new(version, at, segments, prob, after)
            if observe is not None and lower < at <= upper:
                observe(at, prob, version, segments, after)
            if flush is not None and deltas.rows >= flush[0]:
                flush[1]()
        observe = None  # the second query holds backfills, read by the evidence itself
    if previous is None:
        return
    applied = sa.and_(p.id <= p0, p.predicted_at_us <= f0)
    # 3a. New outcomes of rows applied before (they were applied as "no outcome").
    new_outcomes = (
        sa.select(p.predicted_at_us, prob_col, p.version, p.segments, o.outcome, o.observed_at_us)
        .select_from(outcomes.join(predictions, p.id == o.prediction_id))
        .where(o.model_id == model_id, o.id > o0, applied)
    )
    for at, prob, version, segments, outcome, observed in _tuples(conn, new_outcomes):
        deltas.add_row(
            version=version,
            predicted_at_us=at,
            segments=segments,
            p=prob,
            before=state_of(at, None, None),
            after=state_of(at, outcome, observed),
        )
    # 3b. Corrections of outcomes applied before: the earliest revision since the cursor
    # holds the value that was applied; the outcome row holds the value now.
    r = outcome_revisions.c
    first = (
        sa.select(r.outcome_id, sa.func.min(r.id).label("rid"))
        .where(r.id > r0)
        .group_by(r.outcome_id)
        .subquery()
    )
    corrected = (
        sa.select(
            p.predicted_at_us,
            prob_col,
            p.version,
            p.segments,
            o.outcome,
            o.observed_at_us,
            r.outcome.label("old_outcome"),
            r.observed_at_us.label("old_observed"),
        )
        .select_from(
            first.join(outcome_revisions, r.id == first.c.rid)
            .join(outcomes, o.id == first.c.outcome_id)
            .join(predictions, p.id == o.prediction_id)
        )
        .where(o.model_id == model_id, o.id <= o0, applied)
    )
    for row in _rows(conn, corrected):
        deltas.add_row(
            version=row.version,
            predicted_at_us=row.predicted_at_us,
            segments=row.segments,
            p=row[1],  # prob_col
            before=state(row, row.old_outcome, row.old_observed),
            after=state(row, row.outcome, row.observed_at_us),
        )
