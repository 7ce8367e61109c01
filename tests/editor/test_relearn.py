"""Learning on the tile in the editor: one weak-label stroke on one weed, its look-alike follows.

The learner is the model room's real on-tile re-fit (:class:`labeler.model.ontile.TileLearner`)
on the hand-made scene of ``tests/model/ontile_scene.py`` (invented, common practice, no
source): a head trained on green crop and yellow weeds, and a tile with a green crop disk
and two purple weeds the head never saw. The truth of every disk is known, so the checks
count pixels against it. The key-table and session tests use a stand-in learner.
"""

from __future__ import annotations

import numpy as np
import pytest

from labeler.classes import UNLABELLED
from labeler.editor.backend import MemoryBackend
from labeler.editor.keys import command_for
from labeler.editor.session import EditorSession
from labeler.editor.state import EditorState
from labeler.model.ontile import TileLearner
from tests.model.ontile_scene import disk, trained_scene

WEED = 2
# one short stroke along row 44 inside the first purple weed (centre (44, 18), radius 7)
STROKE = [(44.0, 14.0), (44.0, 22.0)]


@pytest.fixture
def editor():
    head, feats, tile, truth = trained_scene()
    learner = TileLearner(head, feats, image=tile)
    state = EditorState(tile, learner.proposal(), view_shape=(64, 64), active_class=WEED)
    state.radius = 1
    state.learner = learner.fit
    return state, truth


def _areas(truth):
    return disk(44, 18, 7), disk(40, 46, 7), disk(16, 16, 9), truth == 0


def test_one_scribble_with_relearn_on_scribble_corrects_the_untouched_second_weed(editor):
    state, truth = editor
    first, second, crop, soil = _areas(truth)
    before = state.mask
    assert (before[second] == WEED).mean() < 0.5  # the head does not know purple weeds
    state.relearn_on_scribble = True
    assert state.scribble(STROKE)
    assert not (state.weak_label[second] != UNLABELLED).any()  # the second weed untouched
    after = state.mask
    assert (after[second] == WEED).mean() >= 0.9
    assert (after[first] == WEED).mean() >= 0.9
    assert (after[crop] == 1).mean() >= 0.9 and (after[soil] == 0).mean() >= 0.98
    assert state.actions == 1  # the stroke is the one action; the re-fit rides on it
    np.testing.assert_array_equal(state.base, after)  # the re-fit is the new model layer
    assert state.undo()  # stroke and re-fit are one edit
    np.testing.assert_array_equal(state.mask, before)
    assert not state.has_weak_label


def test_the_relearn_key_after_a_scribble_does_the_same_and_keeps_hand_edits(editor):
    state, truth = editor
    _, second, _, soil = _areas(truth)
    state.scribble(STROKE)
    assert (state.mask[second] == WEED).mean() < 0.5  # a scribble alone changes no mask
    state.active_class = 1
    before = state.mask.copy()
    state.paint([(5.0, 55.0), (5.0, 60.0)])  # a hand edit: crop painted on soil
    painted = (state.mask == 1) & (before != 1) & soil  # the pixels the stroke changed
    assert painted.sum() > 0
    assert state.relearn()
    assert state.actions == 3
    after = state.mask
    assert (after[second] == WEED).mean() >= 0.9
    assert (after[painted] == 1).all()  # hand edits survive the re-fit
    # erase brings back the re-fitted layer, not the first proposal
    state.erase([(40.0, 44.0), (40.0, 48.0)])
    np.testing.assert_array_equal(state.mask[second], after[second])


def test_without_a_learner_or_marks_relearn_says_why_and_changes_nothing():
    state = EditorState(np.zeros((8, 8, 3), np.uint8), np.zeros((8, 8), np.uint8),
                        view_shape=(64, 64))
    assert not state.relearn()
    assert "no trained model" in state.notice
    state.learner = lambda marks: np.ones_like(marks)
    assert not state.relearn()
    assert "nothing marked yet" in state.notice
    assert not state.changed and state.actions == 2


def test_a_learner_of_the_wrong_shape_is_named():
    state = EditorState(np.zeros((8, 8, 3), np.uint8), np.zeros((8, 8), np.uint8),
                        view_shape=(64, 64), active_class=WEED)
    state.learner = lambda marks: np.ones((4, 4), np.uint8)
    state.scribble([(2.0, 2.0), (2.0, 5.0)])
    with pytest.raises(ValueError, match=r"learner: expected a \(H, W\) uint8 proposal"):
        state.relearn()


def test_the_relearn_key_in_a_session_asks_the_backend():
    image = np.zeros((8, 8, 3), np.uint8)
    seen = []

    def learner(marks):
        seen.append(marks.copy())
        return np.where(marks == UNLABELLED, WEED, marks).astype(np.uint8)

    backend = MemoryBackend(learner=learner)
    state = EditorState(image, np.zeros((8, 8), np.uint8), view_shape=(64, 64),
                        active_class=1)
    session = EditorSession(state, backend=backend, title="relearn")
    state.scribble([(2.0, 2.0), (2.0, 5.0)])
    assert command_for(ord("i")) == "relearn"
    session.on_key(ord("i"))
    assert backend.relearned == 1 and "learnt from your marks" in session.message
    # all 64 pixels of the 8 x 8 tile went from soil to the learner's answer
    assert "64 pixels changed; u undoes it" in session.message
    session.on_key(ord("i"))  # the same marks again: the same answer, nothing moves
    assert "nothing changed, the proposal already agrees with them" in session.message
    marks = seen[0]
    assert set(np.unique(marks).tolist()) == {1, UNLABELLED}
    # everything not marked took the learner's answer
    np.testing.assert_array_equal(state.mask, np.where(marks == 1, 1, WEED))
