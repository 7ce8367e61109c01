"""Tables of the project store (SQLAlchemy Core, portable SQL).

History is never overwritten: ``annotations``, ``proposals``, ``model_versions`` and
``events`` only ever get new rows. ``tiles.state`` is the current state, derived from the
event log and kept for fast queue queries. Free text (names, sources, event kinds) is
``Text``: PostgreSQL enforces lengths that SQLite ignores. A change here needs a
migration in ``labeler/store/migrations/versions/`` and a new :data:`SCHEMA_VERSION`.
"""

from __future__ import annotations

import sqlalchemy as sa

__all__ = [
    "SCHEMA_VERSION",
    "metadata",
    "meta",
    "images",
    "tiles",
    "annotators",
    "annotations",
    "drafts",
    "model_versions",
    "model_weights",
    "proposals",
    "events",
    "rankings",
    "ranking_items",
    "assignments",
]

#: Bumped when the tables change; the store refuses a database of another version and
#: ``labeler upgrade`` brings an older one up to it (:mod:`labeler.store.migrate`).
#: 1: the first release. 2: free text without length limits, hold heartbeats. 3: model
#: weights kept in the database and versions numbered by it; image sizes for cheap checks.
SCHEMA_VERSION = 3

metadata = sa.MetaData()

meta = sa.Table(
    "meta",
    metadata,
    sa.Column("key", sa.Text, primary_key=True),
    sa.Column("value", sa.Text, nullable=False),
)

images = sa.Table(
    "images",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("name", sa.Text, nullable=False, unique=True),
    sa.Column("path", sa.Text, nullable=False),
    sa.Column("sha256", sa.String(64), nullable=False, unique=True),
    sa.Column("width", sa.Integer, nullable=False),
    sa.Column("height", sa.Integer, nullable=False),
    sa.Column("bands", sa.Integer, nullable=False),
    sa.Column("dtype", sa.String(16), nullable=False),
    sa.Column("crs", sa.Text, nullable=True),
    sa.Column("transform", sa.JSON, nullable=True),
    sa.Column("georef_source", sa.String(16), nullable=True),
    sa.Column("added_at", sa.DateTime(timezone=True), nullable=False),
    # bytes of the file as added (null for images added before schema version 3): a file
    # of another size is known changed without hashing it
    sa.Column("size", sa.BigInteger, nullable=True),
)

tiles = sa.Table(
    "tiles",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("image_id", sa.Integer, sa.ForeignKey("images.id"), nullable=False, index=True),
    sa.Column("row", sa.Integer, nullable=False),
    sa.Column("col", sa.Integer, nullable=False),
    sa.Column("height", sa.Integer, nullable=False),
    sa.Column("width", sa.Integer, nullable=False),
    sa.Column("state", sa.String(16), nullable=False, index=True),
    sa.Column("overlap", sa.Boolean, nullable=False, default=False),
    sa.Column("held_by", sa.Integer, sa.ForeignKey("annotators.id"), nullable=True),
    # the holder's last sign of life (hold or heartbeat), by the database's clock; a hold
    # without one for longer than the lease is free to take (see labeler.store.holds)
    sa.Column("heartbeat_at", sa.DateTime(timezone=True), nullable=True),
    sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
    sa.UniqueConstraint("image_id", "row", "col", name="uq_tile_window"),
)

annotators = sa.Table(
    "annotators",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("name", sa.Text, nullable=False, unique=True),
    sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
)

annotations = sa.Table(
    "annotations",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("tile_id", sa.Integer, sa.ForeignKey("tiles.id"), nullable=False),
    sa.Column("version", sa.Integer, nullable=False),
    sa.Column("parent_version", sa.Integer, nullable=True),
    sa.Column("annotator_id", sa.Integer, sa.ForeignKey("annotators.id"), nullable=False),
    sa.Column("kind", sa.String(16), nullable=False),
    sa.Column("state", sa.String(16), nullable=False),
    sa.Column("mask_png", sa.LargeBinary, nullable=False),
    sa.Column("height", sa.Integer, nullable=False),
    sa.Column("width", sa.Integer, nullable=False),
    sa.Column("seconds", sa.Float, nullable=False, default=0.0),
    sa.Column("actions", sa.Integer, nullable=False, default=0),
    sa.Column("proposal_id", sa.Integer, sa.ForeignKey("proposals.id"), nullable=True),
    sa.Column("source", sa.Text, nullable=False, default="editor"),
    sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
    sa.UniqueConstraint("tile_id", "version", name="uq_annotation_version"),
    sa.Index("ix_annotations_tile_annotator", "tile_id", "annotator_id"),
)

drafts = sa.Table(
    "drafts",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("tile_id", sa.Integer, sa.ForeignKey("tiles.id"), nullable=False),
    sa.Column("annotator_id", sa.Integer, sa.ForeignKey("annotators.id"), nullable=False),
    sa.Column("mask_png", sa.LargeBinary, nullable=False),
    sa.Column("scribble_png", sa.LargeBinary, nullable=True),
    sa.Column("parent_version", sa.Integer, nullable=True),
    sa.Column("seconds", sa.Float, nullable=False, default=0.0),
    sa.Column("actions", sa.Integer, nullable=False, default=0),
    sa.Column("saved_at", sa.DateTime(timezone=True), nullable=False),
    sa.UniqueConstraint("tile_id", "annotator_id", name="uq_draft_owner"),
)

model_versions = sa.Table(
    "model_versions",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("kind", sa.String(16), nullable=False),  # "cold_start", "head" or "encoder"
    sa.Column("name", sa.Text, nullable=False),
    sa.Column("encoder_version", sa.Text, nullable=True),
    # the file the weights were first written to, relative to the project (the weights
    # themselves are in model_weights; a row of schema version 2 may only have the file)
    sa.Column("checkpoint", sa.Text, nullable=True),
    sa.Column("n_train_tiles", sa.Integer, nullable=False, default=0),
    sa.Column("val_iou", sa.JSON, nullable=True),  # {class name: IoU or null}
    sa.Column("miou", sa.Float, nullable=True),
    sa.Column("details", sa.JSON, nullable=True),
    sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
    # 1, 2, 3 ... per kind, given by the database when the row is written
    sa.Column("number", sa.Integer, nullable=True),
    sa.UniqueConstraint("kind", "number", name="uq_model_number"),
)

model_weights = sa.Table(
    "model_weights",
    metadata,
    sa.Column(
        "model_version_id", sa.Integer, sa.ForeignKey("model_versions.id"), primary_key=True
    ),
    sa.Column("sha256", sa.String(64), nullable=False),
    sa.Column("size", sa.BigInteger, nullable=False),
    sa.Column("data", sa.LargeBinary, nullable=False),  # a torch.save file, plain data only
)

proposals = sa.Table(
    "proposals",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("tile_id", sa.Integer, sa.ForeignKey("tiles.id"), nullable=False, index=True),
    sa.Column("model_version_id", sa.Integer, sa.ForeignKey("model_versions.id"), nullable=False),
    sa.Column("mask_png", sa.LargeBinary, nullable=False),
    sa.Column("height", sa.Integer, nullable=False),
    sa.Column("width", sa.Integer, nullable=False),
    sa.Column("uncertainty", sa.LargeBinary, nullable=True),  # .npy float16 (3, h, w)
    sa.Column("embedding", sa.LargeBinary, nullable=True),  # .npy float32 (D,)
    sa.Column("mean_entropy", sa.Float, nullable=True),
    sa.Column("mean_margin", sa.Float, nullable=True),
    sa.Column("mean_bald", sa.Float, nullable=True),
    sa.Column("mean_least_confidence", sa.Float, nullable=True),
    sa.Column("class_fractions", sa.JSON, nullable=True),  # list aligned with class indices
    sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
)

events = sa.Table(
    "events",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("at", sa.DateTime(timezone=True), nullable=False, index=True),
    sa.Column("kind", sa.Text, nullable=False),
    sa.Column("tile_id", sa.Integer, nullable=True, index=True),
    sa.Column("annotator_id", sa.Integer, nullable=True),
    sa.Column("detail", sa.JSON, nullable=True),
)

rankings = sa.Table(
    "rankings",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("strategy", sa.String(16), nullable=False),
    sa.Column("k", sa.Integer, nullable=False),
    sa.Column("seed", sa.Integer, nullable=False),
    sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
)

ranking_items = sa.Table(
    "ranking_items",
    metadata,
    sa.Column("ranking_id", sa.Integer, sa.ForeignKey("rankings.id"), primary_key=True),
    sa.Column("tile_id", sa.Integer, sa.ForeignKey("tiles.id"), primary_key=True),
    sa.Column("rank", sa.Integer, nullable=False),
    sa.Column("score", sa.Float, nullable=False),
    sa.Column("reason", sa.Text, nullable=False),
    sa.Column("in_batch", sa.Boolean, nullable=False, default=False),
)

assignments = sa.Table(
    "assignments",
    metadata,
    sa.Column("tile_id", sa.Integer, sa.ForeignKey("tiles.id"), primary_key=True),
    sa.Column("annotator_id", sa.Integer, sa.ForeignKey("annotators.id"), primary_key=True),
    sa.Column("assigned_at", sa.DateTime(timezone=True), nullable=False),
)
