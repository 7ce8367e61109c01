"""Revision 0002 (schema version 2): a store a team can share on PostgreSQL.

- free text without length limits: names, annotation sources, event kinds, pick
  reasons (PostgreSQL enforces ``VARCHAR(n)``, SQLite ignores it, so SQLite keeps its
  columns as they are);
- ``tiles.heartbeat_at``: the holder's last sign of life, for holds as leases.
"""

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None

#: (table, column, old type) of every column that becomes TEXT
TEXT_COLUMNS = [
    ("meta", "key", sa.String(64)),
    ("images", "name", sa.String(255)),
    ("annotators", "name", sa.String(128)),
    ("annotations", "source", sa.String(32)),
    ("model_versions", "name", sa.String(128)),
    ("model_versions", "encoder_version", sa.String(128)),
    ("events", "kind", sa.String(32)),
    ("ranking_items", "reason", sa.String(32)),
]

_meta = sa.table("meta", sa.column("key", sa.Text), sa.column("value", sa.Text))


def upgrade() -> None:
    op.add_column("tiles", sa.Column("heartbeat_at", sa.DateTime(timezone=True), nullable=True))
    if op.get_bind().dialect.name != "sqlite":
        for table, column, old in TEXT_COLUMNS:
            op.alter_column(table, column, type_=sa.Text, existing_type=old)
    op.execute(_meta.update().where(_meta.c.key == "schema_version").values(value="2"))


def downgrade() -> None:
    op.execute(_meta.update().where(_meta.c.key == "schema_version").values(value="1"))
    if op.get_bind().dialect.name != "sqlite":
        for table, column, old in TEXT_COLUMNS:
            op.alter_column(table, column, type_=old, existing_type=sa.Text)
    with op.batch_alter_table("tiles") as batch:
        batch.drop_column("heartbeat_at")
