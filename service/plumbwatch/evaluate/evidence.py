"""Anytime-valid evidence per (model version, slice), fed each row once, at maturity.

Each stream is the mixture e-process of METHODS.md §7.2 (binary: logistic
recalibration alternatives; multiclass: temperature alternatives), with a pair of
risk-adjusted CUSUM charts beside it for binary models (``evaluate/cusum.py``).

What a stream sees, and when (METHODS.md §7.5 and §13):

* A row is fed at the first run whose *evidence frontier*
  ``as_of - label_horizon - evidence_grace`` has passed its ``predicted_at``,
  in maturity order ``(predicted_at, id)`` (for a fixed horizon the same as
  ``predicted_at + horizon``), with the outcome it has in that run's snapshot:
  an outcome counts if observed within the horizon, as in the sketches. With
  ``missing_outcome = wait`` a row without one is skipped (and counted), with
  ``negative`` it is fed as 0.
* ``evidence_grace`` (default one day) is the label-delay guard: sketches fold in
  outcomes that arrive after maturity, a stream cannot. If negatives are known
  only at the horizon and the labelling job posts them a few hours later, a
  stream fed right at maturity would see the fast positives and skip the slow
  negatives, and page on a calibrated model. The grace gives the pipeline that
  time; only inclusion still decided by label-dependent lateness beyond it can
  bias. Replays see outcomes by ``observed_at`` and are not affected.
* Rows received after the frontier passed them (backfills) are fed at the next
  run, before that run's newly matured rows. Their order does not depend on
  outcomes, so the process stays a test martingale.
* Outcomes that arrive after their row was fed (``late_labels``) and corrections
  of fed outcomes (``corrections``) update sketches and metrics only; the stream
  counts them and never rewrites what it has gathered (§7.5 item 2).
* A replay that goes forward feeds exactly the rows a live run at the same as_of
  would; an as_of before the last evaluation does not touch the streams.
* A new version starts new streams; so does ``POST /evidence/reset`` (all of the
  model's streams restart at E = 1, the reset is kept with its reason).

``log_evidence`` is the natural log of the current e-value. ``max_log_evidence`` is
the largest value seen at the end of a run, when it is looked at; with
``K`` streams of the version, ``log_threshold`` is ``ln(K / evidence_alpha)``
(Ville's inequality with Bonferroni, §7.4). ``K`` is the number of slices the
version has streams for at this run; when a new slice value appears, ``K`` grows
and every threshold of the version rises (they never fall). The Bonferroni
guarantee is exact for a fixed set of slices; a slice that appears late, after
others crossed a lower threshold, is the one case it does not cover.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import orjson
import sqlalchemy as sa

from plumbwatch.evaluate import cusum
from plumbwatch.evaluate import evidence_rows as rows_mod
from plumbwatch.evaluate.evidence_rows import NEG_INF
from plumbwatch.evaluate.immature import frozen_view
from plumbwatch.evaluate.slices import SliceSpec, ValueCap
from plumbwatch.stats.cusum import cusum_weights
from plumbwatch.stats.evidence import MixtureEvidence, TemperatureEvidence, binary_log_lr_sums
from plumbwatch.stats.evidence import log_threshold as ville_threshold
from plumbwatch.store import evidence as store
from plumbwatch.store.evidence import EvidenceCursor, StoredStream, StreamKey
from plumbwatch.timefmt import format_instant

_CHUNK = 65_536


@dataclass
class Stream:
    state: Any  # MixtureEvidence | TemperatureEvidence
    track: cusum.Track | None  # binary models only
    started_at_us: int
    since_frontier_us: int
    since_prediction_seq: int
    corrections: int = 0
    late_labels: int = 0
    last_predicted_at_us: int = NEG_INF

    def saw(self, predicted_at_us: int, prediction_id: int) -> bool:
        """Whether a row fed before this run was fed to this stream (not to a predecessor)."""
        return predicted_at_us > self.since_frontier_us or prediction_id > self.since_prediction_seq


@dataclass
class EvidenceRun:
    """The model's streams after one run, and what the run fed them."""

    streams: dict[StreamKey, Stream]
    existing: set[StreamKey]
    cursor: EvidenceCursor
    feed: dict[str, Any]
    reset_id: int | None
    touched: set[StreamKey] = field(default_factory=set)
    _k: dict[str, int] | None = None  # streams per version, once feeding is done

    def n_slices(self, version: str) -> int:
        if self._k is None:
            self._k = defaultdict(int)
            for v, _ in self.streams:
                self._k[v] += 1
        return self._k[version]

    def log_threshold(self, version: str, alpha: float) -> float:
        return ville_threshold(alpha=alpha, n_slices=max(1, self.n_slices(version)))

    def entries(self, versions: set[str], *, alpha: float, cusum_arl0: int) -> list[dict[str, Any]]:
        """The record's ``evidence`` list for the given versions, in slice order."""
        out = []
        for (v, s), stream in sorted(self.streams.items(), key=lambda kv: _order(kv[0])):
            if v not in versions:
                continue
            threshold = self.log_threshold(v, alpha)
            log_e = float(stream.state.log_evidence)
            out.append(
                {
                    "slice": s,
                    "version": v,
                    "log_evidence": log_e,
                    "log_threshold": threshold,
                    "max_log_evidence": float(stream.state.max_log_evidence),
                    "n": int(stream.state.n),
                    "crossed": bool(stream.state.max_log_evidence >= threshold),
                    "started_at": format_instant(stream.started_at_us),
                    "corrections": stream.corrections,
                    "late_labels": stream.late_labels,
                    "cusum": stream.track.record(cusum_arl0) if stream.track else None,
                }
            )
        return out

    def to_store(self) -> dict[StreamKey, StoredStream]:
        return {
            key: StoredStream(
                s.started_at_us,
                s.since_frontier_us,
                s.since_prediction_seq,
                s.state.to_bytes(),
                s.track.to_json() if s.track else None,
                s.corrections,
                s.late_labels,
                s.last_predicted_at_us,
            )
            for key, s in self.streams.items()
            if key in self.touched
        }


def _order(key: StreamKey) -> tuple[str, bool, int, str]:
    v, s = key
    return (v, s != "overall", s.count(","), s)


def _decode(stored: StoredStream, multiclass: bool) -> Stream:
    kind = TemperatureEvidence if multiclass else MixtureEvidence
    return Stream(
        kind.from_bytes(stored.state),
        None if multiclass else cusum.Track.from_json(stored.cusum),
        stored.started_at_us,
        stored.since_frontier_us,
        stored.since_prediction_seq,
        stored.corrections,
        stored.late_labels,
        stored.last_predicted_at_us,
    )


@dataclass
class Pending:
    """The evidence state read at the start of a run, before the deltas' pass."""

    stored: dict[StreamKey, StoredStream]
    previous: EvidenceCursor | None
    reset_id: int | None
    frontiers: rows_mod.Frontiers
    observed: rows_mod.Rows

    @property
    def watch(self) -> tuple[int, int, Any]:
        """What ``deltas.collect`` hands over (``watch=``)."""
        return self.frontiers.watcher(self.observed)


def prepare(
    conn: sa.Connection,
    *,
    model_id: int,
    n_classes: int,
    as_of_us: int,
    horizon_us: int,
    grace_us: int,
    sketch_frontier_us: int | None,
) -> Pending:
    """Read the streams and the cursor; ``sketch_frontier_us``: the deltas' lower bound
    (the previous sketch cursor's frontier, None on a first run)."""
    previous = store.get_cursor(conn, model_id=model_id)
    reset = store.latest_reset(conn, model_id=model_id)
    e0 = previous.frontier_us if previous else NEG_INF
    frontiers = rows_mod.Frontiers(
        e0=e0,
        e1=max(e0, as_of_us - horizon_us - grace_us),
        f0=NEG_INF if sketch_frontier_us is None else sketch_frontier_us,
        p0=previous.prediction_seq if previous else 0,
    )
    return Pending(
        store.load_streams(conn, model_id=model_id),
        previous,
        reset.id if reset else None,
        frontiers,
        rows_mod.Rows(multiclass=n_classes > 0),
    )


def advance(
    conn: sa.Connection,
    pending: Pending,
    *,
    model_id: int,
    n_classes: int,
    spec: SliceSpec,
    cap: ValueCap,
    horizon_us: int,
    missing_negative: bool,
    as_of_us: int,
    seqs: tuple[int, int, int],
    cusum_arl0: int,
) -> EvidenceRun:
    """Feed the rows that reached the evidence frontier since the last run (module doc):
    backfills, then the rows before the sketch frontier, then those the deltas handed over."""
    multiclass = n_classes > 0
    previous, f = pending.previous, pending.frontiers
    backfills, gap = rows_mod.read(
        conn,
        model_id=model_id,
        multiclass=multiclass,
        horizon_us=horizon_us,
        missing_negative=missing_negative,
        max_prediction_id=seqs[0],
        frontiers=f,
    )
    rows = backfills.then(gap).then(pending.observed)
    run = EvidenceRun(
        {key: _decode(s, multiclass) for key, s in pending.stored.items()},
        set(pending.stored),
        EvidenceCursor(max(as_of_us, previous.as_of_us if previous else as_of_us), f.e1, *seqs),
        {
            "frontier": format_instant(f.e1) if f.e1 > NEG_INF else None,
            "rows": rows.count,
            "backfilled": backfills.count,
            "skipped_unlabelled": rows.skipped,
        },
        pending.reset_id,
    )
    names = _names_of(spec, frozen_view(cap))
    _feed(run, rows, names, as_of_us=as_of_us, previous=previous, multiclass=multiclass)
    if previous is not None:
        for kind, pid, at, version, segments in rows_mod.afterwards(
            conn, model_id=model_id, previous=previous, seqs=seqs
        ):
            for name in names(segments):
                stream = run.streams.get((version, name))
                if stream is not None and stream.saw(at, pid):
                    setattr(stream, kind, getattr(stream, kind) + 1)
                    run.touched.add((version, name))
    if not multiclass:
        _thresholds(run, cusum_arl0)
    return run


def _thresholds(run: EvidenceRun, cusum_arl0: int) -> None:
    keys = [k for k, s in run.streams.items() if s.track and s.track.threshold is None]
    tracks = cusum.assign_thresholds(
        [run.streams[k].track for k in keys],  # type: ignore[misc]
        target_arl0=cusum_arl0,
    )
    for key, track in zip(keys, tracks, strict=True):
        if track.threshold is not None:
            run.streams[key].track = track
            run.touched.add(key)


def _names_of(spec: SliceSpec, cap: ValueCap) -> Any:
    cache: dict[str | None, list[str]] = {}

    def names(segments: str | None) -> list[str]:
        found = cache.get(segments)
        if found is None:
            found = cache[segments] = spec.names(orjson.loads(segments) if segments else {}, cap)
        return found

    return names


def _log_lr_per_combo(cid: np.ndarray, y: np.ndarray, p: np.ndarray, n_combos: int) -> np.ndarray:
    """Summed log likelihood ratios per combination. A row's ratios are the same for every
    stream it feeds: computed once, in chunks (a first run may feed millions of rows),
    summed per combination, then per stream by the caller."""
    template = MixtureEvidence.start()
    a, b = template.params[:, 0], template.params[:, 1]
    out = np.zeros((n_combos, a.size))
    for start in range(0, cid.size, _CHUNK):
        part = slice(start, start + _CHUNK)
        out += binary_log_lr_sums(y[part], p[part], cid[part], n_combos, a, b, eps=template.eps)
    return out


def _per_row(fn: Any, n: int, dtype: Any) -> np.ndarray:
    """``fn(rows)`` for all ``n`` rows, computed in chunks into one array: a first run
    feeds millions of rows, and the temporaries of one whole-array pass would cost
    hundreds of megabytes."""
    out: np.ndarray | None = None
    for start in range(0, n, _CHUNK):
        part = fn(slice(start, start + _CHUNK))
        if out is None:
            out = np.empty((n, *part.shape[1:]), dtype=dtype)
        out[start : start + part.shape[0]] = part
    return out if out is not None else np.empty(0, dtype=dtype)


def _feed(
    run: EvidenceRun,
    rows: rows_mod.Rows,
    names: Any,
    *,
    as_of_us: int,
    previous: EvidenceCursor | None,
    multiclass: bool,
) -> None:
    if not rows.cid:
        return
    cid, at, y, p = rows.arrays()
    # Stream -> the combinations whose rows it gets.
    members: dict[StreamKey, list[int]] = defaultdict(list)
    for (version, segments), c in rows.combos.items():
        for name in names(segments):
            members[(version, name)].append(c)
    n_combos = len(rows.combos)
    # Rows grouped by combination (stable, so each group keeps maturity order).
    order = np.argsort(cid, kind="stable")
    bounds = np.searchsorted(cid[order], np.arange(n_combos + 1))
    last = np.full(n_combos, NEG_INF, dtype=np.int64)
    np.maximum.at(last, cid, at)
    counts = np.diff(bounds)
    since = (previous.frontier_us, previous.prediction_seq) if previous else (NEG_INF, 0)
    if not multiclass:
        per_combo = _log_lr_per_combo(cid, y, p, n_combos)
        # A row's chart weights and case-mix bin are the same in every stream it feeds.
        weights: dict[tuple[float, ...], np.ndarray] = {}
        bins = _per_row(lambda part: cusum.mix_bins(p[part]), cid.size, np.intp)
    for key, combos in members.items():
        stream = run.streams.get(key)
        if stream is None:
            stream = run.streams[key] = Stream(
                TemperatureEvidence.start() if multiclass else MixtureEvidence.start(),
                None if multiclass else cusum.Track(),
                as_of_us,
                *since,
            )
        # This stream's rows, back in maturity order: all of them for a stream fed by every
        # combination (overall); else each combination's part, which is sorted already
        # (so a stable sort merges those runs).
        idx: Any = (
            slice(None)  # no copy
            if len(combos) == n_combos
            else np.sort(
                np.concatenate([order[bounds[c] : bounds[c + 1]] for c in combos]), kind="stable"
            )
        )
        state = stream.state
        if multiclass:
            state = state.update(y[idx], p[idx])
        else:
            log_lr = np.array(state.log_lr + per_combo[combos].sum(axis=0))
            log_lr.setflags(write=False)
            state = replace(state, log_lr=log_lr, n=state.n + int(counts[combos].sum()))
            track = stream.track or cusum.Track()
            w = weights.get(track.chart.r_a)
            if w is None:
                r_a = track.chart.r_a
                w = weights[r_a] = _per_row(
                    lambda part, r_a=r_a: cusum_weights(y[part], p[part], r_a), cid.size, float
                )
            stream.track = cusum.update(track, w[idx], bins[idx])
        # The maximum is taken where it is looked at, at the end of a run.
        stream.state = replace(
            state, max_log_evidence=max(stream.state.max_log_evidence, state.log_evidence)
        )
        stream.last_predicted_at_us = max(stream.last_predicted_at_us, int(last[combos].max()))
        run.touched.add(key)


__all__ = ["EvidenceRun", "Pending", "Stream", "advance", "prepare"]
