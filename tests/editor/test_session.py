"""One editing session's logic, driven by a scripted window: saving, leaving, drafts,
conflicts, autosave, mouse and keys."""

from __future__ import annotations

import cv2
import numpy as np
import pytest

from labeler.classes import ClassSchema, LabelClass
from labeler.editor.backend import Draft, MemoryBackend
from labeler.editor.panels import STATUS_ROWS
from labeler.editor.session import EditorSession
from labeler.editor.window import run_editor
from tests.editor.script import (
    DRAG,
    VIEW,
    WEED,
    ScriptGui,
    coin_state,
    coin_tile,
    drag_steps,
    expected_stroke,
)


def test_stroke_then_enter_saves_the_full_mask_exactly_where_the_stroke_went():
    state = coin_state()
    backend = MemoryBackend()
    gui = ScriptGui([ord("2"), ord("d"), *drag_steps(DRAG), 13])
    outcome = run_editor(state, backend=backend, title="scripted", gui=gui)
    assert outcome.reason == "saved" and outcome.kind == "full" and outcome.actions == 1
    (saved,) = backend.saved
    assert saved.kind == "full" and saved.actions == 1
    expected = expected_stroke(DRAG)
    np.testing.assert_array_equal(saved.mask != state.proposal, expected)
    assert (saved.mask[expected] == WEED).all()
    assert gui.shape == (VIEW[0] + STATUS_ROWS, VIEW[1]) and gui.closed_called
    assert gui.frames[-1].shape == (VIEW[0] + STATUS_ROWS, VIEW[1], 3)


@pytest.mark.parametrize("recorded", ["accepted", "amended", "settled", "weak"])
@pytest.mark.parametrize("steps", [[13], [ord("2"), *drag_steps(DRAG), 13]],
                         ids=["unchanged", "changed"])
def test_the_outcome_reports_the_state_the_backend_recorded(recorded, steps):
    # the editor proposes no state: whatever the edit, it reports the backend's answer
    backend = MemoryBackend(state=recorded)
    session_state = coin_state()
    outcome = run_editor(session_state, backend=backend, title="t", gui=ScriptGui(steps))
    assert outcome.saved and outcome.state == recorded


def test_enter_without_edits_sends_the_unchanged_mask():
    backend = MemoryBackend()
    state = coin_state()
    run_editor(state, backend=backend, title="t", gui=ScriptGui([13]))
    np.testing.assert_array_equal(backend.saved[0].mask, coin_tile()[1])


def test_weak_label_save_sends_the_weak_label_alone():
    backend = MemoryBackend(state="weak")
    steps = [ord("3"), ord("s"), *drag_steps([(40, 40), (80, 40)]), ord("k")]
    outcome = run_editor(coin_state(), backend=backend, title="t", gui=ScriptGui(steps))
    (saved,) = backend.saved
    assert outcome.kind == "scribble" and saved.kind == "scribble" and outcome.state == "weak"
    expected = expected_stroke([(40, 40), (80, 40)])
    np.testing.assert_array_equal(saved.mask != 255, expected)
    assert (saved.mask[expected] == 3).all()


def test_weak_label_save_without_marks_saves_nothing():
    backend = MemoryBackend()
    session = EditorSession(coin_state(), backend=backend, title="t")
    session.on_key(ord("k"))
    assert backend.saved == [] and not session.done and "no weak label" in session.message


def test_escape_asks_and_n_keeps_y_discards():
    backend = MemoryBackend(draft=None)
    gui = ScriptGui([*drag_steps(DRAG), 27, ord("n"), 27, ord("y")])
    outcome = run_editor(coin_state(), backend=backend, title="t", gui=gui)
    assert outcome.reason == "discarded" and backend.saved == [] and backend.draft is None


def test_escape_without_changes_leaves_at_once():
    outcome = run_editor(coin_state(), backend=MemoryBackend(), title="t", gui=ScriptGui([27]))
    assert outcome.reason == "left" and outcome.state is None


def test_conflict_shows_both_keeps_a_draft_and_never_overwrites():
    image, proposal = coin_tile()
    theirs = np.zeros_like(proposal)
    backend = MemoryBackend(conflict=theirs)
    state = coin_state()
    gui = ScriptGui([ord("2"), *drag_steps(DRAG), 13, 13, 27])
    outcome = run_editor(state, backend=backend, title="t", gui=gui)
    assert outcome.reason == "conflict" and outcome.draft_kept and outcome.state is None
    assert backend.saved == []
    expected = proposal.copy()
    expected[expected_stroke(DRAG)] = WEED
    np.testing.assert_array_equal(backend.draft.mask, expected)
    assert state.comparing
    np.testing.assert_array_equal(state.compare_mask, theirs)


def test_draft_is_offered_back_and_restored():
    image, proposal = coin_tile()
    mine = proposal.copy()
    mine[:5] = WEED
    backend = MemoryBackend(draft=Draft(mine, np.full_like(mine, 255), actions=4, seconds=9.0))
    outcome = run_editor(coin_state(), backend=backend, title="t",
                         gui=ScriptGui([ord("y"), 13]))
    np.testing.assert_array_equal(backend.saved[0].mask, mine)
    assert outcome.actions == 5  # the draft's 4 plus restoring it
    assert outcome.seconds >= 9.0
    assert backend.draft is None  # a save drops the draft


def test_declined_draft_is_dropped():
    image, proposal = coin_tile()
    backend = MemoryBackend(draft=Draft(proposal, np.full_like(proposal, 255)))
    run_editor(coin_state(), backend=backend, title="t", gui=ScriptGui([ord("n"), 27]))
    assert backend.draft is None


def test_a_draft_of_another_size_is_left_alone():
    other = np.zeros((8, 8), np.uint8)
    backend = MemoryBackend(draft=Draft(other, np.full_like(other, 255)))
    session = EditorSession(coin_state(), backend=backend, title="t")
    session.start()
    assert session.question is None and "another size" in session.message
    assert backend.draft is not None


def test_autosave_writes_a_draft_after_changes_only():
    now = [0.0]
    backend = MemoryBackend()
    state = coin_state()
    session = EditorSession(state, backend=backend, title="t", autosave_seconds=5.0,
                            clock=lambda: now[0])
    session.start()
    now[0] = 6.0
    session.tick()
    assert backend.drafts_written == 0  # nothing changed yet
    state.paint([(10, 10), (10, 20)])
    now[0] = 8.0
    session.tick()
    assert backend.drafts_written == 0  # not yet time
    now[0] = 12.0
    session.tick()
    assert backend.drafts_written == 1
    np.testing.assert_array_equal(backend.draft.mask, state.mask)
    now[0] = 20.0
    session.tick()
    assert backend.drafts_written == 1  # no change since the last draft
    state.undo()
    now[0] = 30.0
    session.tick()
    assert backend.draft is None  # back to the proposal: the stale draft goes


def test_the_hold_is_renewed_while_the_editor_is_open():
    now = [0.0]
    backend = MemoryBackend()
    session = EditorSession(coin_state(), backend=backend, title="t", autosave_seconds=5.0,
                            heartbeat_seconds=60.0, clock=lambda: now[0])
    session.start()
    for t, expected in ((59.0, 0), (60.0, 1), (90.0, 1), (120.0, 2), (300.0, 3)):
        now[0] = t
        session.tick()  # no edits at all: an idle editor keeps its hold too
        assert backend.heartbeats == expected, t
    backend.heartbeat = lambda: False  # the hold lapsed (or was released) meanwhile
    now[0] = 400.0
    session.tick()
    assert "your hold on this tile lapsed" in session.message
    with pytest.raises(ValueError, match="heartbeat_seconds: expected a positive number"):
        EditorSession(coin_state(), backend=MemoryBackend(), title="t", heartbeat_seconds=0)


def test_autosave_seconds_must_be_positive():
    with pytest.raises(ValueError, match="autosave_seconds: expected a positive number"):
        EditorSession(coin_state(), backend=MemoryBackend(), title="t", autosave_seconds=0)


def test_exception_in_the_loop_writes_a_draft_first():
    backend = MemoryBackend()

    def boom():
        raise RuntimeError("simulated crash")

    gui = ScriptGui([ord("2"), *drag_steps(DRAG), boom])
    with pytest.raises(RuntimeError, match="simulated crash"):
        run_editor(coin_state(), backend=backend, title="t", gui=gui)
    assert backend.draft is not None and gui.closed_called
    assert (backend.draft.mask != coin_tile()[1]).any()


def test_window_closed_from_its_frame_keeps_a_draft():
    backend = MemoryBackend()
    steps = drag_steps(DRAG)
    gui = ScriptGui([*steps, -1, -1], close_after=len(steps) + 1)
    outcome = run_editor(coin_state(), backend=backend, title="t", gui=gui)
    assert outcome.reason == "closed" and outcome.draft_kept and backend.draft is not None


def test_schema_must_match_state():
    other = ClassSchema([LabelClass(0, "soil", None), LabelClass(1, "vine", "#0072B2")])
    with pytest.raises(ValueError, match="schema: expected the state's schema"):
        run_editor(coin_state(), backend=MemoryBackend(), schema=other, gui=ScriptGui([]))


def test_wheel_zooms_and_right_drag_pans():
    state = coin_state()
    session = EditorSession(state, backend=MemoryBackend(), title="t")
    z0 = state.transform.zoom
    session.on_mouse(cv2.EVENT_MOUSEWHEEL, 256, 256, 120 << 16)  # wheel up, as Qt reports it
    session.raise_pending()
    assert state.transform.zoom == pytest.approx(z0 * 1.25)
    session.on_mouse(cv2.EVENT_MOUSEWHEEL, 256, 256, -(120 << 16) + 2)  # wheel down
    assert state.transform.zoom == pytest.approx(z0)
    session.on_mouse(cv2.EVENT_MOUSEWHEEL, 256, 256, 120 << 16)
    before = state.transform
    session.on_mouse(cv2.EVENT_RBUTTONDOWN, 100, 100, 0)
    session.on_mouse(cv2.EVENT_MOUSEMOVE, 140, 120, 0)
    session.on_mouse(cv2.EVENT_RBUTTONUP, 140, 120, 0)
    after = state.transform
    assert after.origin_col == pytest.approx(before.origin_col - 40 / before.zoom)
    assert after.origin_row == pytest.approx(before.origin_row - 20 / before.zoom)
    assert state.actions == 0  # view changes are not edit actions


def test_an_error_in_the_mouse_callback_is_raised_in_the_loop():
    session = EditorSession(coin_state(), backend=MemoryBackend(), title="t")
    session.state.press = None  # a broken state: calling it fails inside the callback
    session.on_mouse(cv2.EVENT_LBUTTONDOWN, 10, 10, 0)  # the callback itself never raises
    with pytest.raises(TypeError, match="not callable"):
        session.raise_pending()


def test_help_overlay_toggles_on_question_mark():
    session = EditorSession(coin_state(), backend=MemoryBackend(), title="t")
    plain = session.frame()
    session.on_key(ord("?"))
    shown = session.frame()
    assert session.show_help and (plain != shown).any()
    session.on_key(ord("?"))
    np.testing.assert_array_equal(session.frame(), plain)


def test_quick_second_click_arrives_as_double_click_and_still_counts():
    state = coin_state()
    session = EditorSession(state, backend=MemoryBackend(), title="t")
    session.on_key(ord("v"))  # polygon
    t = state.transform
    clicks = [(2, 2), (2, 40), (40, 40), (40, 2)]
    events = [cv2.EVENT_LBUTTONDOWN, cv2.EVENT_LBUTTONDBLCLK] * 2
    for (r, c), ev in zip(clicks, events, strict=True):
        vr, vc = t.tile_to_view(r, c)
        session.on_mouse(ev, int(round(vc)), int(round(vr)), 0)
        session.on_mouse(cv2.EVENT_LBUTTONUP, int(round(vc)), int(round(vr)), 0)
    session.raise_pending()
    assert len(state.polygon_vertices) == 4
    session.on_key(ord(" "))
    assert state.changed and state.actions == 5


def test_keys_of_the_queue_and_digits_without_a_class_say_why_nothing_happened():
    session = EditorSession(coin_state(), backend=MemoryBackend(), title="t")
    session.on_key(ord("a"))  # accept is a queue key: the editor saves with Enter
    assert session.message.startswith("a is a key of the queue (accept") and not session.done
    session.on_key(ord("7"))
    assert session.message.startswith("no class 7 in this project")
    assert "2 weed" in session.message
    session.on_key(ord("b"))
    assert not session.state.show_overlay and session.message.startswith("bare tile")
    session.on_key(ord("b"))
    assert session.state.show_overlay and session.message == "mask overlay on"
    session.on_key(ord("l"))
    assert session.message == "region outlines off"


def test_settling_session_asks_and_only_y_saves():
    backend = MemoryBackend(state="settled")
    session = EditorSession(coin_state(), backend=backend, title="t", settling=True)
    session.on_key(13)
    assert session.question == "settle" and backend.saved == []
    session.on_key(13)  # a second Enter is no answer: still asking, nothing saved
    assert session.question == "settle" and backend.saved == []
    session.on_key(ord("n"))
    assert session.question is None and backend.saved == [] and not session.done
    session.on_key(13)
    session.on_key(ord("y"))
    assert session.done and session.outcome.state == "settled" and len(backend.saved) == 1


def test_status_strip_shows_the_class_colours_and_the_heat_scale():
    from labeler.classes import hex_to_rgb
    from labeler.editor.panels import LEGEND_SWATCH, legend_line, status_strip

    session = EditorSession(coin_state(), backend=MemoryBackend(), title="t")
    legend = session.legend()
    # the Okabe & Ito (2008) palette of the label schema: crop #0072B2, weed #E69F00,
    # symptom #CC79A7 (BGR here); soil has no overlay colour
    assert legend == [("0 soil", None), ("1 crop", hex_to_rgb("#0072B2")[::-1]),
                      ("2 weed", hex_to_rgb("#E69F00")[::-1]),
                      ("3 symptom", hex_to_rgb("#CC79A7")[::-1])]
    strip = np.full((STATUS_ROWS, 500, 3), 24, np.uint8)
    corners = legend_line(strip, legend, baseline=70, heat=False)
    for (top, left), (_label, colour) in zip(corners[1:], legend[1:], strict=True):
        swatch = strip[top : top + LEGEND_SWATCH, left : left + LEGEND_SWATCH]
        assert (swatch == colour).all()
    assert (strip[corners[0][0] + 2, corners[0][1] + 2] == 24).all()  # hollow: soil
    plain = status_strip(["a", "b", "c"], cols=500, legend=legend)
    with_heat = status_strip(["a", "b", "c"], cols=500, legend=legend, heat=True)
    assert plain.shape == (STATUS_ROWS, 500, 3)
    assert (plain[:58] == with_heat[:58]).all() and (plain != with_heat).any()
    frame = session.frame()
    assert (frame[-STATUS_ROWS:] != 24).any()
