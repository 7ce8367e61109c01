"""The backend interface and the in-memory backend."""

from __future__ import annotations

import numpy as np
import pytest

from labeler.editor.backend import Draft, EditorBackend, MemoryBackend
from labeler.errors import ConflictError
from labeler.workflow.editing import StoreBackend
from tests.editor.child import FolderBackend


def test_backends_meet_the_protocol():
    assert isinstance(MemoryBackend(), EditorBackend)
    assert isinstance(FolderBackend.__new__(FolderBackend), EditorBackend)
    # the project's backend lives in the workflow, which imports nothing from the editor
    assert isinstance(StoreBackend.__new__(StoreBackend), EditorBackend)


def test_memory_backend_returns_its_state_and_keeps_the_label():
    b = MemoryBackend(state="accepted")
    mask = np.ones((3, 4), np.uint8)
    assert b.save(mask, kind="full", actions=2, seconds=1.5) == "accepted"
    (saved,) = b.saved
    assert (saved.kind, saved.actions, saved.seconds) == ("full", 2, 1.5)
    np.testing.assert_array_equal(saved.mask, mask)
    with pytest.raises(ValueError, match=r"kind: expected one of \('full', 'scribble'\)"):
        b.save(mask, kind="outline", actions=0, seconds=0.0)


def test_memory_backend_conflict_carries_theirs_and_writes_nothing():
    theirs = np.zeros((3, 4), np.uint8)
    b = MemoryBackend(conflict=theirs, tile_id=7)
    with pytest.raises(ConflictError, match="tile 7: someone saved it") as info:
        b.save(np.ones((3, 4), np.uint8), kind="full", actions=1, seconds=0.0)
    np.testing.assert_array_equal(info.value.theirs, theirs)
    assert b.saved == []


def test_memory_backend_drafts():
    b = MemoryBackend()
    assert b.load_draft() is None
    b.save_draft(np.ones((2, 2), np.uint8), np.full((2, 2), 255, np.uint8), actions=3,
                 seconds=4.0)
    d = b.load_draft()
    assert isinstance(d, Draft) and (d.actions, d.seconds) == (3, 4.0)
    b.discard_draft()
    assert b.load_draft() is None and b.drafts_written == 1
