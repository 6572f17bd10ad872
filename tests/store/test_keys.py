"""The id-key index: hash collisions, both tiers, exact results on both engines.

A 64-bit hash only narrows the search (store/keys.py); these tests force many ids
onto one hash and check that nothing is merged, whichever tier holds the keys.
"""

from __future__ import annotations

from collections.abc import Callable

import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.declarations import ModelDeclaration
from plumbwatch.errors import Conflict
from plumbwatch.store import keys
from plumbwatch.store import models as store_models
from plumbwatch.store.engine import BEGIN_OPTION
from plumbwatch.store.ingest import write_outcomes, write_predictions
from plumbwatch.store.tables import outcomes, predictions, row_keys, row_keys_recent
from plumbwatch.store.writer import GroupWriter
from plumbwatch.validation import OutcomeRow, PredictionRow
from tests.factories import NOW_US

DAY_US = 86_400_000_000


def _model(engine: Engine) -> int:
    decl = ModelDeclaration.model_validate({"kind": "binary", "label_horizon": "P5D"})
    with engine.begin() as conn:
        model, _ = store_models.upsert(conn=conn, name="keys", declaration=decl, now_us=NOW_US)
    return model.id


def _in_write(engine: Engine, work: Callable[[sa.Connection], object]) -> object:
    with engine.connect() as c:
        conn = c.execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
        with conn.begin():
            return work(conn)


def _predictions(ids: list[str], p: float = 0.25) -> list[PredictionRow]:
    return [PredictionRow(i, c, NOW_US - DAY_US, p, None, "v1", None) for i, c in enumerate(ids)]


def _outcomes(ids: list[str], y: int = 1) -> list[OutcomeRow]:
    return [OutcomeRow(i, c, y, NOW_US - DAY_US // 2) for i, c in enumerate(ids)]


@pytest.mark.parametrize("settle_between", [False, True], ids=["recent", "settled"])
def test_ids_sharing_a_hash_stay_apart(
    engine: Engine, monkeypatch: pytest.MonkeyPatch, settle_between: bool
) -> None:
    # Every id starting with "c" hashes to one value: lookups return every colliding
    # row, and only the stored id text decides which row is which.
    real = keys.id_hash
    monkeypatch.setattr(keys, "id_hash", lambda cid: 7 if cid.startswith("c") else real(cid))
    model_id = _model(engine)

    def settle() -> None:
        if settle_between:
            _in_write(engine, keys.settle)

    # An outcome first: it waits for its prediction, under the shared hash.
    early = _in_write(
        engine,
        lambda c: write_outcomes(
            c, model_id=model_id, rows=_outcomes(["c-3"]), now_us=NOW_US, correction=False
        ),
    )
    assert early.awaiting_prediction == 1  # type: ignore[attr-defined]
    settle()
    first = _in_write(
        engine,
        lambda c: write_predictions(
            c, model_id=model_id, rows=_predictions(["c-1", "c-2", "c-3", "plain"]), now_us=NOW_US
        ),
    )
    assert (first.accepted, first.duplicates) == (4, 0)  # type: ignore[attr-defined]
    settle()
    again = _in_write(
        engine,
        lambda c: write_predictions(
            c, model_id=model_id, rows=_predictions(["c-2", "c-4"]), now_us=NOW_US
        ),
    )
    assert (again.accepted, again.duplicates) == (1, 1)  # type: ignore[attr-defined]
    with pytest.raises(Conflict) as conflict:
        _in_write(
            engine,
            lambda c: write_predictions(
                c, model_id=model_id, rows=_predictions(["c-4", "c-5"], p=0.5), now_us=NOW_US
            ),
        )
    assert [d.index for d in conflict.value.details] == [0]
    settle()
    later = _in_write(
        engine,
        lambda c: write_outcomes(
            c,
            model_id=model_id,
            rows=_outcomes(["c-1", "c-3", "c-9"]),
            now_us=NOW_US,
            correction=False,
        ),
    )
    # c-3 is a repeat of the early outcome (now joined); c-9 has no prediction.
    assert (later.accepted, later.duplicates, later.awaiting_prediction) == (2, 1, 1)  # type: ignore[attr-defined]

    with engine.connect() as conn:
        pred_ids = dict(conn.execute(sa.select(predictions.c.client_id, predictions.c.id)).all())
        links = dict(conn.execute(sa.select(outcomes.c.client_id, outcomes.c.prediction_id)).all())
    assert sorted(pred_ids) == ["c-1", "c-2", "c-3", "c-4", "plain"]
    assert links == {"c-1": pred_ids["c-1"], "c-3": pred_ids["c-3"], "c-9": None}


def test_select_exact_round_trips_integers_and_text(engine: Engine) -> None:
    # SQLite packs these rows as one JSON array: 64-bit extremes, NULL, and text with
    # quotes, backslashes, control characters and non-ASCII must come back unchanged.
    values = [
        (-(2**63), 'a"b\\c'),
        (2**63 - 1, "tab\there\nnewline \u0001"),
        (0, "zürich ✓ 𝔘"),
        (None, ""),
    ]
    mark = keys.placeholder(engine.connect())
    source = " UNION ALL ".join(f"SELECT {mark} AS n, {mark} AS t" for _ in values)
    params = [x for pair in values for x in pair]
    with engine.connect() as conn:
        if conn.dialect.name == "postgresql":
            source = " UNION ALL ".join(
                "SELECT CAST(%s AS BIGINT) AS n, CAST(%s AS TEXT) AS t" for _ in values
            )
        rows = keys.select_exact(conn, ("n", "t"), source, params)
    assert [tuple(r) for r in rows] == values


def test_keys_in_the_recent_tier_are_found_and_settled(engine: Engine) -> None:
    # SQLite writes new keys to the recent tier: they are found there, and the group
    # writer moves them once the tier has grown (here: past one key). PostgreSQL
    # writes them straight to the settled tier (0005 emptied the other there).
    model_id = _model(engine)
    _in_write(
        engine,
        lambda c: write_predictions(c, model_id=model_id, rows=_predictions(["a"]), now_us=NOW_US),
    )
    with engine.connect() as conn:
        row_id = conn.execute(sa.select(predictions.c.id)).scalar_one()
        recent = conn.execute(sa.select(row_keys_recent.c.row_id)).all()
        settled = conn.execute(sa.select(row_keys.c.row_id)).all()
    if keys.uses_recent_tier(engine.dialect.name):
        assert (recent, settled) == ([(row_id,)], [])
    else:
        assert (recent, settled) == ([], [(row_id,)])
    again = _in_write(
        engine,
        lambda c: write_predictions(c, model_id=model_id, rows=_predictions(["a"]), now_us=NOW_US),
    )
    assert (again.accepted, again.duplicates) == (0, 1)  # type: ignore[attr-defined]

    writer = GroupWriter(engine, settle_threshold=1)
    writer.start()
    try:
        writer.submit(lambda c: None, rows=0).result(timeout=30)
    finally:
        writer.stop()
    with engine.connect() as conn:
        assert conn.execute(sa.select(row_keys_recent.c.row_id)).all() == []
        assert conn.execute(sa.select(row_keys.c.row_id)).all() == [(row_id,)]


def test_id_hashes_match_id_hash() -> None:
    ids = ["", "a", "6513270e-269e-4d37-b2a7-4de452e6b438", "zürich ✓", "x" * 200]
    assert keys.id_hashes(ids) == [keys.id_hash(i) for i in ids]
    # The stored hash is the first 8 bytes of BLAKE2b-64 as a signed big-endian integer.
    import hashlib

    digest = hashlib.blake2b(b"a", digest_size=8).digest()
    assert keys.id_hash("a") == int.from_bytes(digest, "big", signed=True)
