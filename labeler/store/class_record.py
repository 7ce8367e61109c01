"""The label classes a project's saved masks were made with, checked against its settings.

The ``[classes]`` table of ``labeler.toml`` may change: a class may be renamed or added.
But a class whose index saved masks still use must not disappear, or those masks would
hold values no class explains (export, retraining and agreement would fail on them).
The store records the class table (index -> name) in its ``meta`` table; when the
settings no longer define an index the record has, the saved masks are read once to see
whether any uses it. If one does, the project does not open, with one line naming the
class, how many masks use it and the fix; if none does, the new table is recorded.
"""

from __future__ import annotations

import json

import numpy as np
import sqlalchemy as sa

from labeler.classes import UNLABELLED, ClassSchema
from labeler.errors import StoreError
from labeler.imagery.write import png_decode
from labeler.store import schema as t

__all__ = ["CLASSES_KEY", "class_table", "record_classes", "check_classes"]

#: Key of the class record in the ``meta`` table.
CLASSES_KEY = "classes"


def class_table(schema: ClassSchema) -> dict[int, str]:
    """Index -> name of every class of ``schema``.

    Parameters
    ----------
    schema : ClassSchema
        The project's label schema.

    Returns
    -------
    dict of int to str
        Class index to class name.
    """
    return {c.index: c.name for c in schema.classes}


def record_classes(conn: sa.Connection, schema: ClassSchema) -> None:
    """Write (or replace) the class record inside the caller's transaction.

    Parameters
    ----------
    conn : sqlalchemy.Connection
        An open write transaction.
    schema : ClassSchema
        The classes saved masks use from now on.
    """
    value = json.dumps({str(i): n for i, n in sorted(class_table(schema).items())})
    conn.execute(t.meta.delete().where(t.meta.c.key == CLASSES_KEY))
    conn.execute(t.meta.insert().values(key=CLASSES_KEY, value=value))


def _recorded(conn: sa.Connection) -> dict[int, str] | None:
    raw = conn.execute(sa.select(t.meta.c.value).where(t.meta.c.key == CLASSES_KEY)).scalar()
    if raw is None:
        return None
    try:
        return {int(k): str(v) for k, v in json.loads(raw).items()}
    except (ValueError, AttributeError, TypeError):
        return None  # a damaged record: judge by the masks themselves


def _masks_using(
    conn: sa.Connection, allowed: set[int]
) -> tuple[int, set[int], tuple[int, int] | None]:
    """Saved masks holding values no class of ``allowed`` explains.

    Returns
    -------
    masks : int
        How many saved masks (any version) hold such values.
    indices : set of int
        Those values.
    first : (tile id, version) or None
        The first such mask.
    """
    masks, indices, first = 0, set(), None
    lut = np.ones(256, bool)
    lut[list(allowed | {UNLABELLED})] = False
    rows = conn.execute(
        sa.select(t.annotations.c.tile_id, t.annotations.c.version, t.annotations.c.mask_png)
    )
    for tile_id, version, data in rows:
        try:
            values = np.unique(png_decode(data))
        except Exception:  # noqa: BLE001 - a damaged row is reported where it is read
            continue
        foreign = values[lut[values]]
        if foreign.size:
            masks += 1
            indices.update(foreign.tolist())
            if first is None:
                first = (int(tile_id), int(version))
    return masks, indices, first


def check_classes(engine: sa.Engine, schema: ClassSchema, *, where: str, read_only: bool) -> None:
    """Refuse settings that drop a class saved masks use; record a changed class table.

    Parameters
    ----------
    engine : sqlalchemy.Engine
        The open store.
    schema : ClassSchema
        The classes of the project's settings.
    where : str
        How messages name the database.
    read_only : bool
        The store cannot be written: the check is made, nothing is recorded.

    Raises
    ------
    StoreError
        ``kind="classes"``, naming the dropped class (index and old name), how many saved
        masks use it, the first tile and version, and the fix.
    """
    current = class_table(schema)
    with engine.connect() as conn:
        recorded = _recorded(conn)
    if recorded == current:
        return
    # an older database has no record: its masks are read once, like after a change
    if recorded is None or not set(recorded) <= set(current):
        with engine.connect() as conn:
            masks, indices, first = _masks_using(conn, set(current))
        if masks:
            named = ", ".join(
                f"{i}" + (f" ({recorded[i]!r})" if recorded and i in recorded else "")
                for i in sorted(indices)
            )
            raise StoreError(
                f"{where}: the [classes] table of labeler.toml no longer defines class index "
                f"{named}, but {masks} saved mask(s) use it (first: tile {first[0]}, version "
                f"{first[1]}); "
                "put the class back in [classes] (renaming keeps the index), or remove "
                "[classes] for the default classes",
                kind="classes",
            )
    if not read_only:
        with engine.connect().execution_options(write=True) as conn, conn.begin():
            record_classes(conn, schema)
