"""Small tiles and a fake clock shared by the editor's state tests."""

from __future__ import annotations

import numpy as np

from labeler.editor.state import EditorState

__all__ = ["image_of", "make_state", "FakeClock"]


def image_of(shape=(8, 8), seed=0) -> np.ndarray:
    """A seeded random RGB tile, (H, W, 3) uint8."""
    rng = np.random.default_rng(seed)
    return rng.integers(0, 256, size=(*shape, 3), dtype=np.uint8)


def make_state(proposal=None, shape=(8, 8), **kw) -> EditorState:
    """An EditorState on a random tile; the proposal defaults to all soil, the view to
    64 x 64."""
    proposal = np.zeros(shape, np.uint8) if proposal is None else proposal
    kw.setdefault("view_shape", (64, 64))
    return EditorState(image_of(proposal.shape), proposal, **kw)


class FakeClock:
    """A clock that says what the test sets in ``t``."""

    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t
