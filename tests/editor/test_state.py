"""The editor state facade: undo/redo over every tool, counters, draft, errors."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labeler.editor.state import EditorState
from labeler.masks.edits import stroke_mask
from tests.common import zoo_two_touching
from tests.editor.helpers import FakeClock, image_of, make_state


# ------------------------------------------------------------------ undo, redo, memory
def test_undo_redo_round_trip_and_new_edit_clears_redo():
    s = make_state(radius=1, active_class=2)
    s.paint([(1, 1), (1, 6)])
    after_one = s.mask
    s.paint([(6, 1), (6, 6)])
    assert s.undo()
    np.testing.assert_array_equal(s.mask, after_one)
    assert s.undo() and not s.changed
    assert not s.undo() and s.notice == "nothing to undo"
    assert s.redo() and s.redo()
    assert not s.redo()
    s.undo()
    s.paint([(4, 4)])
    assert not s.can_redo


def test_history_holds_only_the_bounding_box_of_changes():
    s = make_state(shape=(512, 512), radius=2, view_shape=(64, 64))
    s.paint([(100, 100), (100, 120)])
    fp = stroke_mask([(100, 100), (100, 120)], radius=2, shape=(512, 512))
    rows, cols = np.nonzero(fp)
    box = (rows.max() - rows.min() + 1) * (cols.max() - cols.min() + 1)
    assert s.history_bytes == 2 * box  # before and after, uint8, nothing else
    assert s.history_bytes < 512 * 512 // 100


def test_a_stroke_that_changes_nothing_counts_but_leaves_no_history():
    s = make_state(np.ones((8, 8), np.uint8), active_class=1)
    assert not s.paint([(2, 2), (2, 5)])
    assert s.actions == 1 and not s.can_undo


_ops = st.one_of(
    st.tuples(st.just("paint"), st.integers(0, 3), st.lists(
        st.tuples(st.floats(-2, 13), st.floats(-2, 13)), min_size=1, max_size=4)),
    st.tuples(st.just("erase"), st.integers(0, 3), st.lists(
        st.tuples(st.floats(-2, 13), st.floats(-2, 13)), min_size=1, max_size=4)),
    st.tuples(st.just("scribble"), st.integers(0, 3), st.lists(
        st.tuples(st.floats(-2, 13), st.floats(-2, 13)), min_size=1, max_size=4)),
    st.tuples(st.just("fill"), st.integers(0, 3), st.tuples(st.integers(0, 11),
                                                               st.integers(0, 11))),
    st.tuples(st.just("polygon"), st.integers(0, 3), st.lists(
        st.tuples(st.floats(-2, 13), st.floats(-2, 13)), min_size=3, max_size=6)),
    st.tuples(st.just("clear"), st.just(0), st.just(None)),
    st.tuples(st.just("refine"), st.just(0), st.just(None)),
)


def _run(s: EditorState, op) -> None:
    name, cls, arg = op
    s.active_class = cls
    if name in ("paint", "erase", "scribble"):
        getattr(s, name)(arg)
    elif name == "fill":
        s.fill_at(arg)
    elif name == "polygon":
        for v in arg:
            s.polygon_add(v)
        s.polygon_close()
    elif name == "clear":
        s.clear_weak_label()
    else:
        s.refine()


@settings(max_examples=30, deadline=None)
@given(ops=st.lists(_ops, min_size=1, max_size=8), radius=st.floats(0.5, 3.0))
def test_any_edits_then_undo_all_restores_and_redo_all_replays(ops, radius):
    proposal = zoo_two_touching()
    proposal = np.pad(proposal, ((0, 4), (0, 4)))  # 12 x 12
    s = EditorState(image_of((12, 12)), proposal, radius=radius, band_px=3, view_shape=(48, 48))
    start_mask, start_weak = s.mask, s.weak_label
    for op in ops:
        _run(s, op)
    end_mask, end_weak = s.mask, s.weak_label
    while s.undo():
        pass
    np.testing.assert_array_equal(s.mask, start_mask)
    np.testing.assert_array_equal(s.weak_label, start_weak)
    while s.redo():
        pass
    np.testing.assert_array_equal(s.mask, end_mask)
    np.testing.assert_array_equal(s.weak_label, end_weak)
    # the incrementally kept view equals a fresh render of the same masks
    fresh = EditorState(s.image, proposal, mask=end_mask, weak_label=end_weak,
                        view_shape=(48, 48))
    np.testing.assert_array_equal(s.render(), fresh.render())


# ------------------------------------------------------------------ counters
def test_active_seconds_leave_out_breaks_over_60_s():
    clock = FakeClock()
    s = make_state(clock=clock)
    for t in (0.0, 10.0, 100.0, 105.0):  # the 90 s gap is a break
        clock.t = t
        s.note_activity()
    assert s.seconds == pytest.approx(15.0)
    clock.t = 165.0  # exactly 60 s still counts
    s.note_activity()
    assert s.seconds == pytest.approx(75.0)


def test_edits_note_activity_through_the_clock():
    clock = FakeClock()
    s = make_state(clock=clock)
    s.note_activity()
    clock.t = 4.0
    s.paint([(1, 1)])
    clock.t = 6.5
    s.undo()
    assert s.seconds == pytest.approx(6.5) and s.actions == 2


# ------------------------------------------------------------------ errors
def test_constructor_and_setter_errors():
    img = image_of()
    with pytest.raises(ValueError, match=r"image: expected a \(H, W, 3\) uint8"):
        EditorState(img[:, :, 0], np.zeros((8, 8), np.uint8))
    with pytest.raises(ValueError, match=r"proposal: expected a uint8 array of shape \(8, 8\)"):
        EditorState(img, np.zeros((8, 7), np.uint8))
    with pytest.raises(ValueError, match="weak_label: expected a uint8 array"):
        EditorState(img, np.zeros((8, 8), np.uint8), weak_label=np.zeros((8, 8), np.int16))
    with pytest.raises(ValueError, match="connectivity: expected 4 or 8"):
        EditorState(img, np.zeros((8, 8), np.uint8), connectivity=6)
    with pytest.raises(ValueError, match="view_shape: expected"):
        EditorState(img, np.zeros((8, 8), np.uint8), view_shape=(4, 64))
    s = make_state()
    with pytest.raises(ValueError, match=r"active_class: expected one of the class indices"):
        s.active_class = 7
    with pytest.raises(ValueError, match="tool: expected one of brush"):
        s.tool = "lasso"
    with pytest.raises(ValueError, match="kind: expected one of brush, erase, scribble"):
        s.stroke_start((1, 1), kind="smudge")
    with pytest.raises(ValueError, match="opacity: expected a number in 0..1"):
        s.opacity = float("nan")
    with pytest.raises(ValueError, match="radius: expected a number of pixels"):
        s.radius = float("inf")
    with pytest.raises(ValueError, match="other: expected a uint8 array"):
        s.set_compare(np.zeros((3, 3), np.uint8))
    s.radius = 1000
    assert s.radius == 128.0
    s.opacity = 3
    assert s.opacity == 1.0
