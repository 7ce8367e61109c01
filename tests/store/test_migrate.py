"""Upgrading a project database made by the first release (schema version 1).

``data/project_v1.json`` holds every row of a small project made by the first release
(an image of 3 x 2 tiles, one saved mask, one hold, a cold-start model version, events),
written out once by that release's store and never regenerated. The test builds the
release's tables with the baseline migration, loads those rows, upgrades, and opens
the result with this release's store, on SQLite and on PostgreSQL.
"""

import base64
import json
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
import sqlalchemy as sa
from alembic import command

from labeler.errors import LabelerError
from labeler.store import Store
from labeler.store import schema as t
from labeler.store.migrate import _config, head_revision, upgrade_database

FIXTURE = Path(__file__).with_name("data") / "project_v1.json"
# the order rows can go in with foreign keys on
ORDER = ["meta", "annotators", "images", "tiles", "model_versions", "proposals",
         "annotations", "drafts", "events", "rankings", "ranking_items", "assignments"]


def _value(v):
    if isinstance(v, dict) and "base64" in v:
        return base64.b64decode(v["base64"])
    if isinstance(v, dict) and "time" in v:
        return datetime.fromisoformat(v["time"])
    return v


def make_v1_database(url):
    """The first release's tables (baseline revision) holding the fixture's rows."""
    data = json.loads(FIXTURE.read_text())
    engine = sa.create_engine(url)
    try:
        with engine.begin() as conn:
            command.upgrade(_config(conn), "0001")
            conn.execute(sa.text("DROP TABLE alembic_version"))  # that release had none
            conn.execute(sa.text("DELETE FROM meta"))
            md = sa.MetaData()
            md.reflect(conn)
            for name in ORDER:
                rows = [{k: _value(v) for k, v in r.items()} for r in data["tables"][name]]
                if rows:
                    conn.execute(md.tables[name].insert(), rows)
            if conn.dialect.name == "postgresql":  # rows came with their ids
                for name in ORDER:
                    if "id" in md.tables[name].c:
                        conn.execute(sa.text(
                            f"SELECT setval(pg_get_serial_sequence('{name}', 'id'), "
                            f"COALESCE((SELECT MAX(id) FROM {name}), 1))"))
    finally:
        engine.dispose()


def test_a_first_release_project_opens_after_an_upgrade(store_url, backend):
    make_v1_database(store_url)
    with pytest.raises(
        LabelerError, match=rf"schema version 1, this labeler reads {t.SCHEMA_VERSION}.*labeler upgrade"
    ):
        Store(store_url)
    result = upgrade_database(store_url)
    assert (result.from_version, result.to_version) == (1, t.SCHEMA_VERSION)
    if backend == "sqlite":  # the file was copied before any change, and the copy is v1
        assert result.backup is not None and result.backup.name.startswith("labeler.db.v1-")
        copy = sa.create_engine(f"sqlite:///{result.backup}")
        with copy.connect() as conn:
            assert conn.execute(sa.text(
                "SELECT value FROM meta WHERE key = 'schema_version'")).scalar() == "1"
        copy.dispose()
    else:
        assert result.backup is None
    with Store(store_url) as store:
        tiles = store.tiles()
        assert len(tiles) == 6 and tiles[1].held_by == "tomas"
        saved = store.annotation_history(tiles[0].id)
        assert [(a.version, a.annotator, a.source) for a in saved] == [(1, "ines", "import")]
        mask = saved[0].mask()  # the fixture's mask, drawn by hand when it was made
        assert int((mask == 1).sum()) == 30 * 40 and int((mask == 2).sum()) == 20 * 20
        # the upgraded store takes a save on the old lineage, with a long free-text source
        source = "import of brackenlow-east-block_mask_from_the_spring_survey.png"
        rec = store.save_annotation(tiles[0].id, "ines", np.zeros(tiles[0].shape, np.uint8),
                                    parent_version=1, source=source)
        assert rec.version == 2 and store.annotation_history(tiles[0].id)[-1].source == source
        # the release's cold-start version is numbered 1 of its kind; a new head is head-1
        assert [(m.kind, m.number) for m in store.model_versions()] == [("cold_start", 1)]
        assert store.add_model_version(kind="head", weights=b"x").name == "head-1"
    engine = sa.create_engine(store_url)
    with engine.connect() as conn:
        assert conn.execute(sa.text("SELECT version_num FROM alembic_version")).scalar() == (
            head_revision()
        )
    engine.dispose()
    # a second upgrade has nothing to do and makes no copy
    assert upgrade_database(store_url) == type(result)(t.SCHEMA_VERSION, t.SCHEMA_VERSION, None)


def test_upgrade_refuses_an_empty_database(store_url):
    with pytest.raises(LabelerError, match="no labeler project database here; nothing to upgrade"):
        upgrade_database(store_url)


def test_new_databases_are_stamped_with_the_newest_revision(store_url):
    Store(store_url, create=True).close()
    engine = sa.create_engine(store_url)
    with engine.connect() as conn:
        assert conn.execute(sa.text("SELECT version_num FROM alembic_version")).scalar() == "0003"
        assert head_revision() == "0003"
    engine.dispose()
