"""Learning on one tile through the store: the editor's backend re-fits the newest head, and
the weak labels saved take part in the next retrain.

The project is the small invented one of ``tests/workflow/conftest.py`` (random pixels);
the checks are about the plumbing (shapes, which head, which marks reach training), the
re-fit's effect on look-alikes is checked in ``tests/model/test_ontile.py`` and
``tests/editor/test_relearn.py``.
"""

from __future__ import annotations

import numpy as np
import pytest

from labeler.classes import UNLABELLED
from labeler.states import KIND_FULL, KIND_WEAK
from labeler.workflow import save_tile_mask
from labeler.workflow.editing import StoreBackend
from labeler.workflow.retraining import labelled_tiles, retrain
from tests.workflow.conftest import _small_project, adapted_encoder_version


@pytest.fixture
def quick_project(tmp_path):
    # tiny training for the test: one epoch on the cached features
    p = _small_project(
        tmp_path, "[model]\nepochs = 1\nmc_samples = 2\nmin_labelled_tiles = 3\naugment = \"features\"\n"
    )
    yield p
    p.close()


def _weak(shape, box, cls):
    m = np.full(shape, UNLABELLED, np.uint8)
    m[box] = cls
    return m


def test_weak_labels_saved_in_two_sessions_both_reach_training(project):
    t = project.store.tiles()[0]
    first = save_tile_mask(project, t.id, "ines", _weak(t.shape, np.s_[0:10, 0:10], 2),
                           parent_version=None, kind=KIND_WEAK)
    save_tile_mask(project, t.id, "ines", _weak(t.shape, np.s_[5:20, 5:20], 1),
                   parent_version=first.version, kind=KIND_WEAK)
    (item,) = labelled_tiles(project)
    assert item.kind == KIND_WEAK
    want = np.full(t.shape, UNLABELLED, np.uint8)
    want[0:10, 0:10] = 2
    want[5:20, 5:20] = 1  # the newer save wins where both mark
    np.testing.assert_array_equal(item.mask, want)


def test_relearn_without_a_trained_head_gives_none(project):
    t = project.store.tiles()[0]
    backend = StoreBackend(project, t.id, "ines", parent_version=None, proposal_id=None)
    marks = _weak(t.shape, np.s_[0:4, 0:4], 2)
    assert backend.relearn(marks) is None
    assert backend.relearn(marks) is None  # remembered: no second look for a head


def test_relearn_with_the_newest_head_and_the_hints_in_the_next_retrain(quick_project):
    project = quick_project
    store = project.store
    tiles = store.tiles()
    rng = np.random.default_rng(5)
    for t in tiles[:3]:
        save_tile_mask(project, t.id, "ines", rng.integers(0, 3, t.shape).astype(np.uint8),
                       parent_version=None)
    first = retrain(project)
    t = tiles[4]
    backend = StoreBackend(project, t.id, "ines", parent_version=None, proposal_id=None)
    marks = _weak(t.shape, np.s_[10:14, 10:60], 2)
    marks[100:104, 10:60] = 1
    out = backend.relearn(marks)
    assert out.shape == t.shape and out.dtype == np.uint8
    assert set(np.unique(out).tolist()) <= set(project.settings.classes.indices)
    assert backend._relearner.model == first.model_version.name
    # the hints saved as a weak label are training data of the next retrain
    save_tile_mask(project, t.id, "ines", marks, parent_version=None, kind=KIND_WEAK)
    kinds = {it.tile.id: it.kind for it in labelled_tiles(project)}
    assert kinds[t.id] == KIND_WEAK and list(kinds.values()).count(KIND_FULL) == 3
    second = retrain(project)
    assert second.n_weak == 1 and second.n_full == 3


def test_relearn_reads_the_heads_own_encoder_when_a_newer_one_was_adapted(quick_project):
    # a head trained on the ImageNet encoder, then a newer adapted encoder version: the
    # re-fit still uses the head's encoder (before, it refused with "run labeler retrain")
    project = quick_project
    tiles = project.store.tiles()
    rng = np.random.default_rng(6)
    for t in tiles[:3]:
        save_tile_mask(project, t.id, "ines", rng.integers(0, 3, t.shape).astype(np.uint8),
                       parent_version=None)
    first = retrain(project)
    adapted = adapted_encoder_version(project)
    assert adapted.encoder_version != first.model_version.encoder_version
    t = tiles[4]
    backend = StoreBackend(project, t.id, "ines", parent_version=None, proposal_id=None)
    out = backend.relearn(_weak(t.shape, np.s_[10:14, 10:60], 2))
    assert out.shape == t.shape and out.dtype == np.uint8
    assert backend._relearner.model == first.model_version.name
