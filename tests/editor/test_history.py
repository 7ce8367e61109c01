"""Undo history: compact bounding-box diffs over layers edited in place."""

from __future__ import annotations

import numpy as np

from labeler.editor.history import EditHistory


def _bbox_loop(a: np.ndarray, b: np.ndarray):
    """Slow reference: the tight box of pixels where a and b differ, by a pixel loop."""
    rows, cols = [], []
    for r in range(a.shape[0]):
        for c in range(a.shape[1]):
            if a[r, c] != b[r, c]:
                rows.append(r)
                cols.append(c)
    if not rows:
        return None
    return min(rows), max(rows) + 1, min(cols), max(cols) + 1


def test_record_keeps_the_tight_box_of_changed_pixels():
    rng = np.random.default_rng(0)
    mask = rng.integers(0, 4, (16, 20)).astype(np.uint8)
    start = mask.copy()
    h = EditHistory({"mask": mask})
    mask[3, 5] = (mask[3, 5] + 1) % 4
    mask[9, 2] = (mask[9, 2] + 1) % 4
    mask[6, 11] = (mask[6, 11] + 1) % 4
    (box,) = h.record([("mask", (0, 16, 0, 20))])
    assert box == _bbox_loop(start, mask) == (3, 10, 2, 12)
    assert h.nbytes == 2 * 7 * 10  # before and after, uint8
    assert h.can_undo and not h.can_redo


def test_record_sees_only_the_given_box_and_nothing_changed_adds_nothing():
    mask = np.zeros((8, 8), np.uint8)
    h = EditHistory({"mask": mask})
    mask[6, 6] = 2
    assert h.record([("mask", (0, 4, 0, 4))]) == []  # the change lies outside the box
    assert not h.can_undo
    assert h.record([("mask", None)]) == [(6, 7, 6, 7)]


def test_undo_redo_write_back_into_the_live_layers():
    mask = np.zeros((6, 6), np.uint8)
    weak = np.full((6, 6), 255, np.uint8)
    h = EditHistory({"mask": mask, "weak_label": weak})
    mask[1:3, 1:3] = 1
    weak[4, :] = 2
    assert h.record([("mask", None), ("weak_label", None)]) == [(1, 3, 1, 3), (4, 5, 0, 6)]
    after_mask, after_weak = mask.copy(), weak.copy()
    assert h.undo() == [(1, 3, 1, 3), (4, 5, 0, 6)]
    assert not mask.any() and (weak == 255).all()
    assert h.undo() is None
    assert h.redo() == [(1, 3, 1, 3), (4, 5, 0, 6)]
    np.testing.assert_array_equal(mask, after_mask)
    np.testing.assert_array_equal(weak, after_weak)
    assert h.redo() is None


def test_a_new_edit_clears_redo_and_diffs_chain():
    mask = np.zeros((4, 4), np.uint8)
    h = EditHistory({"mask": mask})
    mask[0, 0] = 1
    h.record([("mask", None)])
    mask[0, 0] = 2
    h.record([("mask", None)])
    h.undo()
    assert mask[0, 0] == 1 and h.can_redo
    mask[3, 3] = 3
    h.record([("mask", None)])
    assert not h.can_redo
    h.undo()
    h.undo()
    assert not mask.any()
