"""The real HighGUI window, driven under Xvfb with xdotool: real X events, screenshots in
test-artefacts/editor/. Each step waits for the editor to report the event handled
(tests.editor.xdrive), never for a fixed time."""

from __future__ import annotations

import numpy as np
import pytest

from labeler.editor.backend import MemoryBackend
from labeler.editor.panels import STATUS_ROWS
from labeler.editor.view import ViewTransform
from labeler.editor.window import require_display, run_editor
from labeler.errors import LabelerError
from tests.editor import xdrive
from tests.editor.script import (
    DRAG,
    RADIUS,
    VIEW,
    WEED,
    coin_state,
    coin_tile,
    expected_stroke,
)

FRAME_SIZE = (VIEW[1], VIEW[0] + STATUS_ROWS)  # (width, height) of the window


def test_no_display_raises_labeler_error(monkeypatch):
    monkeypatch.delenv("DISPLAY", raising=False)
    monkeypatch.setattr("sys.platform", "linux")
    with pytest.raises(LabelerError, match="no display.*terminal queue's preview"):
        require_display()
    with pytest.raises(LabelerError, match="DISPLAY"):
        run_editor(coin_state(), backend=MemoryBackend(), title="t")


def _launch(server, folder, title, **spec):
    image, proposal = coin_tile()
    spec_path = xdrive.write_tile(folder, image, proposal, title=title, view_shape=VIEW,
                                  radius=RADIUS, **spec)
    child = xdrive.launch_child(server, spec_path)
    win = xdrive.wait_window(child, title, size=FRAME_SIZE)
    return child, win


@pytest.mark.display
def test_xvfb_stroke_and_enter_saves_and_reports_the_backends_state(display, tmp_path):
    folder = tmp_path / "stroke"
    child, win = _launch(display, folder, "labeler-test-stroke", reply_state="amended")
    xdrive.press_keys(child, "2", "d")
    xdrive.drag(child, win, DRAG)
    # the screenshot shows what the state renders for that edit (the window sits at the
    # screen's origin); only the brush cursor round the last point is left out
    ref = coin_state()
    ref.active_class = WEED
    t = ref.transform
    ref.paint([tuple(float(v) for v in t.view_to_tile(y, x)) for x, y in DRAG])
    expected_rgb = ref.render()[:, :, ::-1]
    x1, y1 = DRAG[-1]
    near_cursor = (slice(y1 - 20, y1 + 21), slice(x1 - 20, x1 + 21))

    def shown_view():
        path, screen = xdrive.screenshot(display, "stroke")
        shown = screen[: VIEW[0], : VIEW[1]].copy()
        shown[near_cursor] = expected_rgb[near_cursor]
        return path, shown

    # the frame after the release is painted a moment after the editor handled it
    xdrive.wait_for(lambda: np.array_equal(shown_view()[1], expected_rgb), timeout=10,
                    what="the stroke on screen", interval=0.1)
    path, shown = shown_view()
    assert path.exists()
    np.testing.assert_array_equal(shown, expected_rgb)
    xdrive.press_keys(child, "Return")
    assert xdrive.stop_child(child) == 0
    outcome = xdrive.read_outcome(folder)
    assert outcome["reason"] == "saved" and outcome["kind"] == "full"
    assert outcome["state"] == "amended"  # the backend's answer, reported as is
    (saved,) = xdrive.read_saves(folder)
    assert saved["kind"] == "full" and saved["actions"] == 1
    proposal = coin_tile()[1]
    np.testing.assert_array_equal(saved["mask"] != proposal, expected_stroke(DRAG))
    assert (saved["mask"][expected_stroke(DRAG)] == WEED).all()


@pytest.mark.display
def test_xvfb_escape_asks_before_discarding(display, tmp_path):
    folder = tmp_path / "escape"
    child, win = _launch(display, folder, "labeler-test-escape")
    xdrive.press_keys(child, "2")
    xdrive.drag(child, win, DRAG)
    xdrive.press_keys(child, "Escape")
    xdrive.screenshot(display, "escape-question")
    xdrive.xdo(display, "key", "n")
    # "key" (not "closed"): the editor handled n and showed the next frame, still open
    xdrive.expect_key_handled(child, "n")
    assert child.process.poll() is None, "the editor closed although the user answered n"
    xdrive.press_keys(child, "Escape", "y")
    assert xdrive.stop_child(child) == 0
    assert xdrive.read_outcome(folder)["reason"] == "discarded"
    assert xdrive.read_saves(folder) == [] and xdrive.read_draft(folder) is None


@pytest.mark.display
def test_xvfb_conflict_keeps_draft_then_a_crash_loses_nothing(display, tmp_path):
    folder = tmp_path / "conflict"
    folder.mkdir()
    np.save(folder / "conflict.npy", np.zeros((64, 64), np.uint8))
    child, win = _launch(display, folder, "labeler-test-conflict", autosave_seconds=0.3)
    xdrive.press_keys(child, "2")
    xdrive.drag(child, win, DRAG)
    xdrive.press_keys(child, "Return")
    xdrive.wait_for(lambda: xdrive.read_draft(folder), timeout=10, what="the draft after a "
                    "refused save")
    xdrive.screenshot(display, "conflict-side-by-side")
    xdrive.press_keys(child, "Escape")
    assert xdrive.stop_child(child) == 0
    outcome = xdrive.read_outcome(folder)
    assert outcome["reason"] == "conflict" and outcome["draft_kept"]
    assert outcome["state"] is None
    assert xdrive.read_saves(folder) == []
    expected = coin_tile()[1].copy()
    expected[expected_stroke(DRAG)] = WEED
    np.testing.assert_array_equal(xdrive.read_draft(folder)["mask"], expected)

    # the other save goes away; draw more, let autosave run, then kill the editor hard
    (folder / "conflict.npy").unlink()
    (folder / "outcome.json").unlink()
    child, win = _launch(display, folder, "labeler-test-conflict-2", autosave_seconds=0.3)
    xdrive.press_keys(child, "y")  # restore the draft
    xdrive.press_keys(child, "3")
    # one wheel notch up (X button 4) at window point (x 300, y 120) zooms 1.25x about it;
    # the Qt build reopens its window after a wheel event (HighGuiWindow.after_wheel)
    xdrive.wheel(child, win, 300, 120)
    win = xdrive.wait_window(child, "labeler-test-conflict-2", size=FRAME_SIZE)
    zoomed = ViewTransform.fit((64, 64), VIEW).zoomed(1.25, at=(120.0, 300.0))
    second = [(300, 100), (450, 100)]
    xdrive.drag(child, win, second)
    expected[expected_stroke(second, transform=zoomed)] = 3

    def draft_has_second_stroke():
        d = xdrive.read_draft(folder)
        return d is not None and np.array_equal(d["mask"], expected)

    xdrive.wait_for(draft_has_second_stroke, timeout=10, what="the autosaved draft")
    xdrive.stop_child(child, kill=True)
    child, win = _launch(display, folder, "labeler-test-conflict-3")
    xdrive.press_keys(child, "y", "Return")
    assert xdrive.stop_child(child) == 0
    (saved,) = xdrive.read_saves(folder)
    np.testing.assert_array_equal(saved["mask"], expected)
    assert xdrive.read_outcome(folder)["state"] == "amended"
