"""Active learning: which tiles the annotators see next (numpy only).

Three layers, each taking and returning arrays, one module each:

1. **Per pixel** (:mod:`~labeler.picker.uncertainty`): entropy, margin, least confidence
   and BALD of class probabilities, and their stack :func:`uncertainty_maps` whose
   channels follow :data:`UNCERTAINTY_MEASURES` (the one list of those names).
2. **Per tile** (:mod:`~labeler.picker.tile_scores`): :func:`tile_uncertainty`,
   :func:`class_rarity`, :func:`rarity_weights`, :func:`disagreement_scores`, the
   scalars a proposal carries in the store.
3. **Per batch**: the greedy k-center core-set (:mod:`~labeler.picker.coreset`) and
   :func:`pick_batch` (:mod:`~labeler.picker.pick`) over a :class:`CandidatePool`
   (:mod:`~labeler.picker.pool`): which tiles come next, in order, each with a score and
   a reason out of :data:`REASONS`.

Masks picked here only decide which tiles people look at first. They are not field
advice; see the README for the cautions on spraying and fungicide decisions.
"""

from __future__ import annotations

from labeler.picker.coreset import covering_radius, k_center_greedy
from labeler.picker.pick import REASONS, STRATEGIES, Pick, pick_batch
from labeler.picker.pool import CandidatePool
from labeler.picker.tile_scores import (
    TileUncertainty,
    class_rarity,
    disagreement_scores,
    rarity_weights,
    tile_uncertainty,
)
from labeler.picker.uncertainty import (
    UNCERTAINTY_MEASURES,
    pixel_bald,
    pixel_entropy,
    pixel_least_confidence,
    pixel_margin,
    uncertainty_maps,
)

__all__ = [
    "UNCERTAINTY_MEASURES",
    "pixel_entropy",
    "pixel_margin",
    "pixel_least_confidence",
    "pixel_bald",
    "uncertainty_maps",
    "TileUncertainty",
    "tile_uncertainty",
    "class_rarity",
    "rarity_weights",
    "disagreement_scores",
    "k_center_greedy",
    "covering_radius",
    "CandidatePool",
    "STRATEGIES",
    "REASONS",
    "Pick",
    "pick_batch",
]
