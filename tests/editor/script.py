"""A scripted stand-in for the editor window, and the coin tile the window tests edit."""

from __future__ import annotations

import cv2
import numpy as np
from skimage import data, filters

from labeler.editor.state import EditorState
from labeler.editor.view import ViewTransform
from labeler.masks.edits import stroke_mask

__all__ = ["VIEW", "RADIUS", "WEED", "DRAG", "ScriptGui", "coin_tile", "drag_steps",
           "expected_stroke", "coin_state"]

VIEW = (512, 512)
RADIUS = 1.5
WEED = 2
DRAG = [(100, 200), (250, 200), (250, 400)]  # the first leg jumps 150 view px in one event


def coin_tile() -> tuple[np.ndarray, np.ndarray]:
    """64 x 64 crop of scikit-image's `coins` (one whole coin) and its Otsu mask as class 1."""
    grey = data.coins()[20:84, 125:189]  # scikit-image sample data
    image = np.ascontiguousarray(np.dstack([grey] * 3))
    proposal = (grey > filters.threshold_otsu(grey)).astype(np.uint8)  # Otsu (1979)
    return image, proposal


def coin_state() -> EditorState:
    """The coin tile in a 512 x 512 view with a 1.5 px brush."""
    image, proposal = coin_tile()
    return EditorState(image, proposal, radius=RADIUS, view_shape=VIEW)


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


def drag_steps(points):
    """Script steps of a left-button drag through window points (x, y)."""
    x0, y0 = points[0]
    steps = [(cv2.EVENT_LBUTTONDOWN, x0, y0)]
    steps += [(cv2.EVENT_MOUSEMOVE, x, y) for x, y in points[1:]]
    x1, y1 = points[-1]
    steps.append((cv2.EVENT_LBUTTONUP, x1, y1))
    return steps


def expected_stroke(points_xy, shape=(64, 64), transform=None, *, view=VIEW, radius=RADIUS):
    """Tile pixels a drag through window points (x, y) must paint, by the view transform."""
    t = ViewTransform.fit(shape, view) if transform is None else transform
    pts = [tuple(float(v) for v in t.view_to_tile(y, x)) for x, y in points_xy]
    return stroke_mask(pts, radius=radius, shape=shape)
