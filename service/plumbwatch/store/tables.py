"""The schema, as SQLAlchemy Core tables (Alembic migrations in ``migrations/`` create it).

Instants are integer microseconds since the epoch (UTC) in ``*_us`` columns.
Client ids are looked up through ``row_keys`` (see :mod:`plumbwatch.store.keys`),
a compact 64-bit hash index split into a small recent tier and a large settled
tier, so that random UUID ids do not dirty one index page per inserted row.
"""

from __future__ import annotations

import sqlalchemy as sa

NAMING_CONVENTION = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

metadata = sa.MetaData(naming_convention=NAMING_CONVENTION)

# INTEGER PRIMARY KEY on SQLite is the rowid itself (no second index); BIGINT elsewhere.
RowId = sa.BigInteger().with_variant(sa.Integer(), "sqlite")

monitored_models = sa.Table(
    "monitored_models",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("name", sa.String(200), nullable=False, unique=True),
    sa.Column("kind", sa.String(16), nullable=False),
    sa.Column("classes", sa.JSON, nullable=True),
    sa.Column("label_horizon", sa.String(32), nullable=False),  # as declared, e.g. P5D
    sa.Column("label_horizon_s", sa.BigInteger, nullable=False),  # the same, in seconds
    sa.Column("missing_outcome", sa.String(16), nullable=False),
    sa.Column("segment_keys", sa.JSON, nullable=False),
    sa.Column("crosses", sa.JSON, nullable=False),
    sa.Column("windows", sa.JSON, nullable=False),
    sa.Column("baseline", sa.JSON, nullable=True),
    sa.Column("rules", sa.JSON, nullable=True),
    sa.Column("description", sa.Text, nullable=False, server_default=""),
    sa.Column("created_at_us", sa.BigInteger, nullable=False),
    sa.Column("updated_at_us", sa.BigInteger, nullable=False),
    sa.Column("archived_at_us", sa.BigInteger, nullable=True),
    sa.CheckConstraint("kind IN ('binary', 'multiclass')", name="kind"),
    sa.CheckConstraint("missing_outcome IN ('wait', 'negative')", name="missing_outcome"),
)

# Raw rows carry no foreign keys (0005): the group writer alone writes them, from rows
# it has just read under the model's write lock, and PostgreSQL's per-row checks cost
# about as much as the COPY itself.
predictions = sa.Table(
    "predictions",
    metadata,
    sa.Column("id", RowId, primary_key=True),
    sa.Column("model_id", sa.Integer, nullable=False),  # monitored_models.id
    sa.Column("client_id", sa.String(200), nullable=False),
    sa.Column("predicted_at_us", sa.BigInteger, nullable=False),
    sa.Column("probability", sa.Float, nullable=True),
    sa.Column("probabilities", sa.Text, nullable=True),
    sa.Column("version", sa.String(64), nullable=False),
    sa.Column("segments", sa.Text, nullable=True),
    sa.Column("received_at_us", sa.BigInteger, nullable=False),
    sa.Index(None, "model_id", "predicted_at_us"),
)

outcomes = sa.Table(
    "outcomes",
    metadata,
    sa.Column("id", RowId, primary_key=True),
    sa.Column("model_id", sa.Integer, nullable=False),  # monitored_models.id
    sa.Column("client_id", sa.String(200), nullable=False),
    sa.Column("prediction_id", RowId, nullable=True),  # predictions.id, once it arrived
    # Binary: 0 or 1. Multiclass: the index of the class in the model's declared classes.
    sa.Column("outcome", sa.Integer, nullable=False),
    sa.Column("observed_at_us", sa.BigInteger, nullable=False),
    sa.Column("received_at_us", sa.BigInteger, nullable=False),
    sa.Column("revision", sa.Integer, nullable=False, server_default="0"),
)

outcome_revisions = sa.Table(
    "outcome_revisions",
    metadata,
    sa.Column("id", RowId, primary_key=True),
    sa.Column("outcome_id", RowId, sa.ForeignKey("outcomes.id"), nullable=False, index=True),
    sa.Column("outcome", sa.Integer, nullable=False),
    sa.Column("observed_at_us", sa.BigInteger, nullable=False),
    sa.Column("received_at_us", sa.BigInteger, nullable=False),
    sa.Column("superseded_at_us", sa.BigInteger, nullable=False),
)


def _key_table(name: str) -> sa.Table:
    return sa.Table(
        name,
        metadata,
        sa.Column("model_id", sa.Integer, nullable=False),
        sa.Column("kind", sa.String(1), nullable=False),  # 'p' prediction, 'o' outcome
        sa.Column("id_hash", sa.BigInteger, nullable=False),
        sa.Column("row_id", sa.BigInteger, nullable=False),
        # Hash before kind: one probe finds an id's prediction and outcome (0005).
        sa.PrimaryKeyConstraint("model_id", "id_hash", "kind", "row_id"),
        sqlite_with_rowid=False,
    )


row_keys = _key_table("row_keys")
row_keys_recent = _key_table("row_keys_recent")

api_tokens = sa.Table(
    "api_tokens",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("name", sa.String(200), nullable=False, unique=True),
    sa.Column("scope", sa.String(16), nullable=False),
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), nullable=True),
    sa.Column("token_hash", sa.String(64), nullable=False, unique=True),
    sa.Column("created_at_us", sa.BigInteger, nullable=False),
    sa.Column("expires_at_us", sa.BigInteger, nullable=True),
    sa.Column("revoked_at_us", sa.BigInteger, nullable=True),
    sa.CheckConstraint("scope IN ('admin', 'ingest', 'read')", name="scope"),
)

# -- evaluation (derived state; rebuildable from the raw rows above) -----------------

# Per (model, version, cohort day, slice): the stats.Sketch of matured, labelled rows,
# plus the counts that do not enter a sketch. `day` is the UTC day of predicted_at
# (days since the epoch).
sketches = sa.Table(
    "sketches",
    metadata,
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), primary_key=True),
    sa.Column("version", sa.String(64), primary_key=True),
    sa.Column("day", sa.Integer, primary_key=True),
    sa.Column("slice", sa.String(600), primary_key=True),
    sa.Column("matured", sa.BigInteger, nullable=False),  # rows past their horizon
    sa.Column("late", sa.BigInteger, nullable=False),  # outcome observed after the horizon
    sa.Column("unlabelled", sa.BigInteger, nullable=False),  # no outcome by maturity
    sa.Column("data", sa.LargeBinary, nullable=False),  # Sketch.to_bytes()
    sa.Column("updated_at_us", sa.BigInteger, nullable=False),
)

# The bins of a stored sketch that later runs changed, with their current values and
# the bucket's current counts (at most one row per bucket): a run writes only what it
# changed, not the whole bucket, and folds the row back into `sketches` once it covers
# a good share of the bucket (see store/sketches.py).
sketch_patches = sa.Table(
    "sketch_patches",
    metadata,
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), primary_key=True),
    sa.Column("version", sa.String(64), primary_key=True),
    sa.Column("day", sa.Integer, primary_key=True),
    sa.Column("slice", sa.String(600), primary_key=True),
    sa.Column("matured", sa.BigInteger, nullable=False),
    sa.Column("late", sa.BigInteger, nullable=False),
    sa.Column("unlabelled", sa.BigInteger, nullable=False),
    sa.Column("data", sa.LargeBinary, nullable=False),  # Sketch.to_bytes(bins=changed bins)
    sa.Column("updated_at_us", sa.BigInteger, nullable=False),
)

# One row per model: how far the incremental evaluation has got.
evaluation_cursors = sa.Table(
    "evaluation_cursors",
    metadata,
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), primary_key=True),
    sa.Column("as_of_us", sa.BigInteger, nullable=False),  # the last as_of applied
    # Rows up to these ids have been applied. Ids are handed out inside each model's
    # write lock, so a row committed later always has a larger id (see store/keys.py).
    sa.Column("prediction_seq", sa.BigInteger, nullable=False),
    sa.Column("outcome_seq", sa.BigInteger, nullable=False),
    sa.Column("revision_seq", sa.BigInteger, nullable=False),
    sa.Column("updated_at_us", sa.BigInteger, nullable=False),
)

# The kept values of each segment key, in order of first appearance (the cap keeps the
# first N; later values fold into `other`).
slice_values = sa.Table(
    "slice_values",
    metadata,
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), primary_key=True),
    sa.Column("key", sa.String(64), primary_key=True),
    sa.Column("value", sa.String(200), primary_key=True),
    sa.Column("position", sa.Integer, nullable=False),
)

evaluations = sa.Table(
    "evaluations",
    metadata,
    sa.Column("id", RowId, primary_key=True),
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), nullable=False),
    sa.Column("as_of_us", sa.BigInteger, nullable=False),
    sa.Column("evaluated_at_us", sa.BigInteger, nullable=False),
    sa.Column("health", sa.String(32), nullable=False),
    sa.Column("record", sa.Text, nullable=False),  # the status JSON of this run
    sa.Index(None, "model_id", "as_of_us"),
)

# -- evidence (derived, but never rebuilt: a stream sees each row once, at maturity) ---

# One row per model: how far the evidence streams have been fed. The evidence
# frontier is as_of - label_horizon - evidence_grace (see evaluate/evidence.py).
evidence_cursors = sa.Table(
    "evidence_cursors",
    metadata,
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), primary_key=True),
    sa.Column("as_of_us", sa.BigInteger, nullable=False),  # the last as_of fed
    sa.Column("frontier_us", sa.BigInteger, nullable=False),  # rows predicted up to here were fed
    sa.Column("prediction_seq", sa.BigInteger, nullable=False),
    sa.Column("outcome_seq", sa.BigInteger, nullable=False),
    sa.Column("revision_seq", sa.BigInteger, nullable=False),
    sa.Column("updated_at_us", sa.BigInteger, nullable=False),
)

# One anytime-valid e-process (and its CUSUM charts) per (model, version, slice).
evidence_streams = sa.Table(
    "evidence_streams",
    metadata,
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), primary_key=True),
    sa.Column("version", sa.String(64), primary_key=True),
    sa.Column("slice", sa.String(600), primary_key=True),
    sa.Column("started_at_us", sa.BigInteger, nullable=False),  # as_of of its first run
    # The evidence cursor when the stream started: it saw only rows fed after it
    # (predicted after since_frontier_us, or with an id above since_prediction_seq).
    sa.Column("since_frontier_us", sa.BigInteger, nullable=False),
    sa.Column("since_prediction_seq", sa.BigInteger, nullable=False),
    sa.Column("state", sa.LargeBinary, nullable=False),  # stats evidence state, to_bytes()
    # Binary models: JSON of the CUSUM charts, their simulated threshold once known, and
    # the case mix it was simulated for (evaluate/cusum.py).
    sa.Column("cusum", sa.Text, nullable=True),
    sa.Column("corrections", sa.BigInteger, nullable=False),  # fed rows corrected later
    sa.Column("late_labels", sa.BigInteger, nullable=False),  # outcomes after the row was fed
    sa.Column("last_predicted_at_us", sa.BigInteger, nullable=False),
    sa.Column("updated_at_us", sa.BigInteger, nullable=False),
)

# Admin resets (after an acknowledged recalibration): every stream restarts at E = 1.
evidence_resets = sa.Table(
    "evidence_resets",
    metadata,
    sa.Column("id", RowId, primary_key=True),
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), nullable=False),
    sa.Column("reset_at_us", sa.BigInteger, nullable=False),
    sa.Column("reason", sa.Text, nullable=False),
    sa.Column("actor", sa.String(200), nullable=False),
    sa.Index(None, "model_id", "id"),
)

# The baseline window of each version once it is fixed (the first matured window
# after the version's first cohort day, when the declaration names no dates).
baselines = sa.Table(
    "baselines",
    metadata,
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), primary_key=True),
    sa.Column("version", sa.String(64), primary_key=True),
    sa.Column("first_day", sa.Integer, nullable=False),
    sa.Column("end_day", sa.Integer, nullable=False),  # exclusive
    sa.Column("fixed_at_us", sa.BigInteger, nullable=False),
)

leases = sa.Table(
    "leases",
    metadata,
    sa.Column("name", sa.String(200), primary_key=True),
    sa.Column("holder", sa.String(200), nullable=False),
    sa.Column("expires_at_us", sa.BigInteger, nullable=False),
)

sa.Index("ix_outcomes_prediction_id", outcomes.c.prediction_id)

# -- alerts: lifecycle, its events, hysteresis counters and the outbox -----------------

# One row per alert. While it is open (not cleared) `open_key` is "<model>/<rule>/<slice>";
# the unique index on it keeps one open alert per (model, rule, slice) on both engines
# (NULLs do not collide), so a re-raise needs the previous alert cleared first.
alerts = sa.Table(
    "alerts",
    metadata,
    sa.Column("id", RowId, primary_key=True),
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), nullable=False),
    sa.Column("rule", sa.String(100), nullable=False),
    sa.Column("slice", sa.String(600), nullable=False),
    sa.Column("version", sa.String(64), nullable=True),
    sa.Column("window_name", sa.String(32), nullable=True),
    sa.Column("severity", sa.String(16), nullable=False),
    sa.Column("state", sa.String(16), nullable=False),
    sa.Column("open_key", sa.String(800), nullable=True, unique=True),
    sa.Column("raised_at_us", sa.BigInteger, nullable=False),
    sa.Column("since_us", sa.BigInteger, nullable=False),  # when the current state began
    sa.Column("acknowledged_by", sa.String(200), nullable=True),  # a token name
    sa.Column("shelved_until_us", sa.BigInteger, nullable=True),
    sa.Column("cleared_at_us", sa.BigInteger, nullable=True),
    sa.Column("detail", sa.Text, nullable=False),  # JSON: the values that tripped the rule
    sa.Column("sinks", sa.JSON, nullable=False),  # where its events go (resolved at raise)
    sa.Column("link", sa.String(1000), nullable=False),  # the model's status page
    sa.CheckConstraint("state IN ('active', 'acknowledged', 'shelved', 'cleared')", name="state"),
    sa.Index(None, "model_id", "state"),
    sa.Index(None, "state"),
)

# Every transition of an alert, tied to the evaluation that caused it or to the token
# that took it. `event_id` is the stable id receivers deduplicate on (webhook-id);
# `payload` is the notification body, stored before anything is sent.
alert_events = sa.Table(
    "alert_events",
    metadata,
    sa.Column("id", RowId, primary_key=True),
    sa.Column("alert_id", RowId, sa.ForeignKey("alerts.id"), nullable=False, index=True),
    sa.Column("event_id", sa.String(64), nullable=False, unique=True),
    sa.Column("kind", sa.String(16), nullable=False),
    sa.Column("from_state", sa.String(16), nullable=True),
    sa.Column("to_state", sa.String(16), nullable=False),
    sa.Column("evaluation_id", RowId, sa.ForeignKey("evaluations.id"), nullable=True),
    sa.Column("actor", sa.String(200), nullable=True),
    sa.Column("at_us", sa.BigInteger, nullable=False),
    sa.Column("payload", sa.Text, nullable=False),
)

# Hysteresis counters per (model, rule, slice): consecutive evaluations the condition
# held (`hold`) or did not (`calm`). Kept while either matters; dropped when idle.
alert_tracks = sa.Table(
    "alert_tracks",
    metadata,
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), primary_key=True),
    sa.Column("rule", sa.String(100), primary_key=True),
    sa.Column("slice", sa.String(600), primary_key=True),
    sa.Column("hold", sa.Integer, nullable=False),
    sa.Column("calm", sa.Integer, nullable=False),
    sa.Column("holding", sa.Boolean, nullable=False),  # the last evaluation's verdict
    sa.Column("evaluation_id", RowId, sa.ForeignKey("evaluations.id"), nullable=True),
    sa.Column("as_of_us", sa.BigInteger, nullable=False),
)

# The outbox: one row per (event, sink), written in the transaction that records the
# event; a sender claims due rows (claimed_by/claimed_until), sends, and records the
# outcome, so a crash at any point re-sends rather than loses.
deliveries = sa.Table(
    "deliveries",
    metadata,
    sa.Column("id", RowId, primary_key=True),
    sa.Column("alert_event_id", RowId, sa.ForeignKey("alert_events.id"), nullable=False),
    sa.Column("sink", sa.String(100), nullable=False),
    sa.Column("state", sa.String(16), nullable=False),
    sa.Column("attempts", sa.Integer, nullable=False),
    sa.Column("next_attempt_us", sa.BigInteger, nullable=False),
    sa.Column("created_at_us", sa.BigInteger, nullable=False),
    sa.Column("first_attempt_us", sa.BigInteger, nullable=True),  # the sender's clock
    sa.Column("last_attempt_us", sa.BigInteger, nullable=True),
    sa.Column("finished_at_us", sa.BigInteger, nullable=True),  # delivered or failed
    sa.Column("last_error", sa.String(1000), nullable=True),
    sa.Column("claimed_by", sa.String(200), nullable=True),
    sa.Column("claimed_until_us", sa.BigInteger, nullable=True),
    sa.UniqueConstraint("alert_event_id", "sink"),
    sa.CheckConstraint("state IN ('pending', 'delivered', 'failed')", name="state"),
    sa.Index(None, "state", "next_attempt_us"),
)
