"""Undo history of the editor: unlimited, stored as compact per-edit diffs.

The editor edits its layers (the mask and the weak label, each an (H, W) uint8 array) in
place; :meth:`EditHistory.record` then compares the edited region with the last recorded
copy and keeps only the bounding box of the pixels that changed, with their values before
and after. Undo and redo copy those boxes back, so they cost time and memory in proportion
to the edit, not the tile.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["Box", "Change", "EditHistory"]

#: A half-open pixel box ``(row0, row1, col0, col1)``.
Box = tuple[int, int, int, int]


@dataclass(frozen=True)
class Change:
    """The changed box of one layer in one edit.

    Parameters
    ----------
    layer : str
        Name of the layer (``"mask"`` or ``"weak_label"`` in the editor).
    row, col : int
        Top-left pixel of the box.
    before, after : ndarray, shape (h, w), uint8
        The box's values before and after the edit.
    """

    layer: str
    row: int
    col: int
    before: np.ndarray
    after: np.ndarray

    @property
    def slices(self) -> tuple[slice, slice]:
        """Row and column slices of the box in the layer."""
        h, w = self.before.shape
        return slice(self.row, self.row + h), slice(self.col, self.col + w)

    @property
    def box(self) -> Box:
        """The box as ``(row0, row1, col0, col1)``."""
        h, w = self.before.shape
        return self.row, self.row + h, self.col, self.col + w

    @property
    def nbytes(self) -> int:
        """Bytes held by ``before`` and ``after``."""
        return self.before.nbytes + self.after.nbytes


class EditHistory:
    """Undo and redo over named layers that the caller edits in place.

    Parameters
    ----------
    layers : mapping of str to ndarray, each shape (H, W), uint8
        The live layers. They are kept by reference: the caller edits them, then calls
        :meth:`record`; undo and redo write into them.

    Notes
    -----
    Each entry of the history is one edit: a tuple of :class:`Change`, at most one per
    layer. A new edit clears the redo list.
    """

    def __init__(self, layers: Mapping[str, np.ndarray]) -> None:
        self._live = dict(layers)
        self._committed = {name: arr.copy() for name, arr in self._live.items()}
        self._undo: list[tuple[Change, ...]] = []
        self._redo: list[tuple[Change, ...]] = []

    @property
    def can_undo(self) -> bool:
        """True when there is an edit to take back."""
        return bool(self._undo)

    @property
    def can_redo(self) -> bool:
        """True when there is an undone edit to apply again."""
        return bool(self._redo)

    @property
    def nbytes(self) -> int:
        """Bytes held by the undo and redo lists."""
        return sum(c.nbytes for entry in (*self._undo, *self._redo) for c in entry)

    def record(self, boxes: Sequence[tuple[str, Box | None]]) -> list[Box]:
        """Turn the live changes inside ``boxes`` into one history entry.

        Parameters
        ----------
        boxes : sequence of (layer, box or None)
            Where each layer may have changed since the last record; ``None`` means the
            whole layer.

        Returns
        -------
        changed : list of Box
            The tight box of changed pixels per changed layer, in the order given; empty
            when nothing changed (then no entry is added and the redo list is kept).
        """
        changes = []
        for layer, box in boxes:
            live, base = self._live[layer], self._committed[layer]
            r0, r1, c0, c1 = box if box is not None else (0, live.shape[0], 0, live.shape[1])
            diff = live[r0:r1, c0:c1] != base[r0:r1, c0:c1]
            if not diff.any():
                continue
            rows = np.flatnonzero(diff.any(axis=1))
            cols = np.flatnonzero(diff.any(axis=0))
            a0, a1 = r0 + int(rows[0]), r0 + int(rows[-1]) + 1
            b0, b1 = c0 + int(cols[0]), c0 + int(cols[-1]) + 1
            before = base[a0:a1, b0:b1].copy()
            after = live[a0:a1, b0:b1].copy()
            base[a0:a1, b0:b1] = after
            changes.append(Change(layer, a0, b0, before, after))
        if changes:
            self._undo.append(tuple(changes))
            self._redo.clear()
        return [c.box for c in changes]

    def _apply(self, entry: tuple[Change, ...], *, forward: bool) -> list[Box]:
        for ch in entry:
            values = ch.after if forward else ch.before
            self._live[ch.layer][ch.slices] = values
            self._committed[ch.layer][ch.slices] = values
        return [c.box for c in entry]

    def undo(self) -> list[Box] | None:
        """Take back the newest edit.

        Returns
        -------
        changed : list of Box or None
            The boxes written, or None when there was nothing to undo.
        """
        if not self._undo:
            return None
        entry = self._undo.pop()
        self._redo.append(entry)
        return self._apply(entry, forward=False)

    def redo(self) -> list[Box] | None:
        """Apply again the newest undone edit; the boxes written, or None."""
        if not self._redo:
            return None
        entry = self._redo.pop()
        self._undo.append(entry)
        return self._apply(entry, forward=True)
