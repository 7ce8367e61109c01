"""Persistence: the only room that talks to the database (SQLAlchemy Core).

Callers use :class:`Store` and the plain records it takes and returns; no SQL object
leaves this package.
"""

from labeler.store.annotations import NewAnnotation
from labeler.store.images import NewImage
from labeler.store.proposals import NewProposal
from labeler.store.records import (
    AnnotationRecord,
    DraftRecord,
    EventRecord,
    ImageRecord,
    ModelVersionRecord,
    PickItem,
    ProposalRecord,
    TileRecord,
)
from labeler.store.store import Store

__all__ = [
    "Store",
    "NewImage",
    "NewAnnotation",
    "NewProposal",
    "ImageRecord",
    "TileRecord",
    "AnnotationRecord",
    "DraftRecord",
    "ModelVersionRecord",
    "ProposalRecord",
    "PickItem",
    "EventRecord",
]
