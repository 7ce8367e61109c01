"""The picker's input: every tile of a project as one row of a :class:`CandidatePool`."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from labeler.picker._checks import (
    as_features,
    check_agreement_range,
    check_fractions,
    check_vector,
)
from labeler.picker.tile_scores import TileUncertainty

__all__ = ["CandidatePool"]


@dataclass(frozen=True, eq=False, kw_only=True)
class CandidatePool:
    """Everything the picker knows about the tiles of a project, one row per tile.

    Parameters
    ----------
    ids : sequence, shape (N,)
        Tile identifiers (any hashable: store keys, names); unique.
    embeddings : ndarray, shape (N, D)
        Pooled encoder embedding per tile; finite (stored as float32).
    entropy, margin, least_confidence : ndarray, shape (N,)
        Tile means of the per-pixel scores
        (:func:`~labeler.picker.tile_scores.tile_uncertainty`); finite.
    class_fractions : ndarray, shape (N, K)
        Predicted class fractions; for labelled tiles preferably those of the saved mask.
    bald : ndarray, shape (N,), optional
        Tile mean BALD; NaN where no dropout samples exist (default all NaN).
    annotators : ndarray, shape (N,), optional
        How many annotators have saved a mask for the tile (default 0 everywhere).
        0 = unlabelled (a candidate); 1 = labelled (never a candidate); 2 or more =
        overlapped (a candidate for review when its agreement is below the threshold).
    agreement : ndarray, shape (N,), optional
        Agreement between the annotators of an overlapped tile (kappa or IoU); NaN where not
        overlapped or not computed yet (default all NaN). Must be NaN for tiles with fewer
        than two annotators.

    Raises
    ------
    ValueError
        For mismatched lengths, duplicate ids, NaN embeddings or scores, or agreement on a
        tile with fewer than two annotators. The message names the field.
    """

    ids: np.ndarray
    embeddings: np.ndarray
    entropy: np.ndarray
    margin: np.ndarray
    least_confidence: np.ndarray
    class_fractions: np.ndarray
    bald: np.ndarray | None = None
    annotators: np.ndarray | None = None
    agreement: np.ndarray | None = None

    def __post_init__(self) -> None:
        if isinstance(self.ids, np.ndarray) and self.ids.ndim == 1:
            ids = self.ids
        else:  # keep the caller's objects as they are (no conversion of ints to text)
            items = list(self.ids)
            ids = np.empty(len(items), object)
            ids[:] = items
        n = ids.shape[0]
        if len(set(ids.tolist())) != n:
            values, counts = np.unique(ids.astype(str), return_counts=True)
            raise ValueError(
                f"pool.ids: expected unique tile ids, got duplicates {values[counts > 1][:5]}"
            )
        x = as_features(self.embeddings, "pool.embeddings")
        if x.shape[0] != n:
            raise ValueError(
                f"pool.embeddings: expected {n} rows like pool.ids, got {x.shape[0]}; "
                "pass one embedding per tile"
            )
        set_ = object.__setattr__
        set_(self, "ids", ids)
        set_(self, "embeddings", x)
        for name in ("entropy", "margin", "least_confidence"):
            set_(self, name, check_vector(getattr(self, name), f"pool.{name}", n))
        if (self.entropy < 0).any():
            raise ValueError("pool.entropy: expected values >= 0 (nats)")
        for name in ("margin", "least_confidence"):
            v = getattr(self, name)
            if ((v < 0) | (v > 1)).any():
                raise ValueError(f"pool.{name}: expected values in [0, 1]")
        bald = np.full(n, np.nan) if self.bald is None else self.bald
        bald = check_vector(bald, "pool.bald", n, allow_nan=True)
        if (bald < 0).any():
            raise ValueError("pool.bald: expected values >= 0 or NaN (no dropout samples)")
        set_(self, "bald", bald)
        f = check_fractions(self.class_fractions, "pool.class_fractions")
        if f.shape[0] != n:
            raise ValueError(
                f"pool.class_fractions: expected {n} rows like pool.ids, got {f.shape[0]}"
            )
        set_(self, "class_fractions", f)
        ann = np.zeros(n, np.int64) if self.annotators is None else np.asarray(self.annotators)
        if ann.shape != (n,) or not np.issubdtype(ann.dtype, np.integer) or (ann < 0).any():
            raise ValueError(
                f"pool.annotators: expected {n} integer counts >= 0 (shape ({n},)), got "
                f"dtype {ann.dtype} shape {ann.shape}"
            )
        set_(self, "annotators", ann.astype(np.int64))
        agr = np.full(n, np.nan) if self.agreement is None else self.agreement
        agr = check_vector(agr, "pool.agreement", n, allow_nan=True)
        check_agreement_range(agr, "pool.agreement")
        lonely = ~np.isnan(agr) & (self.annotators < 2)
        if lonely.any():
            raise ValueError(
                "pool.agreement: expected NaN for tiles with fewer than two annotators, got "
                f"values at row(s) {np.flatnonzero(lonely)[:5].tolist()}; agreement needs two"
            )
        set_(self, "agreement", agr)
        for name in ("ids", "embeddings", "entropy", "margin", "least_confidence", "bald",
                     "class_fractions", "annotators", "agreement"):
            view = getattr(self, name).view()
            view.flags.writeable = False  # the pool is validated once; keep it as checked
            set_(self, name, view)

    def __len__(self) -> int:
        """Number of tiles N."""
        return int(self.ids.shape[0])

    @property
    def labelled(self) -> np.ndarray:
        """Bool (N,): at least one annotator saved a mask."""
        return self.annotators > 0

    @classmethod
    def from_tiles(
        cls,
        ids: Sequence[object],
        embeddings: np.ndarray,
        tiles: Sequence[TileUncertainty],
        *,
        annotators: np.ndarray | None = None,
        agreement: np.ndarray | None = None,
    ) -> CandidatePool:
        """Build a pool from one :class:`TileUncertainty` per tile.

        Parameters
        ----------
        ids : sequence, length N
            Tile identifiers, unique.
        embeddings : ndarray, shape (N, D)
            Pooled encoder embedding per tile.
        tiles : sequence of TileUncertainty, length N
            The scores of each tile, in the order of ``ids``.
        annotators, agreement : ndarray, shape (N,), optional
            As in the class parameters.

        Returns
        -------
        CandidatePool
        """
        if len(tiles) != len(ids):
            raise ValueError(
                f"tiles: expected {len(ids)} TileUncertainty like ids, got {len(tiles)}"
            )
        return cls(
            ids=ids if isinstance(ids, np.ndarray) else list(ids),
            embeddings=embeddings,
            entropy=np.array([t.entropy for t in tiles], float),
            margin=np.array([t.margin for t in tiles], float),
            least_confidence=np.array([t.least_confidence for t in tiles], float),
            bald=np.array([t.bald for t in tiles], float),
            class_fractions=np.array([t.class_fractions for t in tiles], float).reshape(
                len(tiles), -1
            ),
            annotators=annotators,
            agreement=agreement,
        )
