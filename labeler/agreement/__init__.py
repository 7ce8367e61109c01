"""Inter-annotator agreement: coefficients, tile agreement, consensus, report summary.

Pure numpy: every function takes and returns arrays (or plain dataclasses of arrays);
nothing here opens a file, talks to the store or imports torch or textual. The pixel
metrics it builds on (confusion matrix, IoU, Dice, mean IoU) live in
:mod:`labeler.metrics`, shared with training.

Modules, one concept each:

* :mod:`~labeler.agreement.kappa` -- Cohen's and Fleiss' kappa, Krippendorff's alpha,
  Landis & Koch bands, and the convention for undefined coefficients;
* :mod:`~labeler.agreement.tile` -- the agreement scalar of one tile (what a tile is
  contested on) and the boundary F score;
* :mod:`~labeler.agreement.consensus` -- per-pixel majority and STAPLE;
* :mod:`~labeler.agreement.figures` and :mod:`~labeler.agreement.summary` -- the
  figures behind the report and the agreement table, and how they are pooled.

Masks are integer class-index arrays (``uint8`` in the project) in which 255
(:data:`labeler.classes.UNLABELLED`) marks a pixel that the annotator left unlabelled;
such pixels are never compared.
"""

from __future__ import annotations

from labeler.agreement.consensus import StapleResult, majority_vote, staple
from labeler.agreement.figures import (
    AgreementSummary,
    ClassFigures,
    ComparedImage,
    DayFigures,
    ImageFigures,
    PairFigures,
    TileFigures,
)
from labeler.agreement.kappa import (
    LANDIS_KOCH_BANDS,
    cohen_kappa,
    fleiss_kappa,
    fleiss_kappa_masks,
    kappa_per_class,
    krippendorff_alpha,
    landis_koch_band,
)
from labeler.agreement.summary import summarise_agreement
from labeler.agreement.tile import AGREEMENT_METRICS, boundary_f_score, tile_agreement

__all__ = [
    "LANDIS_KOCH_BANDS",
    "landis_koch_band",
    "cohen_kappa",
    "kappa_per_class",
    "fleiss_kappa",
    "fleiss_kappa_masks",
    "krippendorff_alpha",
    "AGREEMENT_METRICS",
    "tile_agreement",
    "boundary_f_score",
    "majority_vote",
    "StapleResult",
    "staple",
    "ComparedImage",
    "PairFigures",
    "ClassFigures",
    "ImageFigures",
    "TileFigures",
    "DayFigures",
    "AgreementSummary",
    "summarise_agreement",
]
