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

predictions = sa.Table(
    "predictions",
    metadata,
    sa.Column("id", RowId, primary_key=True),
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), nullable=False),
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
    sa.Column("model_id", sa.Integer, sa.ForeignKey("monitored_models.id"), nullable=False),
    sa.Column("client_id", sa.String(200), nullable=False),
    sa.Column("prediction_id", RowId, sa.ForeignKey("predictions.id"), nullable=True),
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
        sa.Column("model_id", sa.Integer, primary_key=True),
        sa.Column("kind", sa.String(1), primary_key=True),  # 'p' prediction, 'o' outcome
        sa.Column("id_hash", sa.BigInteger, primary_key=True),
        sa.Column("row_id", sa.BigInteger, primary_key=True),
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

leases = sa.Table(
    "leases",
    metadata,
    sa.Column("name", sa.String(200), primary_key=True),
    sa.Column("holder", sa.String(200), nullable=False),
    sa.Column("expires_at_us", sa.BigInteger, nullable=False),
)

sa.Index("ix_outcomes_prediction_id", outcomes.c.prediction_id)
