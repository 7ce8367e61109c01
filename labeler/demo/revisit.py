"""A demo plot seen again on a later date: the same ground, plants grown, other light.

Revisits of the same ground are free positive pairs for ``labeler adapt``
(:mod:`labeler.workflow.adapting`); this gives the invented Brackenlow Farm scenario
(:mod:`labeler.demo.fields`) a second visit of some plots so that they can be tested
and measured. Nothing here depicts a real field.
"""

from __future__ import annotations

import numpy as np
from affine import Affine

from labeler.demo.fields import DEFAULT_SIZE, Plot, make_plot

__all__ = ["make_revisit"]


def make_revisit(
    name: str,
    *,
    seed: int,
    height: int = DEFAULT_SIZE[0],
    width: int = DEFAULT_SIZE[1],
    growth: float = 1.15,
    light_seed: int = 1,
    shift: tuple[int, int] = (6, 9),
) -> Plot:
    """The same plot seen again on a later date: plants grown, other light, frame moved.

    The agronomist comes back to the same sample frame two weeks later: the beet has
    grown (``growth``), the sky is another (``light_seed``), and the frame is set down a
    little off (``shift``: the new frame's top-left lies ``shift`` pixels down and right
    of the first one's, so it is ``shift`` pixels smaller and its transform says where
    it lies). Soil, stones, plant positions and weeds are those of
    :func:`make_plot` with the same ``name`` and ``seed``.

    Parameters
    ----------
    name, seed, height, width
        As given to :func:`make_plot` for the first visit.
    growth : float
        Size factor of the beet plants.
    light_seed : int
        Seeds the other light.
    shift : (int, int)
        Rows and columns (0 or more, less than the frame) the frame moved by.

    Returns
    -------
    Plot
        ``(height - shift[0], width - shift[1])`` pixels; metadata records the shift.
    """
    dr, dc = (int(v) for v in shift)
    if not (0 <= dr < height and 0 <= dc < width):
        raise ValueError(
            f"shift: expected 0 <= rows < {height} and 0 <= columns < {width}, got {shift}"
        )
    full = make_plot(
        name, seed=seed, height=height, width=width, growth=growth, light_seed=light_seed
    )
    t = full.transform
    moved = Affine(t.a, t.b, t.c + dc * t.a + dr * t.b, t.d, t.e, t.f + dc * t.d + dr * t.e)
    metadata = {**full.metadata, "frame_shift_px": [dr, dc]}
    return Plot(
        name,
        np.ascontiguousarray(full.image[dr:, dc:]),
        np.ascontiguousarray(full.truth[dr:, dc:]),
        moved,
        full.crs,
        metadata,
    )
