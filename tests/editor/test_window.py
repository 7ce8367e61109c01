"""The editor window: the loop logic with a scripted window, and the real HighGUI window
driven under Xvfb with xdotool (real X events, screenshots in test-artefacts/editor/)."""

from __future__ import annotations

import time

import cv2
import numpy as np
import pytest
from skimage import data, filters

from labeler.classes import DEFAULT_SCHEMA, ClassSchema, LabelClass
from labeler.editor.backend import Draft, EditorBackend, MemoryBackend
from labeler.editor.keys import BINDINGS, TOOLS, class_for, command_for, keys_markdown
from labeler.editor.state import EditorState, ViewTransform, fit_view_shape
from labeler.editor.window import STATUS_ROWS, EditorSession, require_display, run_editor
from labeler.errors import LabelerError
from labeler.masks.edits import stroke_mask
from tests.editor import xdrive

VIEW = (512, 512)
RADIUS = 1.5
WEED = 2


def _tile() -> tuple[np.ndarray, np.ndarray]:
    """64 x 64 crop of scikit-image's `coins` (one whole coin) and its Otsu mask as class 1."""
    grey = data.coins()[20:84, 125:189]  # scikit-image sample data
    image = np.ascontiguousarray(np.dstack([grey] * 3))
    proposal = (grey > filters.threshold_otsu(grey)).astype(np.uint8)  # Otsu (1979)
    return image, proposal


# ------------------------------------------------------------------ a scripted window
class ScriptGui:
    """Stands in for HighGUI: plays mouse events and key codes, one step per frame."""

    def __init__(self, steps, *, close_after: int | None = None):
        self.steps = list(steps)
        self.frames: list[np.ndarray] = []
        self.on_mouse = None
        self.opened = self.closed_called = False
        self._close_after = close_after

    def open(self, frame_shape, on_mouse):
        self.opened = True
        self.shape = frame_shape
        self.on_mouse = on_mouse

    def show(self, frame):
        self.frames.append(frame)

    def wait(self, ms):
        if not self.steps:
            raise AssertionError("script ran out of steps while the editor was still open")
        step = self.steps.pop(0)
        if callable(step):
            step()
            return -1
        if isinstance(step, tuple):
            event, x, y = step
            self.on_mouse(event, x, y, 0)
            return -1
        return step

    def closed(self):
        return self._close_after is not None and len(self.frames) >= self._close_after

    def close(self):
        self.closed_called = True


def _drag(points):
    x0, y0 = points[0]
    steps = [(cv2.EVENT_LBUTTONDOWN, x0, y0)]
    steps += [(cv2.EVENT_MOUSEMOVE, x, y) for x, y in points[1:]]
    x1, y1 = points[-1]
    steps.append((cv2.EVENT_LBUTTONUP, x1, y1))
    return steps


def _expected_stroke(points_xy, shape=(64, 64), transform=None):
    """Tile pixels a drag through window points (x, y) must paint, by the view transform."""
    t = ViewTransform.fit(shape, VIEW) if transform is None else transform
    pts = [tuple(float(v) for v in t.view_to_tile(y, x)) for x, y in points_xy]
    return stroke_mask(pts, radius=RADIUS, shape=shape)


DRAG = [(100, 200), (250, 200), (250, 400)]  # the first leg jumps 150 view px in one event


def _state():
    image, proposal = _tile()
    return EditorState(image, proposal, radius=RADIUS, view_shape=VIEW)


def test_memory_backend_meets_protocol():
    assert isinstance(MemoryBackend(), EditorBackend)
    assert isinstance(xdrive.FolderBackend.__new__(xdrive.FolderBackend), EditorBackend)


def test_no_display_raises_labeler_error(monkeypatch):
    monkeypatch.delenv("DISPLAY", raising=False)
    monkeypatch.setattr("sys.platform", "linux")
    with pytest.raises(LabelerError, match="no display.*terminal queue's preview"):
        require_display()
    with pytest.raises(LabelerError, match="DISPLAY"):
        run_editor(_state(), backend=MemoryBackend(), title="t")


def test_schema_must_match_state():
    other = ClassSchema([LabelClass(0, "soil", None), LabelClass(1, "vine", "#0072B2")])
    with pytest.raises(ValueError, match="schema: expected the state's schema"):
        run_editor(_state(), backend=MemoryBackend(), schema=other, gui=ScriptGui([]))


def test_stroke_then_enter_saves_amended_exactly_where_the_stroke_went():
    state = _state()
    backend = MemoryBackend()
    gui = ScriptGui([ord("2"), ord("d"), *_drag(DRAG), 13])
    outcome = run_editor(state, backend=backend, title="scripted", gui=gui)
    assert outcome.reason == "saved" and outcome.state == "amended" and outcome.kind == "full"
    assert outcome.actions == 1
    (saved,) = backend.saved
    expected = _expected_stroke(DRAG)
    np.testing.assert_array_equal(saved.mask != state.proposal, expected)
    assert (saved.mask[expected] == WEED).all()
    assert gui.shape == (VIEW[0] + STATUS_ROWS, VIEW[1]) and gui.closed_called
    assert gui.frames[-1].shape == (VIEW[0] + STATUS_ROWS, VIEW[1], 3)


def test_enter_without_edits_saves_accepted():
    backend = MemoryBackend()
    outcome = run_editor(_state(), backend=backend, title="t", gui=ScriptGui([13]))
    assert outcome.state == "accepted" and backend.saved[0].state == "accepted"


def test_scribble_save_is_a_weak_label():
    backend = MemoryBackend()
    steps = [ord("3"), ord("s"), *_drag([(40, 40), (80, 40)]), ord("p")]
    outcome = run_editor(_state(), backend=backend, title="t", gui=ScriptGui(steps))
    (saved,) = backend.saved
    assert outcome.kind == "scribble" and saved.kind == "scribble"
    expected = _expected_stroke([(40, 40), (80, 40)])
    np.testing.assert_array_equal(saved.mask != 255, expected)
    assert (saved.mask[expected] == 3).all()


def test_escape_asks_and_n_keeps_y_discards():
    backend = MemoryBackend(draft=None)
    gui = ScriptGui([*_drag(DRAG), 27, ord("n"), 27, ord("y")])
    outcome = run_editor(_state(), backend=backend, title="t", gui=gui)
    assert outcome.reason == "discarded" and backend.saved == [] and backend.draft is None


def test_escape_without_changes_leaves_at_once():
    outcome = run_editor(_state(), backend=MemoryBackend(), title="t", gui=ScriptGui([27]))
    assert outcome.reason == "left"


def test_conflict_shows_both_keeps_a_draft_and_never_overwrites():
    image, proposal = _tile()
    theirs = np.zeros_like(proposal)
    backend = MemoryBackend(conflict=theirs)
    state = _state()
    gui = ScriptGui([ord("2"), *_drag(DRAG), 13, 13, 27])
    outcome = run_editor(state, backend=backend, title="t", gui=gui)
    assert outcome.reason == "conflict" and outcome.draft_kept
    assert backend.saved == []
    expected = proposal.copy()
    expected[_expected_stroke(DRAG)] = WEED
    np.testing.assert_array_equal(backend.draft.mask, expected)
    assert state.comparing
    np.testing.assert_array_equal(state.compare_mask, theirs)


def test_draft_is_offered_back_and_restored():
    image, proposal = _tile()
    mine = proposal.copy()
    mine[:5] = WEED
    backend = MemoryBackend(draft=Draft(mine, np.full_like(mine, 255), actions=4, seconds=9.0))
    outcome = run_editor(_state(), backend=backend, title="t", gui=ScriptGui([ord("y"), 13]))
    np.testing.assert_array_equal(backend.saved[0].mask, mine)
    assert outcome.actions == 5  # the draft's 4 plus restoring it
    assert outcome.seconds >= 9.0
    assert backend.draft is None  # a save drops the draft


def test_declined_draft_is_dropped():
    image, proposal = _tile()
    backend = MemoryBackend(draft=Draft(proposal, np.full_like(proposal, 255)))
    run_editor(_state(), backend=backend, title="t", gui=ScriptGui([ord("n"), 27]))
    assert backend.draft is None


def test_autosave_writes_a_draft_after_changes_only():
    now = [0.0]
    backend = MemoryBackend()
    state = _state()
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


def test_exception_in_the_loop_writes_a_draft_first():
    backend = MemoryBackend()

    def boom():
        raise RuntimeError("simulated crash")

    gui = ScriptGui([ord("2"), *_drag(DRAG), boom])
    with pytest.raises(RuntimeError, match="simulated crash"):
        run_editor(_state(), backend=backend, title="t", gui=gui)
    assert backend.draft is not None and gui.closed_called
    assert (backend.draft.mask != _tile()[1]).any()


def test_window_closed_from_its_frame_keeps_a_draft():
    backend = MemoryBackend()
    gui = ScriptGui([*_drag(DRAG), -1, -1], close_after=len(_drag(DRAG)) + 1)
    outcome = run_editor(_state(), backend=backend, title="t", gui=gui)
    assert outcome.reason == "closed" and outcome.draft_kept and backend.draft is not None


def test_wheel_zooms_and_right_drag_pans():
    state = _state()
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


def test_help_overlay_and_readme_table_come_from_the_key_table():
    session = EditorSession(_state(), backend=MemoryBackend(), title="t")
    plain = session.frame()
    session.on_key(ord("h"))
    shown = session.frame()
    assert (plain != shown).any()
    table = keys_markdown(DEFAULT_SCHEMA)
    for needle in ("`Enter`", "`Esc`", "right or middle drag", "2 weed"):
        assert needle in table


# ------------------------------------------------------------------ the real window, Xvfb
def _launch(server, folder, title, **spec):
    image, proposal = _tile()
    spec_path = xdrive.write_tile(folder, image, proposal, title=title, view_shape=VIEW,
                                  radius=RADIUS, **spec)
    child = xdrive.launch_child(server, spec_path)
    win = xdrive.wait_window(server, title, size=(VIEW[1], VIEW[0] + STATUS_ROWS), child=child)
    return child, win


@pytest.mark.display
def test_xvfb_stroke_and_enter_saves_amended(display, tmp_path):
    folder = tmp_path / "stroke"
    child, win = _launch(display, folder, "labeler-test-stroke")
    xdrive.press_keys(display, "2", "d")
    xdrive.drag(display, win, DRAG)
    path, screen = xdrive.screenshot(display, "stroke")
    xdrive.press_keys(display, "Return")
    assert xdrive.stop_child(child) == 0
    outcome = xdrive.read_outcome(folder)
    assert outcome["reason"] == "saved" and outcome["state"] == "amended"
    (saved,) = xdrive.read_saves(folder)
    assert saved["kind"] == "full" and saved["state"] == "amended" and saved["actions"] == 1
    proposal = _tile()[1]
    np.testing.assert_array_equal(saved["mask"] != proposal, _expected_stroke(DRAG))
    assert (saved["mask"][_expected_stroke(DRAG)] == WEED).all()
    # the screenshot shows what the state renders for that edit (the window sits at the
    # screen's origin); only the brush cursor round the last point is left out
    ref = _state()
    ref.active_class = WEED
    t = ref.transform
    ref.paint([tuple(float(v) for v in t.view_to_tile(y, x)) for x, y in DRAG])
    expected_rgb = ref.render()[:, :, ::-1]
    shown = screen[: VIEW[0], : VIEW[1]].copy()
    x1, y1 = DRAG[-1]
    shown[y1 - 20 : y1 + 21, x1 - 20 : x1 + 21] = expected_rgb[y1 - 20 : y1 + 21, x1 - 20 : x1 + 21]
    assert path.exists()
    np.testing.assert_array_equal(shown, expected_rgb)


@pytest.mark.display
def test_xvfb_escape_asks_before_discarding(display, tmp_path):
    folder = tmp_path / "escape"
    child, win = _launch(display, folder, "labeler-test-escape")
    xdrive.press_keys(display, "2")
    xdrive.drag(display, win, DRAG)
    xdrive.press_keys(display, "Escape")
    xdrive.screenshot(display, "escape-question")
    xdrive.press_keys(display, "n")
    time.sleep(0.3)
    assert child.poll() is None, "the editor closed although the user answered n"
    xdrive.press_keys(display, "Escape", "y")
    assert xdrive.stop_child(child) == 0
    assert xdrive.read_outcome(folder)["reason"] == "discarded"
    assert xdrive.read_saves(folder) == [] and xdrive.read_draft(folder) is None


@pytest.mark.display
def test_xvfb_conflict_keeps_draft_then_a_crash_loses_nothing(display, tmp_path):
    folder = tmp_path / "conflict"
    folder.mkdir()
    np.save(folder / "conflict.npy", np.zeros((64, 64), np.uint8))
    child, win = _launch(display, folder, "labeler-test-conflict", autosave_seconds=0.3)
    xdrive.press_keys(display, "2")
    xdrive.drag(display, win, DRAG)
    xdrive.press_keys(display, "Return")
    xdrive.wait_for(lambda: xdrive.read_draft(folder), timeout=10, what="the draft after a "
                    "refused save")
    xdrive.screenshot(display, "conflict-side-by-side")
    xdrive.press_keys(display, "Escape")
    assert xdrive.stop_child(child) == 0
    outcome = xdrive.read_outcome(folder)
    assert outcome["reason"] == "conflict" and outcome["draft_kept"]
    assert xdrive.read_saves(folder) == []
    expected = _tile()[1].copy()
    expected[_expected_stroke(DRAG)] = WEED
    np.testing.assert_array_equal(xdrive.read_draft(folder)["mask"], expected)

    # the other save goes away; draw more, let autosave run, then kill the editor hard
    (folder / "conflict.npy").unlink()
    (folder / "outcome.json").unlink()
    child, win = _launch(display, folder, "labeler-test-conflict-2", autosave_seconds=0.3)
    xdrive.press_keys(display, "y")  # restore the draft
    xdrive.press_keys(display, "3")
    # one wheel notch up (X button 4) at window point (x 300, y 120) zooms 1.25x about it
    xdrive.xdo(display, "mousemove", "--window", win, 300, 120)
    xdrive.xdo(display, "click", 4)
    time.sleep(0.3)
    # the Qt build reopens its window after a wheel event (HighGuiWindow.after_wheel)
    win = xdrive.wait_window(display, "labeler-test-conflict-2",
                             size=(VIEW[1], VIEW[0] + STATUS_ROWS), child=child)
    zoomed = ViewTransform.fit((64, 64), VIEW).zoomed(1.25, at=(120.0, 300.0))
    second = [(300, 100), (450, 100)]
    xdrive.drag(display, win, second)
    expected[_expected_stroke(second, transform=zoomed)] = 3

    def draft_has_second_stroke():
        d = xdrive.read_draft(folder)
        return d is not None and np.array_equal(d["mask"], expected)

    xdrive.wait_for(draft_has_second_stroke, timeout=10, what="the autosaved draft")
    xdrive.stop_child(child, kill=True)
    child, win = _launch(display, folder, "labeler-test-conflict-3")
    xdrive.press_keys(display, "y", "Return")
    assert xdrive.stop_child(child) == 0
    (saved,) = xdrive.read_saves(folder)
    np.testing.assert_array_equal(saved["mask"], expected)
    assert saved["state"] == "amended"


def test_key_table_binds_every_tool_and_digits_pick_classes():
    for tool in TOOLS:
        assert command_for(ord(tool.key)) == f"tool:{tool.name}"
    assert command_for(13) == "save" and command_for(27) == "leave" and command_for(65505) is None
    codes = [c for b in BINDINGS for c in b.codes]
    assert len(codes) == len(set(codes))  # no key does two things
    assert class_for(ord("2")) == 2 and class_for(ord("7")) is None and class_for(ord("x")) is None
    assert "licensed agronomic advice" in keys_markdown()


def test_fit_view_shape():
    assert fit_view_shape((256, 256)) == (768, 768)  # whole zoom 3 fits 900 x 1200
    assert fit_view_shape((64, 64)) == (512, 512)  # capped at zoom 8
    assert fit_view_shape((1024, 2048)) == (600, 1200)  # scaled down to fit
    with pytest.raises(ValueError, match="expected positive sizes"):
        fit_view_shape((0, 5))


def test_quick_second_click_arrives_as_double_click_and_still_counts():
    state = _state()
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
