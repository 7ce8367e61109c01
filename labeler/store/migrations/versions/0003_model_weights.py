"""Revision 0003 (schema version 3): model versions a whole team can use.

- ``model_weights``: the bytes of each model version's weights (a head checkpoint or an
  adapted encoder), so any machine joined to the project can propose with any version;
- ``model_versions.number``: 1, 2, 3 ... per kind, given by the database (two machines
  training at once get two numbers); rows already there are numbered in the order they
  were added;
- ``images.size``: bytes of the image file as added, for a cheap check before a hash.

The weights of versions made before this revision are still files in the ``models/``
folder of the machine that made them; ``labeler upgrade`` run in that folder reads them
into the database (:func:`labeler.project.upgrade_project`), and a machine that opens
such a version and has the file does the same.
"""

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

_meta = sa.table("meta", sa.column("key", sa.Text), sa.column("value", sa.Text))
_versions = sa.table(
    "model_versions", sa.column("id", sa.Integer), sa.column("kind", sa.String),
    sa.column("number", sa.Integer),
)


def upgrade() -> None:
    op.add_column("images", sa.Column("size", sa.BigInteger, nullable=True))
    op.add_column("model_versions", sa.Column("number", sa.Integer, nullable=True))
    bind = op.get_bind()
    seen: dict[str, int] = {}
    for vid, kind in bind.execute(
        sa.select(_versions.c.id, _versions.c.kind).order_by(_versions.c.id)
    ).all():
        seen[kind] = seen.get(kind, 0) + 1
        bind.execute(_versions.update().where(_versions.c.id == vid).values(number=seen[kind]))
    with op.batch_alter_table("model_versions") as batch:
        batch.create_unique_constraint("uq_model_number", ["kind", "number"])
    op.create_table(
        "model_weights",
        sa.Column(
            "model_version_id", sa.Integer, sa.ForeignKey("model_versions.id"), primary_key=True
        ),
        sa.Column("sha256", sa.String(64), nullable=False),
        sa.Column("size", sa.BigInteger, nullable=False),
        sa.Column("data", sa.LargeBinary, nullable=False),
    )
    op.execute(_meta.update().where(_meta.c.key == "schema_version").values(value="3"))


def downgrade() -> None:
    op.execute(_meta.update().where(_meta.c.key == "schema_version").values(value="2"))
    op.drop_table("model_weights")
    with op.batch_alter_table("model_versions") as batch:
        batch.drop_constraint("uq_model_number", type_="unique")
        batch.drop_column("number")
    with op.batch_alter_table("images") as batch:
        batch.drop_column("size")
